"""Running a sweep's configs on Dask: a local cluster by default, a running scheduler on request.

Each config is one Dask task, :func:`run_task`: the worker validates the config again, replays the
feeds through :func:`service.replay.runner.run_replay` (the engine every replay and the live service
use) and returns the run's results with its final engine state. A run's result depends only on the
feeds and the config, never on the worker or the order, so a sweep gives the same ``state_digest``
per run on a local cluster, a remote one or one process.

Failures. A run that raises (a config a worker refuses, an unreadable feed) is reported with its
reason and not retried: it would fail the same way again. A run whose worker is lost (the process
killed, the machine gone) is submitted once more; a second loss is reported as the run's failure.
The rest of the grid completes either way. On the local cluster the scheduler is told to give up on
a task at its first lost worker (``allowed-failures = 0``), so that the one retry is this module's
and shows in the sweep's results; a remote scheduler keeps its own setting (Dask's default retries a
task up to 3 times before it counts as lost).

Network. The local cluster's scheduler, nannies and workers listen on 127.0.0.1 only, the
scheduler's HTTP endpoint on a free loopback port (no dashboard is served).
"""

from __future__ import annotations

import json
import os
import socket
import sys
import tempfile
import time
import urllib.parse
import urllib.request
import uuid
from contextlib import nullcontext
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["Outcome", "execute", "run_task"]

_URL_SCHEMES = ("http", "https")
#: Config sections (besides monitor.enabled and monitor.holdout_share) that change how events are prepared.
_PREPARING = ("features", "model", "service")
#: Feeds up to this size (decompressed, roughly) are kept in a worker's memory between runs; their
#: prepared chunks take about as much memory as the NDJSON text (80 MB for a 74 MB feed).
_CACHE_FILE_BYTES = 1 << 30
_CONNECT_TIMEOUT_S = 20
_WORKERS_TIMEOUT_S = 60


@dataclass
class Outcome:
    """What became of one run: its results, or the reason it failed; attempts and lost workers."""

    run: object
    result: dict | None = None
    error: str | None = None
    attempts: int = 0
    lost: list[str] = field(default_factory=list)


def _reachable(feed: str, scratch: Path, k: int) -> str:
    """A local path for ``feed``: the path itself, or a copy of an http(s) URL downloaded into ``scratch``.

    Each run downloads its own copy and deletes it afterwards: a cache shared between runs would
    have to know when the file behind the URL changed.
    """
    parts = urllib.parse.urlsplit(feed)
    if parts.scheme == "file":
        return urllib.request.url2pathname(parts.path)
    if parts.scheme not in _URL_SCHEMES:
        return feed
    target = scratch / (f"feed{k}" + "".join(Path(parts.path).suffixes[-2:]))
    with urllib.request.urlopen(feed, timeout=60) as answer, open(target, "wb") as f:
        while block := answer.read(1 << 20):
            f.write(block)
    return str(target)


class _ParsedFeed:
    """The chunks of the feeds, read once per worker process and reused by the sweep's later runs.

    Parsing is most of a run's time, and the chunks depend only on the feeds and on the settings
    that prepare events (:data:`_PREPARING`), not on the learning settings a sweep usually varies;
    the engine never writes into a chunk. One entry is kept, for one sweep (its ``tag``), and only
    for feeds small enough to hold in memory.
    """

    def __init__(self) -> None:
        self.key: str | None = None
        self.chunks: list | None = None

    @staticmethod
    def key_of(tag: str, feeds: list[str], config_data: dict) -> str:
        parts = {section: config_data.get(section) for section in _PREPARING}
        parts["monitor"] = {k: (config_data.get("monitor") or {}).get(k) for k in ("enabled", "holdout_share")}
        return json.dumps([tag, feeds, parts], sort_keys=True)

    def recording(self, key: str, local: list[str], config, threads: int):
        """The chunks read from ``local``, kept under ``key`` once the whole feed was read."""
        from service.feeds.files import read_feed

        self.key, self.chunks = None, None  # an earlier sweep's chunks are not needed any more
        kept = [] if sum(_size(f) for f in local) <= _cache_limit() else None
        for k, feed in enumerate(local):
            for chunk in read_feed(feed, config, workers=threads):
                if kept is not None:
                    kept.append((k, chunk))
                yield k, chunk
        if kept is not None:
            self.key, self.chunks = key, kept


