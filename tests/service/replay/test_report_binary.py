"""The report of binary runs: the binary metrics table, and the verdict of a run that blew up.

Two configs replay the first 4,000 lines of the invented binary cold-chain feed: a sound one and one
with a constant step of 1e6 and no constraint, whose margins grow until its log loss is thousands of
times the base rate's (a logistic loss has bounded gradients, so the weights grow by about the step
each update instead of overflowing). The page is checked as ``test_report.check_report`` does
(inline SVG figures parsed as XML); the figures against the run's own summary.json.
"""

from __future__ import annotations

import gzip
import json
import shutil
from pathlib import Path

import pytest

from service.cli import main
from service.config import load_config
from service.engine import Engine
from service.events import EventValidator
from tests.service.replay.test_promote import _doc_example
from tests.service.replay.test_report import check_report

ROOT = Path(__file__).resolve().parents[3]
BINARY_FEED = ROOT / "replay_data" / "coldchain-demo-binary.ndjson.gz"

_CONFIG = """name = "{name}"
[features]
numeric = ["ambient_c", "compressor_duty", "door_open_s", "load_kg"]
categorical = ["van", "route"]
hash_bits = 10
[model]
task = "binary"
loss = "logistic"
[constraint]
set = "{set}"
[steps]
rule = "{rule}"
base = {base}
[monitor]
check_every = 200
window = 1000
"""


@pytest.mark.slow
def test_binary_report_shows_metrics_and_a_diverged_verdict(tmp_path, monkeypatch):
    with gzip.open(BINARY_FEED) as f:
        lines = f.read().split(b"\n")[:4000]
    feed = tmp_path / "binary.ndjson"
    feed.write_bytes(b"\n".join(lines) + b"\n")
    sound, blowup = tmp_path / "sound.toml", tmp_path / "blowup.toml"
    sound.write_text(_CONFIG.format(name="sound", set="ball", rule="anytime", base=0.05))
    blowup.write_text(_CONFIG.format(name="blowup", set="none", rule="constant", base=1e6))
    out = tmp_path / "out"
    assert main(["replay", str(feed), "-c", str(sound), "-c", str(blowup), "--out", str(out), "--no-progress",
                 "--jobs", "1"]) == 0
    runs = {r["name"]: r for r in json.loads((out / "summary.json").read_text())["runs"]}
    assert runs["sound"]["diverged"] is None
    assert runs["blowup"]["diverged"] and runs["blowup"]["verdict"].startswith("diverged: ")
    page = check_report(out, ["sound", "blowup"], min_points=10)  # 4,000 events: about 19 checks
    text = " ".join(page.text)
    assert "Binary metrics" in text and runs["blowup"]["verdict"] in text
    for run in runs.values():
        for where in ("progressive", "holdout"):
            m = run["binary_metrics"][where]
            assert 0.0 <= m["accuracy"] <= 1.0 and 0.0 <= m["brier"] <= 1.0
            for key in ("roc_auc", "brier", "log_loss", "base_rate"):
                assert f"{m[key]:.4g}" in text  # the page's 4 significant digits

    # docs/model-file.md's example on a binary model (its logistic link): the run's folder under the
    # name the example reads, against the probability the run's final state gives
    (tmp_path / "replay-out").mkdir()
    shutil.copytree(out / "sound", tmp_path / "replay-out" / "guarded")
    monkeypatch.chdir(tmp_path)
    namespace: dict = {"__name__": "model_file_example"}
    exec(compile(_doc_example(), "docs/model-file.md", "exec"), namespace)
    config = load_config(sound)
    engine = Engine.from_bytes(config, (out / "sound" / "state.bin").read_bytes())
    expected, _ = engine.score([EventValidator(config).validate({"features": namespace["event"]}).features])
    assert 0.0 < namespace["score"] < 1.0 and abs(namespace["score"] - float(expected[0])) <= 1e-12
