"""Offline replay: recorded feeds through the service's own engine, one run per config.

``trimtab replay FEED... -c CONFIG [-c CONFIG ...] --out DIR`` reads the feeds in order (bounded
chunks, see :mod:`service.feeds.files`), drops duplicate ids as the live service does, applies every
chunk with :class:`~service.engine.Engine` (replay is only a different event source) and writes
``DIR/summary.json``, ``DIR/<name>/model.json`` (:mod:`service.model_file`), ``DIR/<name>/state.bin`` with
``state.json`` (the final state, which ``trimtab serve --start-from DIR/<name>`` starts from, see
:mod:`service.storage.promote`) and ``DIR/report.html`` (README "Replay outputs").

Each run is deterministic: the same feeds under the same config give the same ``state_digest``,
whether the run is alone or beside others. Several configs run in parallel processes (forkserver
start method, ``--jobs``); within a run a reader thread parses the next chunk while the engine
learns the current one (Arrow's parser and the compiled kernels release the GIL).

Duplicates: the live service applies an id once while its journal still holds it; replay remembers
every id of the run (:class:`service.idhash.IdSet`, 16-32 bytes per distinct id). The two agree
whenever a repeated id arrives within the journal's retention, which is what retries do.

``trimtab replay FEED... --to URL`` replays into a running service instead
(:mod:`service.feeds.into_service`).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import queue
import re
import sys
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from models import InvalidSettings

from service.config_cache import load_config_cached
from service.replay.progress import Progress, progress_mode
from service.replay.report import ReportFailed

if TYPE_CHECKING:
    from service.config import Config

__all__ = ["BAD_LINES_KEPT", "reason_key", "replay_main", "run_all", "run_replay", "write_outputs"]

#: Rejected lines (and duplicate lines) kept with their line numbers in each run's summary.
BAD_LINES_KEPT = 50
_TRACE_KEYS = ("event", "holdout_raw", "holdout_avg", "progressive_loss", "baseline_progressive", "baseline_holdout",
               "step", "step_scale", "distance")
_QUEUE_CHUNKS = 3  # chunks parsed ahead of the engine: bounds memory, keeps both threads busy
_PREFIX = re.compile(r"^(line|row) \d+\.?")


def reason_key(where: str, reason: str) -> str:
    """The category of a rejection: the field and the reason without values or line numbers.

    >>> reason_key("line 17.features.ambient_c", "not a finite number")
    'features.ambient_c: not a finite number'
    >>> reason_key("line 9", "line is 70123 bytes, over the 65536-byte limit")
    'line is N bytes, over the N-byte limit'
    """
    field = _PREFIX.sub("", where)
    text = re.sub(r"'[^']*'", "'...'", reason)
    text = re.sub(r"(?<![\w-])-?\d+(\.\d+)?(e[+-]?\d+)?", "N", text)
    return f"{field}: {text}" if field else text


class _Counts:
    """Shared (events, fraction, time of the first event) per run: a local list, or a slot of an
    array shared with the parent (see :class:`~service.replay.progress.Progress`)."""

    WIDTH = 3

    def __init__(self, store, slot: int) -> None:
        self.store, self.slot = store, slot

    def first_event(self) -> None:
        """Stamp now (:func:`time.monotonic`, shared by processes) as the run's first event."""
        if self.store[3 * self.slot + 2] == 0:
            self.store[3 * self.slot + 2] = time.monotonic()

    def set(self, events: int, fraction: float) -> None:
        self.store[3 * self.slot] = events
        self.store[3 * self.slot + 1] = fraction

    @staticmethod
    def reader(store, n: int):
        """The ``state`` callable of :class:`Progress` for ``n`` runs in ``store``."""
        return lambda: [tuple(store[3 * i:3 * i + 3]) for i in range(n)]


def _read(feeds, config, columnar: bool, workers: int):
    """``(feed index, chunk)`` pairs of the feeds, in order."""
    from service.feeds.files import read_feed

    for k, feed in enumerate(feeds):
        for chunk in read_feed(feed, config, columnar=columnar, workers=workers):
            yield k, chunk


def _reader(pairs, out: queue.Queue, stop: threading.Event) -> None:
    try:
        for k, chunk in pairs:
            while not stop.is_set():
                try:
                    out.put((k, chunk), timeout=0.2)
                    break
                except queue.Full:
                    continue
            if stop.is_set():
                return
        out.put(None)
    except BaseException as exc:  # handed to the engine thread, which re-raises it
        out.put(exc)


