"""CPU per event of each stage the learner process runs for ``POST /v1/events``, in this process.

The stages, on the demo feed in 500-event NDJSON bodies with fresh ids, each timed with
``time.thread_time`` (CPU of this thread, so other work on the machine inflates it less than wall
time) and the best of three repeats kept:

* ``parse``: the handler's NDJSON step (orjson, every event rule, the journal payloads);
* ``commit``: id keys, the whole-history dedup lookup, numbering and the journal transaction
  (SQLite WAL, ``synchronous=FULL``, in a temporary folder), as the committer runs them;
* ``prepare``: ``Engine.prepare`` (feature mapping, holdout hash); ``apply``: ``Engine.apply``.

The same bodies the way the service takes NDJSON now (columns, one journal row per body):

* ``body_parse``: :meth:`service.feeds.ndjson_body.BodyParser.parse` (the compiled line scan,
  Arrow's JSON reader, every event rule per column, the mapping to rows, the id keys);
* ``body_commit``: the dedup lookup, numbering, one row of the body's lines and its id keys;
* ``body_apply``: ``Engine.apply`` of the prepared batch.

Baseline from the same run: ``orjson_loop``, a loop that only parses the same lines with orjson.
Prints ``stage_vs_orjson`` ratios; the last line is one JSON object. HTTP, the event loop, thread
hand-offs and publication are not included (``benchmarks/service.py`` measures the whole process).

Usage: ``python benchmarks/ingest_stages.py [--bodies 200]``.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import orjson

ROOT = Path(__file__).resolve().parents[1]
if sys.path[0] != str(ROOT):
    sys.path.insert(0, str(ROOT))


def _service_bench():
    """``benchmarks/service.py`` (its body builder), loaded by path: its name shadows the package."""
    spec = importlib.util.spec_from_file_location("service_bench", ROOT / "benchmarks" / "service.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _commit_all(journal_cls, cpu, items) -> float:
    """CPU seconds (``cpu``) to number and journal ``items`` into a fresh journal (``sync = "full"``):
    ``(keys, row_at, count)`` each, ``row_at(seq)`` the journal row of an item whose first position is
    ``seq``. ``items`` may be a generator: the work it does per item is timed too."""
    from service.storage.seen import number_events

    folder = tempfile.mkdtemp()
    journal = journal_cls(folder, sync="full")
    t = cpu()
    seq = 1
    for keys, row_at, count in items:
        _, pairs = number_events(keys, journal.known(keys), seq)
        journal.append([row_at(seq)], pairs)
        seq += count
    took = cpu() - t
    journal.close()
    shutil.rmtree(folder)
    return took


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bodies", type=int, default=200)
    a = ap.parse_args()
    from service.config import load_config
    from service.engine import Engine
    from service.events import EventValidator
    from service.http.handlers import _parse_ndjson
    from service.feeds.ndjson_body import BodyParser
    from service.storage.journal import LINES, Journal
    from service.storage.seen import id_key

    bench = _service_bench()
    cfg = load_config(bench.CONFIG)
    validator = EventValidator(cfg)
    data = bench.bodies(a.bodies, size=500, tag="s")
    n = 500 * a.bodies
    cpu = time.thread_time
    spent: dict[str, list[float]] = {k: [] for k in ("orjson_loop", "parse", "commit", "prepare", "apply",
                                                     "body_parse", "body_commit", "body_apply")}
    parser = BodyParser(cfg)
    parser.parse(data[0])  # the reader of this thread, built once
    for _ in range(3):
        t = cpu()
        for body in data:
            for line in body.split(b"\n"):
                orjson.loads(line)
        spent["orjson_loop"].append(cpu() - t)
        t = cpu()
        parsed = [_parse_ndjson(body, validator) for body in data]
        spent["parse"].append(cpu() - t)
        spent["commit"].append(_commit_all(Journal, cpu, (
            ([id_key(e.id) for e in events], lambda seq, ev=events, pl=payloads: (seq, [e.id for e in ev], pl),
             len(events)) for events, payloads, _, _ in parsed)))
        engine = Engine(cfg)
        t = cpu()
        batches = [engine.prepare(events) for events, *_ in parsed]
        spent["prepare"].append(cpu() - t)
        t = cpu()
        for batch in batches:
            engine.apply(batch)
        spent["apply"].append(cpu() - t)

        t = cpu()
        bodies = [parser.parse(body) for body in data]
        spent["body_parse"].append(cpu() - t)
        spent["body_commit"].append(_commit_all(Journal, cpu, (
            (body.keys, lambda seq, b=body: (seq + len(b) - 1, None, LINES, b.lines()), len(body))
            for body in bodies)))
        engine = Engine(cfg)
        t = cpu()
        for body in bodies:
            engine.apply(body.prepared.batch)
        spent["body_apply"].append(cpu() - t)
    us = {k: round(1e6 * min(v) / n, 2) for k, v in spent.items()}
    stages = ("parse", "commit", "prepare", "apply")
    body_stages = ("body_parse", "body_commit", "body_apply")
    res = {"us_cpu_per_event": us, "stages_us": round(sum(us[k] for k in stages), 2),
           "body_stages_us": round(sum(us[k] for k in body_stages), 2),
           "stage_vs_orjson": {k: round(us[k] / us["orjson_loop"], 2) for k in stages + body_stages}, "events": n}
    print(f"CPU us per event: {us}", file=sys.stderr)
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
