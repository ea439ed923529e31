"""Replay speed as a user sees it: whole processes, against parsing and a river loop on the same file.

A seeded feed of the demo scenario (``service.replay.scenario.write_ndjson``, 400,000 events by
default, no malformed lines) is written as NDJSON and the same events as Parquet. Then, in rounds
(each round runs every measurement once, so a slow spell of the shared machine hits all of them
alike), each as its own ``python`` process timed from start to exit:

* ``replay``: ``trimtab replay FEED -c guarded.toml --out DIR`` (with its report);
* ``replay_no_report``: the same with ``--no-report``;
* ``replay_monitor_off``: ``--no-report`` with the same config but ``[monitor] enabled = false``;
* ``replay_parquet``: ``--no-report`` over the Parquet file;
* ``parse``: a loop that only ``orjson.loads`` each line (the floor of any NDJSON replay);
* ``river``: the same loop with river's ``LinearRegression`` (``predict_one`` then ``learn_one`` per
  event; numeric features as they are, categoricals one-hot);
* ``first_event``: ``trimtab replay`` of a one-event feed with ``--no-report`` (an upper bound on
  the time from start to the first learned event, compiled kernels cached: the kernels are built
  ahead of time, ``python -m service.kernels build``, before the rounds, as is trimtab's bytecode,
  ``python -m compileall``, and the config's entry in the cache of validated configs by the first run);
* ``first_learned``: seconds from spawning ``trimtab replay`` of the whole NDJSON feed (``--no-report``)
  to the end of its first ``Engine.apply``, i.e. its first chunk learned (a wrapper patches that one
  method in the child and prints the time); the issue's own measure, ``first_event`` bounds it;
* ``draw``: in this process, drawing one run's report page (its SVG figures and the HTML) from the
  feed's trace and from the same trace ten times over (``report_draw_seconds_per_run`` and
  ``..._10x_feed``: the page's drawing time should not grow with the feed; goal <= 0.5 s).

The medians over the rounds are reported (and each ratio's median over the rounds, ``per_round``), with each process's CPU time (user + system, its
children included) beside the wall time: on a shared machine the wall time also counts the waits
for a core. Ratios: ``replay_vs_river`` = river / replay (goal >= 3),
``replay_vs_parse`` = parse / replay without report (goal >= 0.7), ``monitor_on_vs_off`` = replay
without report, monitor on / off (goal <= 1.10), ``parquet_events_per_s`` (goal >= 1,000,000),
``first_event_seconds`` (whole process; goal <= 0.3 for the first event learned, which
``first_learned_seconds`` measures), ``mixed_vs_clean`` = replay without report of the clean feed over
the same feed with the categorical ``van`` a number for odd vans (``replay_mixed``; goal >= 0.5).
Beside them, not a goal: ``ndjson_events_per_s_in_run`` and ``parquet_events_per_s_in_run``, the
runs' own rate from their ``summary.json`` (start-up and output writing excluded). The last line is one JSON object.

Usage: ``python3 benchmarks/replay.py [--events N] [--rounds K] [--only NAME ...]``.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CONFIG = ROOT / "replay_data" / "configs" / "guarded.toml"

PARSE = """
import sys, orjson
with open(sys.argv[1], "rb") as f:
    for line in f:
        orjson.loads(line)
"""

RIVER = """
import sys, orjson
from river import linear_model
model = linear_model.LinearRegression()
with open(sys.argv[1], "rb") as f:
    for line in f:
        e = orjson.loads(line)
        x = {k: v for k, v in e["features"].items() if not isinstance(v, str)}
        x.update({f"{k}={v}": 1.0 for k, v in e["features"].items() if isinstance(v, str)})
        model.predict_one(x)
        model.learn_one(x, e["target"])
"""


FIRST_LEARNED = """
import sys, time
from service import engine

apply = engine.Engine.apply


def first(self, batch):
    out = apply(self, batch)
    if engine.Engine.apply is first:
        engine.Engine.apply = apply
        print(f"FIRST_LEARNED {time.time()!r}", file=sys.stderr, flush=True)
    return out


engine.Engine.apply = first
from service.cli import main