def run_replay(feeds, config: Config, *, columnar: bool = True, workers: int = 0, counts: _Counts | None = None,
               config_path: str | None = None, keep_state: bool = True, chunk_source=None) -> dict:
    """Replay ``feeds`` (paths, in order) under ``config``; return the run's results.

    ``workers`` threads parse ahead of the engine (0: one per core). ``chunk_source``, when given, is
    an iterable of the ``(feed index, chunk)`` pairs to apply instead of reading the feeds: chunks read earlier
    for a config that prepares events the same way (a sweep's worker reuses them across runs).

    Returns ``{"summary": RUN, "model": model.json content, "trace": {key: list}, "incidents": [...]}``,
    plus, with ``keep_state`` (the default), ``"state"`` (:meth:`Engine.to_bytes`, the final state in the
    checkpoint format) and ``"config"`` (for :func:`service.storage.promote.write_run_state`).
    """
    from service.feeds.columns import take_prepared
    from service.engine import Engine
    from service.model_file import model_file
    from service.idhash import IdSet

    engine = Engine(config, trace_limit=None, incidents_kept=None)
    bucket = engine.model.mapper.bucket
    feeds = [str(f) for f in feeds]
    seen = IdSet(capacity=_expected_events(feeds))
    trace = {k: [] for k in _TRACE_KEYS + ("serving", "action")}
    by_reason: dict[str, int] = {}
    bad, dups = [], []
    n_rejected = n_dups = 0
    chunks: queue.Queue = queue.Queue(maxsize=_QUEUE_CHUNKS)
    stop = threading.Event()
    start = time.perf_counter()
    workers = workers or os.cpu_count() or 1
    pairs = chunk_source if chunk_source is not None else _read(feeds, config, columnar, workers)
    thread = threading.Thread(target=_reader, args=(pairs, chunks, stop), daemon=True,
                              name="trimtab-replay-reader")
    thread.start()
    try:
        while True:
            item = chunks.get()
            if item is None:
                break
            if isinstance(item, BaseException):
                raise item
            k, chunk = item
            if counts is not None:
                counts.first_event()
            for line, rej in chunk.rejected:
                key = reason_key(rej.where, rej.reason)
                by_reason[key] = by_reason.get(key, 0) + 1
                if len(bad) < BAD_LINES_KEPT:
                    bad.append({"feed": feeds[k], "line": line, "where": rej.where, "reason": rej.reason})
            n_rejected += len(chunk.rejected)
            p = chunk.prepared
            ts = None
            if p is not None:
                for name, text in p.categories:
                    bucket(name, text)  # remembered for model.json; the mapping itself is fixed
                keep = seen.add(p.hashes, p.has_id)
                if not keep.all():
                    for line in p.where[~keep][:max(BAD_LINES_KEPT - len(dups), 0)]:
                        dups.append({"feed": feeds[k], "line": int(line)})
                    n_dups += int(np.count_nonzero(~keep))
                    p = take_prepared([p], np.flatnonzero(keep))
                if len(p.batch):
                    engine.apply(p.batch)
                    last = p.batch.ts[-1]
                    ts = None if math.isnan(last) else float(last)
                _drain(engine, trace)
            if chunk.rejected:
                engine.note_rejected(len(chunk.rejected), chunk.lines, ts)
            if counts is not None:
                counts.set(engine.events, (k + chunk.progress) / len(feeds))
    finally:
        stop.set()
        thread.join()
    seconds = time.perf_counter() - start
    summary = _summary(engine, config, feeds, config_path, seconds)
    summary.update(rejected=n_rejected, duplicates=n_dups, rejected_by_reason=dict(sorted(by_reason.items())),
                   bad_lines=bad, duplicate_lines=dups)
    model = model_file(engine, config)
    out = {"summary": summary, "model": model, "trace": trace, "incidents": _clean(engine.incidents),
           "loss": config.model.loss}
    if keep_state:
        out["state"] = engine.to_bytes()
        out["config"] = config
    return out


def _expected_events(feeds) -> int:
    """A guess of the events in plain NDJSON or CSV ``feeds`` (a line per ~128 bytes), to size the id
    set once instead of doubling it as it fills (each doubling re-inserts every id seen, about a
    twentieth of a 400,000-event replay); the default size for other feeds or files not found."""
    total = 0
    for feed in feeds:
        if feed.lower().endswith((".ndjson", ".jsonl", ".json", ".csv")):
            with contextlib.suppress(OSError):
                total += os.path.getsize(feed) // 128
    return min(max(total, 1 << 16), 1 << 24)


