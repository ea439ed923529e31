"""``trimtab demo``: the report shows what the invented cold-chain scenario contains.

Must-show 3 of the replay issue. The scenario's ground truth comes from the generator
(``service.replay.scenario.ground_truth``): a faulty gateway sends Fahrenheit numbers labelled Celsius for
events 31,104 to 33,177 and the probe is recalibrated at event 57,024. The guarded run must roll
back during the fault and restart after the recalibration; the unguarded run's progressive loss
must be worse. The figures are printed (``pytest -s``) whatever the outcome.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

from service.replay.report import DEMO_CAUTION
from tests.service.replay.test_report import check_report

ROOT = Path(__file__).resolve().parents[3]


def test_demo_report_shows_the_fault_and_the_change(tmp_path):
    out = tmp_path / "demo"
    start = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "service.cli", "demo", "--out", str(out)], cwd=tmp_path,
                          capture_output=True, text=True, timeout=300)
    took = time.monotonic() - start
    print(proc.stdout)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert f"report: {(out / 'report.html').resolve()}" in proc.stdout
    check_report(out, ["guarded", "unguarded"], caution=DEMO_CAUTION)
    runs = {r["name"]: r for r in json.loads((out / "summary.json").read_text())["runs"]}
    g, u = runs["guarded"], runs["unguarded"]
    fault, recal = (31_104, 33_178), 57_024
    during = [r["event"] for r in g["rollbacks"] if fault[0] <= r["event"] <= fault[1]]
    after = [r["event"] for r in g["restarts"] if r["event"] > recal]
    print(f"demo took {took:.1f} s; guarded rollbacks {[r['event'] for r in g['rollbacks']]} (in the fault: "
          f"{during}), restarts {[r['event'] for r in g['restarts']]} (after the recalibration: {after}); "
          f"progressive loss guarded {g['progressive_loss']:.4g} vs unguarded {u['progressive_loss']:.4g}; "
          f"final held-out loss of the serving iterate guarded {g['holdout_loss']} unguarded {u['holdout_loss']}")
    assert took < 120
    assert during, "the guarded run did not roll back during the gateway fault"
    assert after, "the guarded run did not restart after the recalibration"
    print(f"progressive loss outside the fault: guarded {g['progressive_loss_outside_fault']:.4g}, unguarded "
          f"{u['progressive_loss_outside_fault']:.4g}; unguarded alarms not acted on: {u['alarms_ignored']}")
    assert u["progressive_loss"] > g["progressive_loss"], "the unguarded run's progressive loss is not worse"
    assert u["progressive_loss_outside_fault"] > g["progressive_loss_outside_fault"]
    assert u["holdout_loss"]["raw"] > g["holdout_loss"]["raw"]
    assert u["alarms_ignored"] > 0 and u["verdict"].startswith("not stable")
