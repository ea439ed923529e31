"""Running a sweep's configs on Dask: a local cluster by default, a running scheduler on request.

Each config is one Dask task, :func:`run_task`: the worker validates the config again, replays the
feeds through :func:`service.replay.runner.run_replay` (the engine every replay and the live service
use) and returns the run's results with its final engine state. Before the runs, one task per group
of runs that prepare events alike (:func:`parse_task`) parses the feeds with all the cores of its
machine, and a copy of the chunks goes to every worker: the runs then learn from memory, and the
scheduler spreads them by load rather than sending them all to the one worker holding the chunks. A run's result depends only on the
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


def _prep_key(feeds: list[str], config_data: dict) -> str:
    """Runs with equal keys get equal chunks: the feeds and the settings that prepare events."""
    parts = {section: config_data.get(section) for section in _PREPARING}
    parts["monitor"] = {k: (config_data.get("monitor") or {}).get(k) for k in ("enabled", "holdout_share")}
    return json.dumps([feeds, parts], sort_keys=True)


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


def parse_task(feeds: list[str], configs: list[dict], parse_threads: int) -> list:
    """The ``(feed index, chunk)`` pairs of ``feeds``, read once for every run of a sweep that prepares
    events the same way; a Dask worker executes it and the runs' workers receive a copy.

    ``configs`` are those runs' configs: the first one that validates prepares the events (all
    prepare them alike). Raises ``ValueError`` when none validates: each run then reports its own reason.
    """
    from service.config import config_from_dict
    from service.engine import Engine
    from service.feeds.files import read_feed

    for data in configs:
        try:
            config = config_from_dict(data, source=f"run {data.get('name')}")
            break
        except Exception:  # noqa: BLE001 - the run itself reports the reason
            continue
    else:
        raise ValueError("no config of these runs validates; each run reads the feeds itself")
    Engine(config, trace_limit=1)  # loads the drift detectors once, before the parsing threads need them
    threads = parse_threads or os.cpu_count() or 1
    remote = any(urllib.parse.urlsplit(f).scheme in _URL_SCHEMES for f in feeds)
    with tempfile.TemporaryDirectory(prefix="trimtab-sweep-feed-") if remote else nullcontext() as scratch:
        local = [_reachable(f, Path(scratch or "."), k) for k, f in enumerate(feeds)]
        if sum(_size(f) for f in local) > _cache_limit():
            raise ValueError("feeds too large to hold in each worker's memory; each run reads them itself")
        return [(k, chunk) for k, feed in enumerate(local) for chunk in read_feed(feed, config, workers=threads)]


def run_task(feeds: list[str], config_data: dict, parse_threads: int, chunks: list | None = None) -> dict:
    """One run of the grid, where a Dask worker (or any process) executes it.

    Parameters
    ----------
    feeds
        Paths or http(s) URLs, in order; each worker must be able to read them.
    config_data
        The derived config as plain data; validated again here, as any config is.
    parse_threads
        Threads parsing ahead of the engine (0: one per core of this machine).
    chunks
        The feeds' chunks from :func:`parse_task` (the sweep parsed them once); ``None``: this run
        reads the feeds itself.

    Returns
    -------
    dict
        :func:`~service.replay.runner.run_replay`'s results with ``state`` (the final engine state),
        ``worker`` (host and process that ran it, when it started, its seconds) and ``parsed``
        (``"read"``: by this run, or ``"shared"``: once for the sweep).
    """
    from service.config import config_from_dict
    from service.replay.runner import run_replay

    began, clock = time.time(), time.perf_counter()
    config = config_from_dict(config_data, source=f"run {config_data.get('name')}")
    if chunks is not None:
        result = run_replay(list(feeds), config, workers=parse_threads, keep_state=True, chunk_source=chunks)
        parsed = "shared"
    else:
        remote = any(urllib.parse.urlsplit(f).scheme in _URL_SCHEMES for f in feeds)
        # a folder only for downloaded feeds: a worker killed mid-run leaves it behind
        with tempfile.TemporaryDirectory(prefix="trimtab-sweep-feed-") if remote else nullcontext() as scratch:
            local = [_reachable(f, Path(scratch or "."), k) for k, f in enumerate(feeds)]
            result = run_replay(local, config, workers=parse_threads, keep_state=True)
        summary, names = result["summary"], dict(zip(local, feeds))
        summary["feed"] = feeds[0] if len(feeds) == 1 else list(feeds)
        for item in summary.get("bad_lines", []) + summary.get("duplicate_lines", []):
            item["feed"] = names.get(item["feed"], item["feed"])  # the URL, not this worker's copy of it
        parsed = "read"
    result["worker"] = {"host": socket.gethostname(), "pid": os.getpid(), "started": round(began, 3),
                        "seconds": round(time.perf_counter() - clock, 3)}
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


def _parse_once(client, feeds: list[str], grid: list, tag: str, local: bool, quiet: bool) -> dict:
    """Grid index -> a finished :func:`parse_task` future held by every worker, for the runs that get one.

    One parse per group of runs preparing events alike, on one worker with all its machine's cores
    (on the local cluster the other workers have nothing to do meanwhile); then a copy of the chunks
    goes to every worker, so the scheduler places runs by load and not by where the chunks are.
    A group whose parse fails (a feed unreadable, no config valid) is left out: its runs read the
    feeds themselves and report their own reasons.
    """
    from distributed import wait

    groups: dict[str, list[int]] = {}
    for k, run in enumerate(grid):
        groups.setdefault(_prep_key(list(feeds), run.data()), []).append(k)
    threads = (os.cpu_count() or 1) if local else 0
    futures = {key: client.submit(parse_task, list(feeds), [grid[k].data() for k in ks], threads, pure=False,
                                  key=f"trimtab-sweep-{tag}-parse-{n}")
               for n, (key, ks) in enumerate(groups.items())}
    wait(list(futures.values()))
    good = [f for f in futures.values() if f.status == "finished"]
    if good and len(client.scheduler_info().get("workers", {})) > 1:
        client.replicate(good)
    _say(f"feeds parsed once for {len(good)} group{'s' if len(good) != 1 else ''} of runs", quiet)
    return {k: fut for key, fut in futures.items() if fut.status == "finished" for k in groups[key]}


def execute(feeds: list[str], grid: list, *, address: str | None = None, workers: int = 1,
            quiet: bool = False, reuse: bool = True) -> tuple[list[Outcome], dict]:
    """Run every config of ``grid`` on Dask; outcomes in grid order and the executor's description.

    ``address`` is a running scheduler (``tcp://host:port``); ``None`` starts a local cluster of
    ``workers`` processes and stops it afterwards. ``reuse=False`` makes every run parse the feeds
    itself (no chunks parsed once and shared between runs).
    """
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    begin = time.perf_counter()
    client, cluster, threads, executor = _connect(address, workers, quiet)
    outcomes = [Outcome(run) for run in grid]
    tag = uuid.uuid4().hex[:8]
    start = time.perf_counter()
    executor.update(start_seconds=start - begin, reuse_parsed=reuse)
    shared: dict = {}

    def submit(k: int):
        outcomes[k].attempts += 1
        chunks = shared.get(k)
        if chunks is not None and chunks.status != "finished":
            chunks = None  # its every copy was lost with the workers: this run reads the feeds itself
        return client.submit(run_task, list(feeds), grid[k].data(), threads, chunks, pure=False,
                             key=f"trimtab-sweep-{tag}-{grid[k].name}-{outcomes[k].attempts}")

    try:
        if reuse:
            shared = _parse_once(client, feeds, grid, tag, cluster is not None, quiet)
            executor["parse_seconds"] = time.perf_counter() - start
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
        shared.clear()
        client.close()
        if cluster is not None:
            cluster.close()
    executor["seconds"] = time.perf_counter() - begin
    return outcomes, executor