sys.exit(main(sys.argv[1:]))
"""


def first_learned(cmd: list[str]) -> tuple[float, float]:
    """Seconds from spawning ``trimtab replay`` (``cmd``'s arguments after ``service.cli``) to the end
    of its first ``Engine.apply`` (the first chunk learned; the wrapper patches only that method, in
    the child), and the process's CPU seconds."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.time()
    proc = subprocess.run([sys.executable, "-c", FIRST_LEARNED, *cmd[cmd.index("service.cli") + 1:]], env=env,
                          capture_output=True, text=True)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    stamp = [line for line in proc.stderr.splitlines() if line.startswith("FIRST_LEARNED ")]
    if proc.returncode != 0 or not stamp:
        raise SystemExit(f"first_learned failed:\n{proc.stderr[-3000:]}")
    return (float(stamp[0].split()[1]) - start,
            (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime))


def write_mixed(nd: Path, folder: Path) -> Path:
    """The same events with the categorical ``van`` a JSON number for odd vans and a string for the
    others (a column that mixes types, which Arrow's reader refuses as one column)."""
    import orjson

    mixed = folder / "mixed.ndjson"
    with open(nd, "rb") as src, open(mixed, "wb") as dst:
        for line in src:
            e = orjson.loads(line)
            van = e["features"].get("van")
            if isinstance(van, str) and van[1:].isdigit() and int(van[1:]) % 2:
                e["features"]["van"] = int(van[1:])
            dst.write(orjson.dumps(e) + b"\n")
    return mixed


def write_feeds(folder: Path, n: int) -> tuple[Path, Path, Path]:
    """The NDJSON feed, the same events as Parquet, and a one-event feed."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from service.replay.scenario import generate, write_ndjson

    nd = folder / "feed.ndjson"
    write_ndjson(nd, n, seed=7, malformed_share=0.0, gzip=False)
    cols: dict[str, list] = {"id": [], "ts": [], "target": []}
    for e in generate(n, seed=7):
        cols["id"].append(e["id"])
        cols["ts"].append(e["ts"])
        cols["target"].append(e["target"])
        for k, v in e["features"].items():
            cols.setdefault(k, []).append(v)
    table = pa.table({k: pa.array(v, pa.string() if isinstance(v[0], str) else pa.float64())
                      for k, v in cols.items()})
    pq.write_table(table, folder / "feed.parquet")
    one = folder / "one.ndjson"
    with open(nd, "rb") as f:
        one.write_bytes(f.readline())
    return nd, folder / "feed.parquet", one


def timed(cmd: list[str]) -> tuple[float, float]:
    """Wall-clock seconds of one process from start to exit, and the CPU seconds (user + system) that it
    and its children used: on a shared machine the CPU time says what the wall time would be alone."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True)
    took = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed:\n{proc.stderr[-3000:]}")
    return took, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def commands(folder: Path, nd: Path, parquet: Path, one: Path) -> dict[str, list[str]]:
    off = folder / "monitor-off.toml"
    off.write_text(CONFIG.read_text().replace("[monitor]\n", "[monitor]\nenabled = false\n"))
    replay = [sys.executable, "-m", "service.cli", "replay"]
    quiet = ["--no-progress"]
    return {
        "replay": replay + [str(nd), "-c", str(CONFIG), "--out", str(folder / "r1")] + quiet,
        "replay_no_report": replay + [str(nd), "-c", str(CONFIG), "--out", str(folder / "r2"), "--no-report"] + quiet,
        "replay_monitor_off": replay + [str(nd), "-c", str(off), "--out", str(folder / "r3"), "--no-report"] + quiet,
        "replay_parquet": replay + [str(parquet), "-c", str(CONFIG), "--out", str(folder / "r4"), "--no-report"] + quiet,
        "parse": [sys.executable, "-c", PARSE, str(nd)],
        "river": [sys.executable, "-c", RIVER, str(nd)],
        "replay_mixed": replay + [str(write_mixed(nd, folder)), "-c", str(CONFIG), "--out", str(folder / "r6"),
                         "--no-report"] + quiet,
        "first_event": replay + [str(one), "-c", str(CONFIG), "--out", str(folder / "r5"), "--no-report"] + quiet,
        "first_learned": replay + [str(nd), "-c", str(CONFIG), "--out", str(folder / "r7"), "--no-report"] + quiet,
    }


def drawing(nd: Path, folder: Path, repeat: int) -> dict:
    """Seconds to draw one run's report page in this process, for the feed's own trace and for the same
    trace ten times over (a feed ten times longer), median of ``repeat``: the envelope should make the
    two equal."""
    from service.config import load_config
    from service.replay.report import write_report
    from service.replay.runner import run_replay

    res = run_replay([nd], load_config(CONFIG))
    trace = res["trace"]
    span = trace["event"][-1] + 1
    long = {k: (v * 10 if k != "event" else [e + r * span for r in range(10) for e in v]) for k, v in trace.items()}
    summary = {"feed": str(nd), "feeds": [str(nd)], "runs": [res["summary"]]}
    out = {"checks": len(trace["event"])}
    for name, tr in (("report_draw_seconds_per_run", trace), ("report_draw_seconds_per_run_10x_feed", long)):
        times, cpu = [], []
        for _ in range(repeat):
            start, used = time.perf_counter(), time.process_time()
            write_report(folder, summary, [dict(res, trace=tr)])
            times.append(time.perf_counter() - start)
            cpu.append(time.process_time() - used)
        out[name] = round(statistics.median(times), 3)
        out[name.replace("seconds", "cpu_seconds")] = round(statistics.median(cpu), 3)
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--events", type=int, default=400_000)
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--only", nargs="*", default=None, help="measure only these (names as in the docstring)")
    a = p.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        nd, parquet, one = write_feeds(folder, a.events)
        cmds = commands(folder, nd, parquet, one)
        if a.only:
            cmds = {k: v for k, v in cmds.items() if k in a.only}
        # trimtab's bytecode, as an installed package has it (pip compiles at install): with
        # PYTHONDONTWRITEBYTECODE set, every process would otherwise compile the sources (0.1 s of a start)
        subprocess.run([sys.executable, "-m", "compileall", "-q", str(ROOT / "service"), str(ROOT / "models")],
                       capture_output=True, check=True)
        timed(cmds.get("first_event") or next(iter(cmds.values())))  # load (or compile) the kernels once
        if (ROOT / "service" / "kernels.py").exists():  # and build them ahead of time (else built in the background)
            timed([sys.executable, "-m", "service.kernels", "build"])
        times: dict[str, list[float]] = {k: [] for k in cmds}
        cpu: dict[str, list[float]] = {k: [] for k in cmds}
        for r in range(a.rounds):
            # every other round runs in reverse order, so that no measurement always follows another
            for name, cmd in (list(cmds.items()) if r % 2 == 0 else list(cmds.items())[::-1]):
                wall, used = first_learned(cmd) if name == "first_learned" else timed(cmd)
                times[name].append(wall)
                cpu[name].append(used)
            print(f"round {r + 1}: " + ", ".join(f"{k} {v[-1]:.2f}" for k, v in times.items()), file=sys.stderr)
        drawn = drawing(nd, folder, a.rounds) if not a.only or "draw" in a.only else {}
        digests, in_run = {}, {}
        for name, out in (("ndjson", "r2"), ("parquet", "r4")):
            path = folder / out / "summary.json"
            if path.exists():
                run = json.loads(path.read_text())["runs"][0]
                digests[name] = run["state_digest"]
                in_run[name] = run["events_per_second"]
    med = {k: statistics.median(v) for k, v in times.items()}
    n = a.events
    out: dict = {"events": n, "rounds": a.rounds, "seconds_median": {k: round(v, 3) for k, v in med.items()},
                 "seconds_range": {k: [round(min(v), 3), round(max(v), 3)] for k, v in times.items()},
                 "cpu_seconds_median": {k: round(statistics.median(v), 3) for k, v in cpu.items()},
                 "load_average": round(os.getloadavg()[0], 2)}

    def ratio(name, top, bottom):
        if top in med and bottom in med:
            out[name] = round(med[top] / med[bottom], 3)
            # the same ratio within each round (the two measured minutes apart, not a whole run
            # apart), then the median: steadier when the machine's load drifts
            out["per_round"][name] = round(statistics.median(t / b for t, b in zip(times[top], times[bottom])), 3)

    out["per_round"] = {}

    ratio("replay_vs_river", "river", "replay")
    ratio("replay_no_report_vs_river", "river", "replay_no_report")
    ratio("replay_vs_parse", "parse", "replay_no_report")
    ratio("replay_with_report_vs_parse", "parse", "replay")
    ratio("monitor_on_vs_off", "replay_no_report", "replay_monitor_off")
    ratio("mixed_vs_clean", "replay_no_report", "replay_mixed")
    if "replay_parquet" in med:
        out["parquet_events_per_s"] = round(n / med["replay_parquet"])
    # the same runs by their own clock (from the start of the run to its last event: interpreter
    # start-up, imports and writing the outputs excluded), from the last round's summary.json; the
    # goals above stay whole-process
    for name in ("ndjson", "parquet"):
        if in_run.get(name):
            out[f"{name}_events_per_s_in_run"] = round(in_run[name])
    if "first_event" in med:
        out["first_event_seconds"] = round(med["first_event"], 3)
    if "first_learned" in med:
        out["first_learned_seconds"] = round(med["first_learned"], 3)
    if "replay" in med and "replay_no_report" in med:
        out["report_seconds"] = round(med["replay"] - med["replay_no_report"], 3)
    out.update(drawn)
    if len(digests) == 2:
        out["digests_equal"] = digests["ndjson"] == digests["parquet"]
    for k, v in out.items():
        print(f"{k:28s} {v}", file=sys.stderr)
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
