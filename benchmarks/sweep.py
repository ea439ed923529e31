"""How a config sweep scales with Dask workers: 8 configs, 2 workers against 1, whole process.

A seeded 400,000-event feed of the cold-chain scenario (``service.replay.scenario``, about 74 MB of
NDJSON with its drift, faulty-sensor burst and malformed lines) is written to a temporary folder.
Then ``trimtab sweep FEED -c replay_data/configs/guarded.toml`` with a 2 x 2 x 2 grid
(``steps.rule``, ``averaging.scheme``, ``monitor.drift``: 8 configs) runs as a separate process,
``--no-report --no-progress``, once with ``--workers 1`` and once with ``--workers 2`` per
repeat; the order alternates between repeats so that a change in the machine's load does not
favour one side.

Each pair is run twice: as a user runs it (a worker parses the feed once and reuses the chunks
for its later runs) and with ``--parse-each-run`` (every run parses the feed itself). Figures,
medians over the repeats:

* ``sweep_speedup``: whole-process seconds with 1 worker / with 2 workers (goal >= 1.7 on 2 cores);
* ``sweep_speedup_runs``: the same for the runs alone (first submit to last result, from
  ``sweep.json``), without starting and stopping the local cluster;
* ``sweep_speedup_parse_each_run``: ``sweep_speedup`` with ``--parse-each-run``;
* ``reuse_gain_1_worker``, ``reuse_gain_2_workers``: seconds with ``--parse-each-run`` / without;
* ``cluster_start_seconds``: starting the local cluster (scheduler, nannies, worker processes);
* ``machine_parallel_speedup``: what this machine gives two processes right now, without Dask:
  two ``trimtab replay --no-report`` processes of the base config one after the other / both at
  once. On a shared machine this bounds ``sweep_speedup``.

Every repeat also checks that both sweeps gave the same ``state_digest`` for every run.
Usage: ``python3 benchmarks/sweep.py [--events N] [--repeat K]``. The last line is one JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

BASE = ROOT / "replay_data" / "configs" / "guarded.toml"
VARY = ["--vary", "steps.rule=anytime,sqrt_decay", "--vary", "averaging.scheme=uniform,weighted",
        "--vary", "monitor.drift=page_hinkley,adwin"]


def sweep(feed: Path, out: Path, workers: int, extra: tuple = ()) -> tuple[float, dict]:
    """Whole-process seconds of one sweep and its ``sweep.json``."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "service.cli", "sweep", str(feed), "-c", str(BASE), *VARY,
                           "--out", str(out), "--workers", str(workers), "--no-report", "--no-progress", *extra],
                          env=env, capture_output=True, text=True, timeout=3600)
    seconds = time.perf_counter() - start
    if proc.returncode != 0:
        raise SystemExit(f"sweep with {workers} worker(s) failed:\n{proc.stderr}")
    return seconds, json.loads((out / "sweep.json").read_text())


def machine_parallel(feed: Path, folder: Path) -> float:
    """Seconds of two plain replays one after the other divided by the seconds of both at once."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))

    def command(k: int) -> list:
        return [sys.executable, "-m", "service.cli", "replay", str(feed), "-c", str(BASE), "--out",
                str(folder / f"replay-{k}"), "--no-report", "--no-progress"]

    start = time.perf_counter()
    for k in range(2):
        subprocess.run(command(k), env=env, capture_output=True, check=True, timeout=3600)
    serial = time.perf_counter() - start
    start = time.perf_counter()
    procs = [subprocess.Popen(command(k), env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
             for k in range(2)]
    for proc in procs:
        proc.wait(timeout=3600)
    return serial / (time.perf_counter() - start)


def _digests(result: dict) -> dict:
    return {row["name"]: row["state_digest"] for row in result["ranking"]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--events", type=int, default=400_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    from service.replay.scenario import write_ndjson

    with tempfile.TemporaryDirectory(prefix="trimtab-bench-sweep-") as tmp:
        folder = Path(tmp)
        feed = folder / "coldchain.ndjson"
        write_ndjson(feed, args.events, seed=3)
        pairs, same = [], True
        print(f"{args.events:,} events, 8 configs; load average before: {os.getloadavg()[0]:.1f}")
        print(f"{'repeat':>6} {'parse':>10} {'1 worker s':>11} {'2 workers s':>12} {'speedup':>8} {'runs 1 s':>9} "
              f"{'runs 2 s':>9} {'runs speedup':>13} {'load':>5}")
        for k in range(args.repeat):
            row = {}
            for mode, extra in (("reuse", ()), ("each", ("--parse-each-run",))):
                order = (1, 2) if k % 2 == 0 else (2, 1)
                got = {w: sweep(feed, folder / f"out-{k}-{mode}-{w}", w, extra) for w in order}
                same &= _digests(got[1][1]) == _digests(got[2][1])
                runs = {w: got[w][1]["executor"]["runs_seconds"] for w in (1, 2)}
                row[mode] = {"whole_1": got[1][0], "whole_2": got[2][0], "speedup": got[1][0] / got[2][0],
                             "runs_1": runs[1], "runs_2": runs[2], "speedup_runs": runs[1] / runs[2],
                             "start": [got[w][1]["executor"]["start_seconds"] for w in (1, 2)],
                             "load": os.getloadavg()[0]}
                p = row[mode]
                print(f"{k + 1:>6} {mode:>10} {p['whole_1']:>11.1f} {p['whole_2']:>12.1f} {p['speedup']:>8.2f} "
                      f"{p['runs_1']:>9.1f} {p['runs_2']:>9.1f} {p['speedup_runs']:>13.2f} {p['load']:>5.1f}")
            row["machine"] = machine_parallel(feed, folder)
            print(f"{k + 1:>6} {'machine':>10} two plain replays at once: {row['machine']:.2f}x one after the other")
            pairs.append(row)

    def med(mode: str, key: str) -> float:
        return round(statistics.median(p[mode][key] for p in pairs), 3)

    def gain(key: str) -> float:
        return round(statistics.median(p["each"][key] / p["reuse"][key] for p in pairs), 3)

    speedups = [p["reuse"]["speedup"] for p in pairs]
    result = {
        "events": args.events, "configs": 8, "repeats": args.repeat,
        "sweep_speedup": med("reuse", "speedup"), "sweep_speedup_runs": med("reuse", "speedup_runs"),
        "sweep_speedup_range": [round(min(speedups), 3), round(max(speedups), 3)],
        "sweep_speedup_parse_each_run": med("each", "speedup"),
        "sweep_speedup_runs_parse_each_run": med("each", "speedup_runs"),
        "seconds_1_worker": med("reuse", "whole_1"), "seconds_2_workers": med("reuse", "whole_2"),
        "seconds_1_worker_parse_each_run": med("each", "whole_1"),
        "seconds_2_workers_parse_each_run": med("each", "whole_2"),
        "reuse_gain_1_worker": gain("whole_1"), "reuse_gain_2_workers": gain("whole_2"),
        "cluster_start_seconds": round(statistics.median(s for p in pairs for m in ("reuse", "each")
                                                         for s in p[m]["start"]), 2),
        "machine_parallel_speedup": round(statistics.median(p["machine"] for p in pairs), 3),
        "same_digests": same, "cores": os.cpu_count(), "python": platform.python_version(),
        "load_average_after": round(os.getloadavg()[0], 2), "goal_sweep_speedup": 1.7,
    }
    print(json.dumps(result))


if __name__ == "__main__":
    main()
