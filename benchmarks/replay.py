"""Replay speed against parsing and against river, measured in the same run.

A seeded 200,000-event NDJSON feed (about 215 bytes an event: 8 numeric and 1 categorical
feature, invented sensor readings) is written to a temporary folder, then timed (best of
``--repeat``):

* ``parse``: a loop that only ``orjson.loads`` each line (the floor of any NDJSON replay);
* ``river``: the same loop plus river's ``LinearRegression`` ``predict_one`` + ``learn_one``;
* ``replay``: ``trimtab replay FEED -c CONFIG --out DIR --no-report`` called in this process (read,
  parse, validate, learn, monitor on, summary and model written; the report's plots are left
  out, and timed separately as ``report_seconds``);
* ``replay_exact``: the same with ``--exact-parse`` (orjson line by line, no Arrow);
* ``parquet``: the same events as a Parquet file;
* ``replay_mixed``: the same feed where the categorical ``site`` is a JSON number for odd sites
  and a string for even ones (a column that mixes types, which Arrow's reader refuses as one column).

The last line is one JSON object with ``replay_vs_parse`` (goal >= 0.7), ``replay_vs_river``
(goal >= 1.5), ``parquet_events_per_s`` (goal >= 1,000,000) and ``mixed_vs_clean`` (replay of the
mixed feed against the clean one, goal >= 0.5), and the figures behind them.
Usage: ``python3 benchmarks/replay.py [--events N] [--repeat K]``.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from argparse import Namespace
from pathlib import Path

import numpy as np
import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

NUMERIC = [f"x{k}" for k in range(8)]
CONFIG = f"""
name = "bench"
[features]
numeric = {json.dumps(NUMERIC)}
categorical = ["site"]
hash_bits = 10
[model]
loss = "squared"
[constraint]
set = "ball"
radius = 50.0
[steps]
rule = "anytime"
[monitor]
holdout_share = 0.05
window = 2000
check_every = 250
drift = "page_hinkley"
serve = "averaged"
"""


def write_feed(folder: Path, n: int) -> tuple[Path, Path, Path]:
    """The NDJSON feed, the same events as Parquet, and the NDJSON feed with a mixed-type categorical."""
    rng = np.random.default_rng(2026)
    x = np.round(rng.normal(10.0, 3.0, (n, len(NUMERIC))), 6)
    site = rng.integers(0, 40, n)
    w = rng.normal(0.0, 1.0, len(NUMERIC))
    y = np.round(x @ w + 0.1 * site + rng.normal(0.0, 0.5, n), 3)
    ts = 1772439300.0 + 15.0 * np.arange(n)
    nd, mixed = folder / "bench.ndjson", folder / "mixed.ndjson"
    with open(nd, "wb") as f, open(mixed, "wb") as g:
        for i in range(n):
            feats = dict(zip(NUMERIC, x[i].tolist()))
            feats["site"] = f"site-{int(site[i]):03d}"
            event = {"id": f"ev-{i:09d}", "ts": float(ts[i]), "features": feats, "target": float(y[i])}
            f.write(orjson.dumps(event) + b"\n")
            if site[i] % 2:
                feats["site"] = int(site[i])
            g.write(orjson.dumps(event) + b"\n")
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = {"id": [f"ev-{i:09d}" for i in range(n)], "ts": ts, "target": y}
    cols.update({name: x[:, k] for k, name in enumerate(NUMERIC)})
    cols["site"] = [f"site-{int(s):03d}" for s in site]
    pq.write_table(pa.table(cols), folder / "bench.parquet")
    return nd, folder / "bench.parquet", mixed


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def interleaved(first, second, repeat: int) -> tuple[float, float]:
    """Best times of two functions run in turns, so that a busy spell of the machine hits both."""
    times: tuple[list, list] = ([], [])
    for _ in range(repeat):
        for fn, out in zip((first, second), times):
            start = time.perf_counter()
            fn()
            out.append(time.perf_counter() - start)
    return min(times[0]), min(times[1])


def parse_loop(path: Path) -> None:
    with open(path, "rb") as f:
        for line in f:
            orjson.loads(line)


def river_loop(path: Path) -> None:
    from river import linear_model

    model = linear_model.LinearRegression()
    with open(path, "rb") as f:
        for line in f:
            e = orjson.loads(line)
            x = {k: v for k, v in e["features"].items() if k != "site"}
            model.predict_one(x)
            model.learn_one(x, e["target"])


def replay(feed: Path, config: Path, out: Path, **flags) -> dict:
    from service.replay.runner import replay_main

    args = Namespace(feeds=[str(feed)], config=[str(config)], out=str(out), to=None, speed=None,
                     token_env="TRIMTAB_TOKEN", batch=1000, jobs=1, no_progress=True, no_report=True,
                     exact_parse=False)
    for k, v in flags.items():
        setattr(args, k, v)
    import contextlib
    import io

    with contextlib.redirect_stdout(io.StringIO()):
        assert replay_main(args) == 0
    return json.loads((out / "summary.json").read_text())["runs"][0]


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--events", type=int, default=200_000)
    p.add_argument("--repeat", type=int, default=3)
    a = p.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        nd, parquet, mixed = write_feed(folder, a.events)
        config = folder / "bench.toml"
        config.write_text(CONFIG)
        bytes_per_event = nd.stat().st_size / a.events
        replay(nd, config, folder / "warm")  # compile or load the kernels once
        t_parse = best(lambda: parse_loop(nd), a.repeat)
        t_river = best(lambda: river_loop(nd), max(1, a.repeat - 1))
        t_replay = best(lambda: replay(nd, config, folder / "out"), a.repeat)
        t_exact = best(lambda: replay(nd, config, folder / "exact", exact_parse=True), max(1, a.repeat - 1))
        t_parquet = best(lambda: replay(parquet, config, folder / "pq"), a.repeat)
        replay(mixed, config, folder / "mixed-warm")
        t_mixed, t_clean = interleaved(lambda: replay(mixed, config, folder / "mixed"),
                                       lambda: replay(nd, config, folder / "clean"), a.repeat)
        mixed_run = json.loads((folder / "mixed" / "summary.json").read_text())["runs"][0]
        mixed_exact = replay(mixed, config, folder / "mixed-exact", exact_parse=True)
        run = replay(nd, config, folder / "final")
        exact = json.loads((folder / "exact" / "summary.json").read_text())["runs"][0]
        pq_run = json.loads((folder / "pq" / "summary.json").read_text())["runs"][0]
        from service.config import load_config
        from service.replay.runner import run_replay, write_outputs

        res = run_replay([nd], load_config(config))
        start = time.perf_counter()
        write_outputs(folder / "report", [nd], [res])
        t_report = time.perf_counter() - start
    n = a.events
    out = {
        "events": n, "bytes_per_event": round(bytes_per_event, 1),
        "parse_events_per_s": round(n / t_parse), "river_events_per_s": round(n / t_river),
        "replay_events_per_s": round(n / t_replay), "replay_exact_events_per_s": round(n / t_exact),
        "parquet_events_per_s": round(n / t_parquet),
        "replay_vs_parse": round(t_parse / t_replay, 3), "replay_vs_river": round(t_river / t_replay, 3),
        "replay_exact_vs_parse": round(t_parse / t_exact, 3), "report_seconds": round(t_report, 2),
        "replay_mixed_events_per_s": round(n / t_mixed), "replay_clean_in_turns_events_per_s": round(n / t_clean),
        "mixed_vs_clean": round(t_clean / t_mixed, 3),
        "mixed_digests_equal": mixed_run["state_digest"] == mixed_exact["state_digest"],
        "digests_equal": run["state_digest"] == exact["state_digest"] == pq_run["state_digest"],
        "monitor_checks": run["learned"] // 250,
    }
    for k, v in out.items():
        print(f"{k:28s} {v}", file=sys.stderr)
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
