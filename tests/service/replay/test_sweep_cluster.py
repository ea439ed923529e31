"""Sweeps across real processes: a worker killed mid-sweep, and a scheduler with two separate workers.

References outside the sweep: ``trimtab replay`` run one config at a time (the digests every
sweep must reproduce), Dask's own ``dask scheduler`` / ``dask worker`` command-line programs as
separate OS processes on 127.0.0.1, Python's ``http.server`` serving the feed on 127.0.0.1, the
kernel's SIGKILL, and psutil's view of the processes' listening sockets.
"""

from __future__ import annotations

import json
import queue
import signal
import socket
import subprocess
import threading
import time
from functools import partial
from http.server import SimpleHTTPRequestHandler, ThreadingHTTPServer

import psutil
import pytest

from service.cli import main
from tests.service.replay import sweepkit
from tests.service.replay.sweepkit import BASE, PYTHON, VARY

pytestmark = pytest.mark.timeout(600)


def _lines(stream, out: queue.Queue) -> None:
    for line in stream:
        out.put(line)
    out.put(None)


def _wait_for(lines: queue.Queue, text: str, seen: list, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            line = lines.get(timeout=1)
        except queue.Empty:
            continue
        if line is None:
            raise AssertionError("the sweep ended early:\n" + "".join(seen))
        seen.append(line)
        if text in line:
            return
    raise AssertionError(f"no {text!r} within {timeout} s:\n" + "".join(seen))


def _listening(procs) -> list:
    addrs = []
    for p in procs:
        try:
            addrs += [c.laddr.ip for c in p.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
        except psutil.NoSuchProcess:
            continue
    return addrs


def _busiest(workers: list) -> psutil.Process:
    for w in workers:
        w.cpu_percent(None)
    time.sleep(0.1)
    return max(workers, key=lambda w: w.cpu_percent(None))


@pytest.mark.parametrize("parse", ["each-run", "shared"])
def test_worker_killed_mid_sweep_loses_no_run(tmp_path, parse):
    """SIGKILL a busy worker process while runs are in flight: its run is retried and every digest
    still equals the one-by-one replay's; every server of the local cluster listens on 127.0.0.1.
    ``each-run``: every run parses the feed itself (``--parse-each-run``); ``shared``: the runs share
    one parse copied to both workers, and the retried run uses the copy the other worker still holds
    (or, with every copy gone, reads the feed itself)."""
    # a shared parse leaves only the learning to each run: a feed long enough that every run learns for
    # about a second keeps both workers busy when the kill lands (a worker killed between runs loses none)
    feed = sweepkit.make_feed(tmp_path, 20_000 if parse == "each-run" else 240_000)
    reference = sweepkit.replay_digests(feed, tmp_path)
    out = tmp_path / "sweep"
    extra = ["--parse-each-run"] if parse == "each-run" else []
    proc = sweepkit.start([PYTHON, "-m", "service.cli", "sweep", str(feed), "-c", str(BASE), *VARY,
                           "--out", str(out), "--workers", "2", *extra], stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, text=True)
    lines: queue.Queue = queue.Queue()
    seen: list[str] = []
    threading.Thread(target=_lines, args=(proc.stderr, lines), daemon=True).start()
    try:
        _wait_for(lines, "1/6 runs finished", seen, timeout=300)
        tree = psutil.Process(proc.pid).children(recursive=True)
        workers = [p for p in tree if "spawn_main" in " ".join(p.cmdline())]
        assert len(workers) == 2, [p.cmdline() for p in tree]
        assert set(_listening([psutil.Process(proc.pid), *tree])) == {"127.0.0.1"}
        victim = _busiest(workers)
        victim.send_signal(signal.SIGKILL)
        proc.wait(timeout=400)
    finally:
        sweepkit.stop(proc)
    while (line := lines.get(timeout=5)) is not None:
        seen.append(line)
    proc.stderr.close()
    assert proc.returncode == 0, "".join(seen)
    assert sweepkit.sweep_digests(out) == reference
    sweep = json.loads((out / "sweep.json").read_text())
    retried = [row for row in sweep["ranking"] if row["attempts"] == 2]
    assert retried and all("worker lost" in row["lost_workers"][0] for row in retried), "".join(seen)
    assert "retrying once" in "".join(seen) and "6/6 runs finished" in "".join(seen)
    assert sweep["completed"] == 6 and sweep["failed"] == []
    parsed = {row["parsed"] for row in sweep["ranking"]}
    assert parsed == {"read"} if parse == "each-run" else "shared" in parsed and parsed <= {"shared", "read"}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_sweep_through_a_scheduler_and_two_separate_worker_processes(tmp_path, capsys):
    """``--cluster`` sends the runs to a ``dask scheduler`` process with two ``dask worker``
    processes, all on 127.0.0.1; the feed is fetched from a URL; the digests equal the replays'."""
    feed = sweepkit.make_feed(tmp_path, 10_000)
    reference = sweepkit.replay_digests(feed, tmp_path)
    handler = partial(SimpleHTTPRequestHandler, directory=str(tmp_path))
    handler.log_message = lambda *a: None
    http = ThreadingHTTPServer(("127.0.0.1", 0), handler)
    threading.Thread(target=http.serve_forever, daemon=True).start()
    url = f"http://127.0.0.1:{http.server_address[1]}/{feed.name}"
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    procs = [sweepkit.start([PYTHON, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port",
                             str(port), "--dashboard-address", "127.0.0.1:0"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        for k in range(2):
            procs.append(sweepkit.start([PYTHON, "-m", "distributed.cli.dask_worker", address, "--host", "127.0.0.1",
                                         "--nthreads", "1", "--no-nanny", "--dashboard-address", "127.0.0.1:0",
                                         "--name", f"w{k}"],
                                        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        from distributed import Client

        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=120)
        out = tmp_path / "sweep"
        code = main(["sweep", url, "-c", str(BASE), *VARY, "--out", str(out), "--cluster", address, "--no-report"])
        err = capsys.readouterr().err
        assert code == 0, err
        assert set(_listening([psutil.Process(p.pid) for p in procs])) == {"127.0.0.1"}
    finally:
        for p in procs[::-1]:
            sweepkit.stop(p)
        http.shutdown()
        http.server_close()
    assert sweepkit.sweep_digests(out) == reference
    sweep = json.loads((out / "sweep.json").read_text())
    assert sweep["executor"]["kind"] == "cluster" and sweep["executor"]["workers"] == 2
    ran_on = {row["worker"]["pid"] for row in sweep["ranking"]}
    assert ran_on <= {p.pid for p in procs[1:]} and len(ran_on) == 2
    assert sweep["feeds"] == [url] and f"Dask scheduler {address} with 2 workers" in err
    runs = json.loads((out / "summary.json").read_text())["runs"]
    assert all(r["bad_lines"] for r in runs)  # the scenario's malformed lines, named by the URL
    assert {b["feed"] for r in runs for b in r["bad_lines"]} == {url}