def _cache_limit() -> int:
    """At most 1 GiB, and a quarter of this machine's memory per core (the other workers need theirs)."""
    try:
        memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return 0
    return min(_CACHE_FILE_BYTES, memory // (4 * (os.cpu_count() or 1)))


def _size(path: str) -> int:
    size = os.path.getsize(path)
    return size * 8 if path.endswith(".gz") else size  # what it takes once decompressed, roughly


_PARSED = _ParsedFeed()


def run_task(feeds: list[str], config_data: dict, parse_threads: int, tag: str = "") -> dict:
    """One run of the grid, where a Dask worker (or any process) executes it.

    Parameters
    ----------
    feeds
        Paths or http(s) URLs, in order; each worker must be able to read them.
    config_data
        The derived config as plain data; validated again here, as any config is.
    parse_threads
        Threads parsing ahead of the engine (0: one per core of this machine).
    tag
        The sweep's identity: runs of one sweep on one worker parse the feeds once.

    Returns
    -------
    dict
        :func:`~service.replay.runner.run_replay`'s results with ``state`` (the final engine state),
        ``worker`` (host and process that ran it) and ``parsed`` (``"read"`` or ``"reused"``).
    """
    from service.config import config_from_dict
    from service.replay.runner import run_replay

    config = config_from_dict(config_data, source=f"run {config_data.get('name')}")
    key = _PARSED.key_of(tag, list(feeds), config_data) if tag else None
    remote = any(urllib.parse.urlsplit(f).scheme in _URL_SCHEMES for f in feeds)
    # a folder only for downloaded feeds: a worker killed mid-run leaves it behind
    with tempfile.TemporaryDirectory(prefix="trimtab-sweep-feed-") if remote else nullcontext() as scratch:
        if key is not None and key == _PARSED.key:
            local, source, parsed = list(feeds), _PARSED.chunks, "reused"
        else:
            local = [_reachable(f, Path(scratch or "."), k) for k, f in enumerate(feeds)]
            source = _PARSED.recording(key, local, config, parse_threads or os.cpu_count() or 1) if key else None
            parsed = "read"
        result = run_replay(local, config, workers=parse_threads, keep_state=True, chunk_source=source)
    summary, names = result["summary"], dict(zip(local, feeds))
    summary["feed"] = feeds[0] if len(feeds) == 1 else list(feeds)
    for item in summary.get("bad_lines", []) + summary.get("duplicate_lines", []):
        item["feed"] = names.get(item["feed"], item["feed"])  # the URL, not this worker's copy of it
    result["worker"] = {"host": socket.gethostname(), "pid": os.getpid()}
    result["parsed"] = parsed
    return result


def _say(text: str, quiet: bool) -> None:
    if not quiet:
        print(f"trimtab sweep: {text}", file=sys.stderr, flush=True)


def _clock(seconds: float) -> str:
    s = int(max(seconds, 0.0) + 0.5)
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def _local_cluster(n_workers: int):
    import dask
    from distributed import LocalCluster

    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        return LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                            dashboard_address="127.0.0.1:0", worker_dashboard_address=None)


def _connect(address: str | None, workers: int, quiet: bool):
    """``(client, cluster, parse_threads, description)`` for a local cluster or a running scheduler."""
    from distributed import Client

    if address is None:
        cluster = _local_cluster(workers)
        client = Client(cluster, timeout=_CONNECT_TIMEOUT_S)
        threads = max(1, (os.cpu_count() or 1) // workers)
        _say(f"local Dask cluster of {workers} worker process{'es' if workers > 1 else ''} on 127.0.0.1", quiet)
        return client, cluster, threads, {"kind": "local", "workers": workers}
    client = Client(address, timeout=_CONNECT_TIMEOUT_S)
    client.wait_for_workers(1, timeout=_WORKERS_TIMEOUT_S)
    n = len(client.scheduler_info().get("workers", {}))
    _say(f"Dask scheduler {address} with {n} worker{'s' if n != 1 else ''}", quiet)
    return client, None, 0, {"kind": "cluster", "address": address, "workers": n}


def execute(feeds: list[str], grid: list, *, address: str | None = None, workers: int = 1,
            quiet: bool = False, reuse: bool = True) -> tuple[list[Outcome], dict]:
    """Run every config of ``grid`` on Dask; outcomes in grid order and the executor's description.

    ``address`` is a running scheduler (``tcp://host:port``); ``None`` starts a local cluster of
    ``workers`` processes and stops it afterwards. ``reuse=False`` makes every run parse the feeds
    itself (no chunks kept in a worker's memory between runs).
    """
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    begin = time.perf_counter()
    client, cluster, threads, executor = _connect(address, workers, quiet)
    outcomes = [Outcome(run) for run in grid]
    tag = uuid.uuid4().hex[:8]
    start = time.perf_counter()
    executor.update(start_seconds=start - begin, reuse_parsed=reuse)

    def submit(k: int):
        outcomes[k].attempts += 1
        return client.submit(run_task, list(feeds), grid[k].data(), threads, tag if reuse else "", pure=False,
                             key=f"trimtab-sweep-{tag}-{grid[k].name}-{outcomes[k].attempts}")

    try:
        index = {submit(k): k for k in range(len(grid))}  # the futures are held here until they finish
        done, pending = 0, as_completed(list(index))
        for fut in pending:
            k = index.pop(fut)
            out = outcomes[k]
            exc = fut.exception() if fut.status == "error" else None
            if isinstance(exc, KilledWorker) or fut.status == "cancelled":
                reason = f"worker lost while running (attempt {out.attempts}): {exc or 'cancelled'}"
                out.lost.append(reason)
                if out.attempts < 2:
                    _say(f"{grid[k].name}: {reason}; retrying once", quiet)
                    retry = submit(k)
                    index[retry] = k
                    pending.add(retry)
                    continue
                out.error = reason
            elif exc is not None:
                out.error = f"{type(exc).__name__}: {exc}"
            else:
                out.result = fut.result()
            done += 1
            elapsed = time.perf_counter() - start
            eta = elapsed / done * (len(grid) - done)
            state = f"failed: {out.error}" if out.error else "done"
            _say(f"{done}/{len(grid)} runs finished, {grid[k].name} {state}; elapsed {_clock(elapsed)}, "
                 f"ETA {_clock(eta)}", quiet)
            fut.release()
        executor["runs_seconds"] = time.perf_counter() - start
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    executor["seconds"] = time.perf_counter() - begin
    return outcomes, executor