def _drain(engine, trace: dict) -> None:
    """Move the engine's new check records into compact columns (the deque would grow with the feed)."""
    while engine.trace:
        rec = engine.trace.popleft()
        for key in _TRACE_KEYS:
            v = rec.get(key)
            trace[key].append(float("nan") if v is None else float(v))
        trace["serving"].append(rec.get("serving"))
        trace["action"].append(rec.get("action"))


def _summary(engine, config: Config, feeds, config_path, seconds: float) -> dict:
    from service.replay.report import verdict

    incidents = engine.incidents
    run = {
        "name": config.name, "config": config_path, "feed": feeds[0] if len(feeds) == 1 else feeds,
        "events": engine.events, "learned": engine.learned, "held_out": engine.held_out,
        "scored_only": engine.scored, "refused": engine.refused, "rejected": 0, "duplicates": 0,
        "nonfinite_losses": engine.nonfinite_losses,
        "progressive_loss": engine.progressive_loss, "holdout_loss": engine.holdout_losses(),
        "binary_metrics": engine.binary_metrics(),
        "diverged": engine.divergence(),
        "baseline_loss": engine.baseline_loss, "warnings": engine.warnings, "serving": engine.serving,
        "alarms_ignored": engine.monitor.state.ignored if engine.monitor is not None else 0,
        "rollbacks": [{"event": i["event"], "reason": i["reason"], "step_scale": i["evidence"].get("step_scale")}
                      for i in incidents if i["kind"] == "rollback"],
        "restarts": [{"event": i["event"], "reason": i["reason"]} for i in incidents if i["kind"] == "restart"],
        "rejected_bursts": [{"event": i["event"], "reason": i["reason"]} for i in incidents
                            if i["kind"] == "rejected_burst"],
        "certificate": engine.certificate(), "state_digest": engine.state_digest,
        "updates": engine.model.n_updates, "seconds": seconds,
        "events_per_second": engine.events / seconds if seconds > 0 else None,
    }
    run["verdict"] = verdict(run)
    return _clean(run)


