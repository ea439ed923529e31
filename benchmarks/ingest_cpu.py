"""CPU of the ``trimtab serve`` process per event ingested over HTTP, against another checkout.

Starts ``trimtab serve`` (demo config, ``service.scorers = 0``: one process) from this checkout and,
in turn, from a baseline checkout (``--baseline``, e.g. the main branch), and posts the same number
of 500-event NDJSON bodies with fresh ids to each. The server's CPU (user + system of all its
threads, from ``/proc/PID/stat``) over each round, divided by the events accepted, is its cost per
event; the load generator runs in this process, so its own CPU is not counted. Rounds alternate
between the two servers (so load from elsewhere on the machine hits both alike); the median of the
rounds is kept and ``cpu_vs_baseline`` is this checkout's median over the baseline's.

Each round also reads the CPU of the server's threads, grouped by name (``py-spy dump`` names them
after each round; without py-spy only ``loop``, the main thread, is told apart): ``loop``
(the event loop: HTTP, handlers, bookkeeping), ``parse`` (the body parsers' worker threads),
``journal`` (the commit), ``learner`` (apply, publication, checkpoints) and ``other``.

Usage: ``python benchmarks/ingest_cpu.py [--baseline /path/to/checkout] [--bodies 200] [--rounds 5]
[--conns 4]``. The last line is one JSON object.
"""

from __future__ import annotations

import argparse
import asyncio
import importlib.util
import json
import os
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from contextlib import suppress
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
_TICK = os.sysconf("SC_CLK_TCK")


def _service_bench(root: Path):
    """``benchmarks/service.py`` of a checkout, loaded by path (its name shadows the package)."""
    name = f"service_bench_{abs(hash(root))}"
    spec = importlib.util.spec_from_file_location(name, root / "benchmarks" / "service.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _cpu(pid: int, tid: int | None = None) -> float:
    """User + system CPU seconds of a process (all threads) or of one of its threads."""
    path = f"/proc/{pid}/stat" if tid is None else f"/proc/{pid}/task/{tid}/stat"
    fields = Path(path).read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / _TICK


def _thread_groups(pid: int) -> dict[int, str]:
    """Native thread id -> group (``loop``, ``parse``, ``journal``, ``learner``, ``other``) of a server."""
    groups = {pid: "loop"}
    if shutil.which("py-spy") is None:
        return groups
    dump = subprocess.run(["py-spy", "dump", "--pid", str(pid)], capture_output=True, text=True).stdout
    for tid, name in re.findall(r'^Thread (\d+) \(\w+\): "([^"]*)"', dump, re.M):
        m = re.match(r"trimtab-(parse|journal|learner)", name)
        groups[int(tid)] = m.group(1) if m else ("loop" if int(tid) == pid else "other")
    return groups


def _thread_cpu(pid: int) -> dict[int, float]:
    """CPU seconds so far of each thread of a process."""
    out = {}
    for tid in os.listdir(f"/proc/{pid}/task"):
        with suppress(OSError):
            out[int(tid)] = _cpu(pid, int(tid))
    return out


async def _post_all(url: str, data: list[bytes], conns: int, token: str) -> int:
    import aiohttp

    headers = {"Content-Type": "application/x-ndjson", "Authorization": f"Bearer {token}"}
    accepted, nxt = 0, 0
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=120)) as s:
        async def worker():
            nonlocal accepted, nxt
            while nxt < len(data):
                body = data[nxt]
                nxt += 1
                async with s.post(url + "/v1/events", data=body, headers=headers) as r:
                    got = await r.json()
                    if r.status != 200:
                        raise RuntimeError(f"{r.status}: {got}")
                    accepted += got["accepted"]
        await asyncio.gather(*(worker() for _ in range(conns)))
    return accepted


class Server:
    """One ``trimtab serve`` started from a checkout, with its own data dir."""

    def __init__(self, root: Path, tmp: str, name: str) -> None:
        self.root, self.name = root, name
        bench = _service_bench(root)
        self.token = bench.TOKEN
        env_path = os.environ.get("PYTHONPATH")
        os.environ["PYTHONPATH"] = str(root)  # the server imports this checkout's package
        try:
            self.proc, self.url = bench.start_service(f"{tmp}/{name}", scorers=0)
        finally:
            if env_path is None:
                os.environ.pop("PYTHONPATH", None)
            else:
                os.environ["PYTHONPATH"] = env_path
        self.rounds: list[dict] = []

    def round(self, data: list[bytes], conns: int) -> dict:
        pid = self.proc.pid
        before, threads_before = _cpu(pid), _thread_cpu(pid)
        t0 = time.perf_counter()
        accepted = asyncio.run(_post_all(self.url, data, conns, self.token))
        took = time.perf_counter() - t0
        total, threads = _cpu(pid) - before, _thread_cpu(pid)
        groups = _thread_groups(pid)  # after the round: worker threads start on demand
        out = {"cpu_us": 1e6 * total / accepted, "events_per_s": accepted / took}
        out.update({f"{g}_us": 0.0 for g in ("loop", "parse", "journal", "learner", "other")})
        for tid, cpu in threads.items():
            out[f"{groups.get(tid, 'other')}_us"] += 1e6 * (cpu - threads_before.get(tid, 0.0)) / accepted
        self.rounds.append(out)
        return out

    def summary(self) -> dict:
        return {k: round(statistics.median(r[k] for r in self.rounds), 2) for k in self.rounds[0]}

    def stop(self) -> None:
        self.proc.terminate()
        self.proc.wait(30)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", type=Path, default=None, help="another checkout to compare with")
    ap.add_argument("--bodies", type=int, default=200)
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--conns", type=int, default=4)
    a = ap.parse_args()
    bench = _service_bench(ROOT)
    n = a.bodies
    # fresh ids per round and server: warm-up round 0, then the measured ones
    data = bench.bodies(n * (a.rounds + 1), size=500, tag="c")
    with tempfile.TemporaryDirectory() as tmp:
        servers = [Server(ROOT, tmp, "this")]
        if a.baseline is not None:
            servers.append(Server(a.baseline.resolve(), tmp, "baseline"))
        try:
            for r in range(a.rounds + 1):
                for s in servers if r % 2 == 0 else servers[::-1]:
                    got = s.round(data[r * n:(r + 1) * n], a.conns)
                    if r == 0:
                        s.rounds.clear()  # warm-up: kernels loaded, caches filled, threads started
                    else:
                        print(s.name, r, {k: round(v, 2) for k, v in got.items()}, flush=True)
        finally:
            for s in servers:
                s.stop()
    out = {"loadavg_1min_after": os.getloadavg()[0], "bodies": n, "events_per_body": 500, "rounds": a.rounds}
    for s in servers:
        out[s.name] = s.summary()
    if len(servers) == 2:
        out["cpu_vs_baseline"] = round(out["this"]["cpu_us"] / out["baseline"]["cpu_us"], 3)
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