def _clean(obj):
    """Plain JSON data: NaN and infinities become null, numpy scalars become Python numbers."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        if all(type(v) is float and v - v == 0.0 for v in obj):  # finite floats (a model's coefficients): as they are
            return list(obj)
        return [_clean(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


# --------------------------------------------------------------------------- several runs
_SHARED = None


def _init_worker(shared) -> None:
    global _SHARED
    _SHARED = shared


def _worker(feeds, config: Config, slot: int, columnar: bool, workers: int, config_path: str) -> dict:
    return run_replay(feeds, config, columnar=columnar, workers=workers, counts=_Counts(_SHARED, slot),
                      config_path=config_path)


def _context():
    import multiprocessing as mp  # here: a run with one config never starts a process (15 ms of a start)

    method = "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"
    ctx = mp.get_context(method)
    if method == "forkserver":
        ctx.set_forkserver_preload(["service.replay.runner", "service.feeds.files", "service.engine"])
    return ctx


def run_all(feeds, configs: list[Config], paths: list[str], *, jobs: int, mode: str,
            columnar: bool = True) -> list[dict]:
    """Run every config over the feeds (in parallel processes when ``jobs > 1``); results in config order.

    On a first run (numba's cache cold) the compiled kernels are made ready first (:mod:`service.warmup`),
    while the progress display says so: one process compiles the learning kernel while another
    compiles the scorers and the reader's kernels (the run's worker processes when ``jobs > 1``, a
    short-lived helper otherwise). With the cache warm, each kernel loads on its first call.
    """
    from service.warmup import COMPILING, PARTS, is_cached, kernels_of, warm, warm_parallel

    names = [c.name for c in configs]
    kernels = kernels_of(configs)
    # one process compiles the learning kernel, the other everything else (about as long)
    groups = [["learn"], ["read", "feeds"]]
    cached = is_cached(PARTS, kernels)
    # with the kernels cached, each loads on its first call (a run that never rolls back never loads
    # the rollback's kernels) and nothing is exercised beforehand
    note = [None if cached else COMPILING]
    if jobs <= 1 or len(configs) == 1:
        store = [0.0] * (_Counts.WIDTH * len(configs))
        results = []
        with Progress(names, _Counts.reader(store, len(names)), mode, note=lambda: note[0]):
            if not cached:
                warm_parallel(groups, kernels)
            note[0] = None
            for i, (cfg, path) in enumerate(zip(configs, paths)):
                results.append(run_replay(feeds, cfg, columnar=columnar, counts=_Counts(store, i), config_path=path))
        return results
    from concurrent.futures import ProcessPoolExecutor

    ctx = _context()
    shared = ctx.Array("d", _Counts.WIDTH * len(configs), lock=False)
    workers = max(1, (os.cpu_count() or 1) // jobs)
    with Progress(names, _Counts.reader(shared, len(names)), mode, note=lambda: note[0]), \
            ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=_init_worker,
                                initargs=(shared,)) as pool:
        for done in [pool.submit(warm, group, kernels) for group in (groups if not cached else [])]:
            done.result()
        note[0] = None
        futures = [pool.submit(_worker, list(feeds), cfg, i, columnar, workers, path)
                   for i, (cfg, path) in enumerate(zip(configs, paths))]
        return [f.result() for f in futures]


def write_outputs(out: str | Path, feeds, results: list[dict], *, report: bool = True, notes=None,
                  caution: str | None = None) -> Path:
    """Write ``summary.json``, ``<name>/model.json``, ``<name>/state.bin`` and ``state.json`` (for results
    that carry their state) and (unless ``report=False``) ``report.html`` (with ``caution``, or the general
    caution of :data:`service.replay.report.CAUTION`). Returns the page's path (``summary.json``'s without
    a report).

    Raises :class:`service.replay.report.ReportFailed` if the page could not be drawn or written; every
    other output is written by then.
    """
    from service.storage.promote import write_run_state

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    feeds = [str(f) for f in feeds]
    summary = {"feed": feeds[0] if len(feeds) == 1 else feeds, "feeds": feeds,
               "runs": [r["summary"] for r in results]}
    for r in results:
        folder = out / r["summary"]["name"]
        folder.mkdir(exist_ok=True)
        (folder / "model.json").write_text(json.dumps(_clean(r["model"]), indent=2) + "\n", encoding="utf-8")
        if "state" in r and "config" in r:  # the final state, for trimtab serve --start-from DIR/NAME
            write_run_state(folder, r["state"], r["summary"], r["config"])
    (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n", encoding="utf-8")
    if not report:
        return out / "summary.json"
    from service.replay.report import CAUTION, write_report

    try:
        return write_report(out, summary, results, notes, caution or CAUTION)
    except OSError as exc:  # the page's file: the folder is not writable, the disk is full, ...
        raise ReportFailed(f"{exc.strerror or exc}: {exc.filename or out / 'report.html'}") from exc


def _configs(paths: list[str]) -> list[Config]:
    # validated by pydantic once per file; later runs of the same file read the cache (no pydantic)
    configs = [load_config_cached(p) for p in paths]
    seen: dict[str, str] = {}
    for path, cfg in zip(paths, configs):
        if cfg.name in seen:
            raise InvalidSettings(f"two configs share the name {cfg.name!r} ({seen[cfg.name]}); every run needs "
                                  "its own name (it is the run's folder)", where=f"{path}: name")
        seen[cfg.name] = path
    return configs


def replay_main(args) -> int:
    """``trimtab replay``: offline runs (``-c ... --out``) or a live replay (``--to URL``).

    A report that fails is said on stderr (exit status 1) after the runs' outputs are written and their
    lines printed.
    """
    from service.feeds.files import detect_format

    for feed in args.feeds:
        detect_format(feed)
    if args.to:
        from service.feeds.into_service import client_main

        return client_main(args)
    if not args.config:
        raise InvalidSettings("give -c CONFIG (one per run) for an offline replay, or --to URL", where="-c")
    if not args.out:
        raise InvalidSettings("an offline replay needs --out DIR for its summary and report", where="--out")
    configs = _configs(args.config)
    jobs = args.jobs if args.jobs is not None else min(len(configs), os.cpu_count() or 1)
    if jobs < 1:
        raise InvalidSettings("must be at least 1", where="--jobs")
    mode = progress_mode(args.no_progress)
    report = not getattr(args, "no_report", False)
    results = run_all(args.feeds, configs, list(args.config), jobs=jobs, mode=mode,
                      columnar=not getattr(args, "exact_parse", False))
    failed = None
    try:
        written = write_outputs(args.out, args.feeds, results, report=report)
    except ReportFailed as exc:  # the page only: the runs' outputs are written by now
        written, failed = Path(args.out) / "summary.json", exc
    for r in results:
        s = r["summary"]
        print(f"{s['name']}: {s['events']:,} events, {s['rejected']:,} rejected, "
              f"{s['events_per_second'] or 0:,.0f} events/s, digest {s['state_digest'][:16]}")
        print(f"  {s['verdict']}")
    print(f"wrote {written}")
    if failed is not None:
        print(f"trimtab: error: the report failed, no report.html was written (the runs finished and their "
              f"other outputs are written): {failed}", file=sys.stderr)
        return 1
    return 0
