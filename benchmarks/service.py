"""Speed of the live service, measured from separate load-generating processes on loopback.

Prints ratios against baselines measured in the same run; the last line is one JSON object:

* ``score_vs_bare``: single-event ``POST /v1/score`` requests/s divided by the requests/s of a bare
  aiohttp endpoint that parses the same JSON body and returns a constant (the ceiling of this
  machine with the same load generator). Goal >= 0.8.
* ``score_p99_ms_at_1000rps``: p99 latency of scoring at a fixed 1,000 requests/s while another
  process posts NDJSON bodies to ``/v1/events`` as fast as they are acknowledged. Goal <= 5 ms.
* ``ingest_events_per_s``: NDJSON events/s through ``/v1/events`` in 5,000-event bodies, journaled
  (SQLite WAL, ``synchronous=FULL``) and applied before each answer. Goal >= 60,000.
* ``ingest_vs_parse``: that rate divided by a loop that only parses the same bodies line by line
  with orjson, in this process (also printed: ``ingest_vs_parse_validate``, against a loop that
  runs the boundary's ``parse_ndjson``, i.e. parsing plus every event rule).

* ``scorers``: ``service.scorers = 0`` (one process) against the default (a learner and scorer
  processes) in the same run: ``score_p99_ms_idle``, ``score_p99_ms_under_ingest`` (1,000 scores/s,
  latency from the scheduled send time, while a producer posts 500-event bodies as fast as
  acknowledged; goal <= 5 ms), ``ingest_events_per_s`` meanwhile (goal >= 60,000), the load
  generators' CPU, GC pauses and send lateness (the score client is lean: plain asyncio protocol
  connections kept alive, the request bytes built once; ``--load rate-aiohttp`` is the earlier
  client on aiohttp's, for comparison), the server processes' CPU seconds,
  ``publish_to_serve_ms`` (goal <= 20 ms) and peak RSS per process.

Usage: ``python benchmarks/service.py [--seconds 5] [--part all|classic|scorers] [--repeat N]
[--policies idle,normal] [--producers 4]``: ``--seconds`` is the length of each score phase (a 5 s phase has
5,000 scores, so its p99 is the 50th worst: 15 s is steadier); ``--repeat`` runs the phase under
ingest N times per mode and reports the median p99 with its spread, and the scorer processes' CPU
per score; ``--policies`` measures other ``service.learner_policy`` values beside the default.
The goals are the issue's; the machine has two cores shared by the server, the load generators and
anything else running.
"""

from __future__ import annotations

import argparse
import asyncio
import collections
import contextlib
import gzip
import json
import os
import platform
import re
import socket
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import orjson

ROOT = Path(__file__).resolve().parents[1]
FEED = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
CONFIG = ROOT / "replay_data" / "configs" / "guarded.toml"
TOKEN = "benchmark-token-5d2c"  # writes need a token (service.auth = "token", the default)
_MOST_CONNS = 64  # connections the lean score client opens at most (the rest wait, and count as late)
_CONTENT_LENGTH = re.compile(rb"(?i)\r\ncontent-length:\s*(\d+)")
SCORE_BODY = orjson.dumps({"features": {"ambient_c": 6.5, "compressor_duty": 0.4, "door_open_s": 30,
                                        "load_kg": 420, "van": "V07", "route": "urban"}})


def _valid_lines() -> list[bytes]:
    out = []
    for line in gzip.open(FEED).read().split(b"\n"):
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue
        if isinstance(obj, dict) and isinstance(obj.get("features"), dict) and isinstance(obj.get("target"), float):
            out.append(line)
    return out


def bodies(n_bodies: int, size: int = 5000, tag: str = "b") -> list[bytes]:
    """NDJSON bodies of demo events with fresh ids (so none is a duplicate)."""
    lines = _valid_lines()
    out = []
    for b in range(n_bodies):
        chunk = []
        for k in range(size):
            obj = orjson.loads(lines[(b * size + k) % len(lines)])
            obj["id"] = f"{tag}{b}-{k}"
            chunk.append(orjson.dumps(obj))
        out.append(b"\n".join(chunk))
    return out


# ------------------------------------------------------------------ processes under test
def _bare_server(port_file: str) -> None:
    from aiohttp import web

    async def handle(request):
        orjson.loads(await request.read())
        return web.Response(body=b'{"scores":[0.0]}', content_type="application/json")

    async def main():
        app = web.Application()
        app.router.add_post("/v1/score", handle)
        runner = web.AppRunner(app, access_log=None)
        await runner.setup()
        site = web.TCPSite(runner, "127.0.0.1", 0, backlog=1024)
        await site.start()
        Path(port_file).write_text(str(runner.addresses[0][1]))
        await asyncio.Event().wait()

    asyncio.run(main())


def start_bare() -> tuple[subprocess.Popen, str]:
    port_file = tempfile.mktemp()
    proc = subprocess.Popen([sys.executable, __file__, "--bare-server", port_file])
    for _ in range(200):
        if os.path.exists(port_file) and Path(port_file).read_text():
            return proc, f"http://127.0.0.1:{Path(port_file).read_text()}"
        time.sleep(0.05)
    raise RuntimeError("bare server did not start")


def start_service(data_dir: str, scorers: int | str | None = None,
                  policy: str | None = None) -> tuple[subprocess.Popen, str]:
    """``trimtab serve`` on the demo config (``scorers``, ``policy``: override ``service.scorers``
    and ``service.learner_policy``)."""
    env = dict(os.environ, TRIMTAB_TOKEN=TOKEN)  # the config reads its token from $TRIMTAB_TOKEN
    config = CONFIG
    if scorers is not None or policy is not None:
        config = Path(data_dir + ".toml")
        lines = "".join(f"{key} = {json.dumps(value)}\n" for key, value in (("scorers", scorers),
                                                                            ("learner_policy", policy))
                        if value is not None)
        config.write_text(CONFIG.read_text().replace("[service]\n", f"[service]\n{lines}"))
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "-c", str(config), "--port", "0",
                             "--data-dir", data_dir], stderr=subprocess.PIPE, env=env, cwd=ROOT)
    url = None
    for raw in proc.stderr:
        m = re.search(rb"listening on (http://\S+)", raw)
        if m:
            url = m.group(1).decode()
            break
    if url is None:
        raise RuntimeError("service did not start")
    threading.Thread(target=lambda: [None for _ in proc.stderr], daemon=True).start()

    for _ in range(600):
        try:
            with urllib.request.urlopen(url + "/readyz") as r:
                if r.status == 200:
                    return proc, url
        except OSError:
            time.sleep(0.05)
    raise RuntimeError("service did not become ready")


# ------------------------------------------------------------------ load generators (run in subprocesses)
async def _closed(url: str, seconds: float, conns: int) -> dict:
    import aiohttp

    done = 0
    stop = time.perf_counter() + seconds
    headers = {"Content-Type": "application/json"}
    async with aiohttp.ClientSession(connector=aiohttp.TCPConnector(limit=conns)) as s:
        async def worker():
            nonlocal done
            while time.perf_counter() < stop:
                async with s.post(url + "/v1/score", data=SCORE_BODY, headers=headers) as r:
                    await r.read()
                    if r.status == 200:
                        done += 1
        t0 = time.perf_counter()
        await asyncio.gather(*(worker() for _ in range(conns)))
        took = time.perf_counter() - t0
    return {"rps": done / took}


class _OwnCost:
    """The load generator's own CPU time and garbage-collection pauses, so they are not taken for
    server latency (a collection in the client delays every request it has in flight)."""

    def __init__(self) -> None:
        import gc
        import resource

        self._gc, self._res = gc, resource
        self.pauses: list[float] = []
        self._t = 0.0

    def _hook(self, phase: str, info: dict) -> None:
        if phase == "start":
            self._t = time.perf_counter()
        else:
            self.pauses.append(time.perf_counter() - self._t)

    def __enter__(self) -> _OwnCost:
        self._gc.callbacks.append(self._hook)
        r = self._res.getrusage(self._res.RUSAGE_SELF)
        self._cpu0, self._wall0 = r.ru_utime + r.ru_stime, time.perf_counter()
        return self

    def __exit__(self, *exc) -> None:
        self._gc.callbacks.remove(self._hook)
        r = self._res.getrusage(self._res.RUSAGE_SELF)
        self.cpu = r.ru_utime + r.ru_stime - self._cpu0
        self.wall = time.perf_counter() - self._wall0

    def report(self) -> dict:
        return {"client_cpu_s": round(self.cpu, 3), "client_cpu_share": round(self.cpu / self.wall, 3),
                "client_gc_pauses": len(self.pauses),
                "client_gc_max_ms": round(1e3 * max(self.pauses), 3) if self.pauses else 0.0}


async def _rate_aiohttp(url: str, seconds: float, rps: float) -> dict:
    """The earlier score client, on aiohttp's client (``--load rate-aiohttp``): kept to show what
    the load generator's own cost was; the figures use :func:`_rate`."""
    import aiohttp

    import gc

    lat: list[float] = []
    late: list[float] = []  # how late this client itself sent each request (its own lag, not the server's)
    errors = 0
    most = 0
    headers = {"Content-Type": "application/json"}
    async with aiohttp.ClientSession(connector=aiohttp.TCPConnector(limit=200)) as s:
        async def one(due: float):
            nonlocal errors
            late.append(time.perf_counter() - due)
            async with s.post(url + "/v1/score", data=SCORE_BODY, headers=headers) as r:
                await r.read()
                if r.status != 200:
                    errors += 1
            lat.append(time.perf_counter() - due)
        for _ in range(50):  # warm the connection pool
            await one(time.perf_counter())
        lat.clear()
        late.clear()
        tasks = set()
        n = int(seconds * rps)
        gc.disable()  # no collection pauses this client during the measured seconds (it collects after)
        with _OwnCost() as own:
            t0 = time.perf_counter()
            for k in range(n):
                due = t0 + k / rps
                delay = due - time.perf_counter()
                if delay > 0:
                    await asyncio.sleep(delay)
                task = asyncio.ensure_future(one(due))
                tasks.add(task)
                task.add_done_callback(tasks.discard)
                most = max(most, len(tasks))
            await asyncio.gather(*tasks)
        gc.enable()
    lat.sort()
    late.sort()
    return {"n": len(lat), "errors": errors, "p50_ms": 1e3 * lat[len(lat) // 2],
            "p99_ms": 1e3 * lat[int(0.99 * len(lat))], "max_ms": 1e3 * lat[-1], "most_in_flight": most,
            "client_send_late_p99_ms": round(1e3 * late[int(0.99 * len(late))], 3), **own.report()}


class _ScoreConn(asyncio.Protocol):
    """One keep-alive HTTP/1.1 connection of the lean score client: sends pre-built request bytes,
    reads answers by ``Content-Length`` (one request in flight per connection)."""

    def __init__(self, client: _LeanScorer) -> None:
        self.client = client
        self.transport = None
        self.buf = b""
        self.due: float | None = None  # scheduled send time of the request in flight (None: none)
        self.need = -1  # bytes of the whole answer once its head is in; -1: head not complete yet

    def connection_made(self, transport) -> None:
        self.transport = transport

    def send(self, due: float) -> None:
        self.due = due
        self.transport.write(self.client.request)

    def data_received(self, data: bytes) -> None:
        if self.due is None:  # nothing asked: the server closing a connection left unused (its 408)
            self.transport.close()
            return
        buf = self.buf = self.buf + data
        if self.need < 0:
            end = buf.find(b"\r\n\r\n")
            if end < 0:
                return
            m = _CONTENT_LENGTH.search(buf, 0, end)
            self.need = end + 4 + (int(m.group(1)) if m else 0)
            self.ok = buf[9:12] == b"200"
        if len(buf) >= self.need:
            self.buf, self.need = buf[self.need:], -1
            due, self.due = self.due, None
            self.client.answered(self, due, self.ok)

    def connection_lost(self, exc) -> None:
        self.client.lost(self)


class _LeanScorer:
    """Open-loop single-event scores on plain asyncio protocol connections (no HTTP library: the
    request is built once, answers are read by ``Content-Length``), so the client's own cost and
    pauses stay small next to the latency it measures."""

    def __init__(self, url: str) -> None:
        self.host, port = url.removeprefix("http://").split(":")
        self.port = int(port)
        self.request = (f"POST /v1/score HTTP/1.1\r\nHost: {self.host}:{self.port}\r\n"
                        f"Content-Type: application/json\r\nContent-Length: {len(SCORE_BODY)}\r\n\r\n").encode() \
            + SCORE_BODY
        self.free: list[_ScoreConn] = []
        self.opened = 0
        self.waiting: collections.deque[float] = collections.deque()  # due times of requests with no connection yet
        self.lat: list[float] = []
        self.late: list[float] = []
        self.errors = 0
        self.in_flight = 0
        self.most = 0

    async def _open(self) -> _ScoreConn:
        loop = asyncio.get_running_loop()
        _, conn = await loop.create_connection(lambda: _ScoreConn(self), self.host, self.port)
        conn.transport.get_extra_info("socket").setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return conn

    async def warm(self, conns: int) -> None:
        self.opened += conns
        self.free = [await self._open() for _ in range(conns)]

    def fire(self, due: float) -> None:
        if self.free:
            conn = self.free.pop()
            self.late.append(time.perf_counter() - due)
            conn.send(due)
            self.in_flight += 1
            self.most = max(self.most, self.in_flight)
        elif self.opened < _MOST_CONNS:  # every connection busy: open one more (its setup counts as lateness)
            self.opened += 1
            asyncio.ensure_future(self._fire_new(due))
        else:  # as many connections as a client should hold: the request waits its turn (lateness again)
            self.waiting.append(due)

    async def _fire_new(self, due: float) -> None:
        self.free.append(await self._open())
        self.fire(due)

    def answered(self, conn: _ScoreConn, due: float, ok: bool) -> None:
        self.lat.append(time.perf_counter() - due)
        self.in_flight -= 1
        if not ok:
            self.errors += 1
        self.free.append(conn)
        if self.waiting:
            self.fire(self.waiting.popleft())

    def lost(self, conn: _ScoreConn) -> None:
        if conn in self.free:
            self.free.remove(conn)
        else:  # cut with a request in flight: never answered, counted as failed below
            self.in_flight -= 1
        self.opened -= 1


async def _rate(url: str, seconds: float, rps: float) -> dict:
    """Single-event scores sent open loop at ``rps``; latency counted from each request's scheduled
    send time, so a stall (of the server or of this client) cannot hide behind a late send. The
    client is lean (:class:`_LeanScorer`); its CPU share and its own send lateness are reported."""
    import gc

    # the score client stands in for clients on other machines: when permitted it runs ahead of the
    # server processes and anything else on this machine (nice -5), so its own sends keep their schedule
    nice = 0
    with contextlib.suppress(OSError):
        os.setpriority(os.PRIO_PROCESS, 0, -5)
        nice = -5
    c = _LeanScorer(url)
    await c.warm(16)
    for _ in range(50):  # warm the server's paths
        c.fire(time.perf_counter())
        while c.in_flight:
            await asyncio.sleep(0.001)
    c.lat.clear()
    c.late.clear()
    c.most = 0
    n = int(seconds * rps)
    gc.disable()  # no collection pauses this client during the measured seconds (it collects after)
    with _OwnCost() as own:
        t0 = time.perf_counter()
        k = 0
        while k < n:
            now = time.perf_counter()
            while k < n and t0 + k / rps <= now:  # every request now due leaves at once
                c.fire(t0 + k / rps)
                k += 1
            if k < n:
                await asyncio.sleep(max(0.0, t0 + k / rps - time.perf_counter()))
        stop = time.perf_counter() + 30
        while len(c.lat) + c.errors < n and time.perf_counter() < stop:
            await asyncio.sleep(0.002)
    gc.enable()
    lat, late = sorted(c.lat), sorted(c.late)
    return {"n": len(lat), "errors": c.errors + (n - len(lat)), "p50_ms": 1e3 * lat[len(lat) // 2],
            "p99_ms": 1e3 * lat[int(0.99 * len(lat))], "max_ms": 1e3 * lat[-1], "most_in_flight": c.most,
            "client_send_late_p99_ms": round(1e3 * late[int(0.99 * len(late))], 3), "client_nice": nice,
            **own.report()}


async def _ingest(url: str, seconds: float, conns: int, tag: str, n_bodies: int, per_s: float = 0.0,
                  size: int = 5000) -> dict:
    import aiohttp

    data = bodies(n_bodies, size=size, tag=tag)
    headers = {"Content-Type": "application/x-ndjson", "Authorization": f"Bearer {TOKEN}"}
    accepted = 0
    nxt = 0
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=120)) as s:
        stop = time.perf_counter() + seconds

        async def worker():
            nonlocal accepted, nxt
            while time.perf_counter() < stop and nxt < len(data):
                if per_s > 0:  # paced: body k leaves at t0 + k / per_s
                    delay = t0 + nxt / per_s - time.perf_counter()
                    if delay > 0:
                        await asyncio.sleep(delay)
                body = data[nxt]
                nxt += 1
                async with s.post(url + "/v1/events", data=body, headers=headers) as r:
                    got = await r.json()
                    accepted += got.get("accepted", 0)
        with _OwnCost() as own:
            t0 = time.perf_counter()
            await asyncio.gather(*(worker() for _ in range(conns)))
            took = time.perf_counter() - t0
    return {"events_per_s": accepted / took, "accepted": accepted, "seconds": took, **own.report()}


def run_load(*args: str) -> dict:
    out = subprocess.run([sys.executable, __file__, "--load", *args], capture_output=True, check=True, cwd=ROOT)
    return json.loads(out.stdout.decode().strip().splitlines()[-1])


def parse_rate(data: list[bytes]) -> float:
    t0 = time.perf_counter()
    n = 0
    for body in data:
        for line in body.split(b"\n"):
            orjson.loads(line)
            n += 1
    return n / (time.perf_counter() - t0)


def validate_rate(data: list[bytes]) -> float:
    """The boundary's own cost: ``parse_ndjson`` (orjson plus every event rule) over the same bodies."""
    # this script is itself named service.py: put the repository first so the package wins
    if sys.path[0] != str(ROOT):
        sys.path.insert(0, str(ROOT))
    from service.config import load_config
    from service.events import EventValidator, parse_ndjson

    v = EventValidator(load_config(CONFIG))
    t0 = time.perf_counter()
    n = sum(len(parse_ndjson(body, v)[0]) for body in data)
    return n / (time.perf_counter() - t0)


class PeakRSS(threading.Thread):
    """Peak resident memory of a process and of each of its children, sampled every 20 ms."""

    def __init__(self, pid: int) -> None:
        import psutil

        super().__init__(daemon=True)
        self.proc = psutil.Process(pid)
        self.peaks: dict[str, int] = {}
        self.halt = threading.Event()

    def run(self) -> None:
        import psutil

        while not self.halt.is_set():
            try:
                procs = [("learner", self.proc)] + [(f"scorer pid {c.pid}", c) for c in self.proc.children()]
                for name, p in procs:
                    self.peaks[name] = max(self.peaks.get(name, 0), p.memory_info().rss)
            except psutil.Error:
                pass
            time.sleep(0.02)

    def cpu(self) -> dict[str, float]:
        """CPU seconds (user + system) each process has used so far."""
        import psutil

        out = {}
        for name, p in [("learner", self.proc)] + [(f"scorer pid {c.pid}", c) for c in self.proc.children()]:
            try:
                t = p.cpu_times()
                out[name] = t.user + t.system
            except psutil.Error:
                continue
        return out

    def report(self) -> dict:
        self.halt.set()
        self.join(5)
        return {k: round(v / 2**20, 1) for k, v in self.peaks.items()}


def publish_to_serve(url: str, rounds: int = 200) -> dict:
    """After each small ingest is answered, ask ``GET /v1/model/serving`` until the address serves
    a version at that journal position; the client's receive time minus the version's
    ``published_at`` (same machine, same clock). An upper bound: it includes one HTTP round trip and
    the polling interval (a tight loop on one keep-alive connection)."""
    import http.client

    host, port = url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=30)
    auth = {"Authorization": f"Bearer {TOKEN}", "Content-Type": "application/x-ndjson"}
    lines = _valid_lines()
    out = []
    for k in range(rounds):
        body = b"\n".join(orjson.dumps(dict(orjson.loads(lines[(k * 5 + j) % len(lines)]), id=f"pts{k}-{j}"))
                          for j in range(5))
        conn.request("POST", "/v1/events", body=body, headers=auth)
        seq = orjson.loads(conn.getresponse().read())["applied_seq"]
        while True:
            conn.request("GET", "/v1/model/serving")
            got = orjson.loads(conn.getresponse().read())
            if got["seq"] >= seq:
                out.append(time.time() - got["published_at"])
                break
    conn.close()
    out.sort()
    return {"p50_ms": 1e3 * out[len(out) // 2], "p99_ms": 1e3 * out[int(0.99 * len(out))], "max_ms": 1e3 * out[-1]}


def _gauge(url: str, name: str) -> float | None:
    """The value of metric ``name`` in the service's ``/metrics`` (``None`` when it does not show it)."""
    req = urllib.request.Request(url + "/metrics", headers={"Authorization": f"Bearer {TOKEN}"})
    with urllib.request.urlopen(req, timeout=30) as answer:
        for line in answer.read().decode().splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
    return None


def _spread(values: list[float]) -> dict:
    """Median, lowest and highest of repeated figures (a noisy machine: one run is one draw)."""
    v = sorted(values)
    mid = v[len(v) // 2] if len(v) % 2 else (v[len(v) // 2 - 1] + v[len(v) // 2]) / 2
    return {"median": round(mid, 2), "min": round(v[0], 2), "max": round(v[-1], 2),
            "runs": [round(x, 2) for x in values]}


def _under_ingest(url: str, secs: float, tag: str, rss: PeakRSS, producers: int = 4) -> dict:
    """One score phase of ``secs`` seconds at 1,000/s while a producer process posts 500-event bodies
    as fast as acknowledged over ``producers`` connections; the server processes' CPU seconds meanwhile."""
    n_bodies = int(max(40, secs * 160 + 400))  # enough 500-event bodies for 80k events/s
    bg = subprocess.Popen([sys.executable, __file__, "--load", "ingest", url, str(secs + 6), str(producers), tag,
                           str(n_bodies), "0", "500"], stdout=subprocess.PIPE, cwd=ROOT)
    time.sleep(4.0)  # the producer builds its bodies first (about 2 s here), then ingests
    cpu0 = rss.cpu()
    busy = run_load("rate", url, str(secs), "1000")
    cpu1 = rss.cpu()
    ing = json.loads(bg.communicate()[0].decode().strip().splitlines()[-1])
    busy["ingest"] = ing
    busy["server_cpu_s"] = {k: round(cpu1[k] - cpu0[k], 2) for k in cpu1 if k in cpu0}
    return busy


def scorer_comparison(secs: float, repeat: int = 1, policies: tuple[str, ...] = (), producers: int = 4) -> dict:
    """``service.scorers = 0`` (one process) against the default (scorer processes), in one run:
    idle score p99, score p99 while producers ingest 500-event bodies as fast as acknowledged, the
    ingest rate meanwhile, the load generators' own CPU and GC pauses, publish-to-serve, peak RSS.

    ``repeat``: score phases under ingest per mode, each with a fresh producer (the figures under
    ingest are their medians, the spread is reported); ``policies``: ``service.learner_policy``
    values measured as extra modes (``scorers_<policy>``) beside the default one, in the same run;
    ``producers``: connections the producer keeps busy (each waits for its answer before the next body).
    """
    res: dict = {}
    modes = [("single", 0, None), ("scorers", "auto", None)] + [(f"scorers_{p}", "auto", p) for p in policies]
    for mode, scorers, policy in modes:
        with tempfile.TemporaryDirectory() as d:
            svc, url = start_service(d + "/data", scorers, policy)
            rss = PeakRSS(svc.pid)
            rss.start()
            try:
                run_load("ingest", url, "3", "2", f"w{mode}", "20", "0", "500")  # warm-up: compile, connect
                run_load("rate", url, "1", "1000")
                idle = run_load("rate", url, str(secs), "1000")
                phases = [_under_ingest(url, secs, f"g{mode}{k}", rss, producers) for k in range(repeat)]
                pts = publish_to_serve(url) if scorers != 0 else None
                auto = scorers != 0 and policy in (None, "auto")  # the default policy is "auto"
                switches = _gauge(url, "trimtab_learner_policy_switches") if auto else None
            finally:
                svc.terminate()
                svc.wait(60)
                peaks = rss.report()
        busy = phases[0]
        ing = busy["ingest"]
        p99s = [b["p99_ms"] for b in phases]
        rates = [b["ingest"]["events_per_s"] for b in phases]
        scorer_us = [1e6 * sum(v for k, v in b["server_cpu_s"].items() if k.startswith("scorer")) / b["n"]
                     for b in phases]
        r = res[mode] = {
            "score_p99_ms_idle": round(idle["p99_ms"], 2),
            "score_p99_ms_under_ingest": _spread(p99s)["median"],
            "score_p50_ms_under_ingest": round(busy["p50_ms"], 2),
            "score_max_ms_under_ingest": round(busy["max_ms"], 2),
            "score_errors": idle["errors"] + sum(b["errors"] for b in phases),
            "ingest_events_per_s": round(_spread(rates)["median"]),
            "score_client": {k: busy[k] for k in busy if k.startswith("client_") or k == "most_in_flight"},
            "ingest_client": {k: ing[k] for k in ing if k.startswith("client_")},
            "peak_rss_mb": peaks, "server_cpu_s_during_scores_under_ingest": busy["server_cpu_s"],
            "score_seconds": secs, "producer_connections": producers}
        if repeat > 1:
            r["repeats"] = {"score_p99_ms_under_ingest": _spread(p99s), "ingest_events_per_s": _spread(rates)}
        if scorers != 0:  # the scorer processes' CPU per score (forwarded producer bodies included)
            r["scorer_cpu_us_per_score_under_ingest"] = _spread(scorer_us) if repeat > 1 else round(scorer_us[0], 1)
        if switches is not None:  # times the learner went from SCHED_IDLE to SCHED_BATCH or back
            r["learner_policy_switches"] = int(switches)
        if pts is not None:
            r["publish_to_serve_ms_p99"] = round(pts["p99_ms"], 2)
            r["publish_to_serve_ms_p50"] = round(pts["p50_ms"], 2)
        print(f"{mode}: score p99 {idle['p99_ms']:.2f} ms idle, {', '.join(f'{x:.2f}' for x in p99s)} ms under "
              f"ingest (first phase: p50 {busy['p50_ms']:.2f}, max {busy['max_ms']:.1f}); ingest "
              f"{', '.join(f'{x:.0f}' for x in rates)} events/s in 500-event bodies; score client CPU "
              f"{busy['client_cpu_share']:.2f} of a core, GC pauses {busy['client_gc_pauses']} (max "
              f"{busy['client_gc_max_ms']} ms), its own send lateness p99 {busy['client_send_late_p99_ms']} ms; "
              f"ingest client CPU {ing['client_cpu_share']:.2f}; server CPU s in the {secs:g} s of scores under "
              f"ingest {busy['server_cpu_s']}; peak RSS MB {peaks}"
              + (f"; publish-to-serve p99 {pts['p99_ms']:.2f} ms" if pts else "")
              + (f"; learner policy switches {int(switches)}" if switches is not None else ""), file=sys.stderr)
    s, m = res["single"], res["scorers"]
    res["ratios"] = {"score_p99_under_ingest_scorers_vs_single": round(m["score_p99_ms_under_ingest"]
                                                                       / s["score_p99_ms_under_ingest"], 3),
                     "ingest_scorers_vs_single": round(m["ingest_events_per_s"] / s["ingest_events_per_s"], 3)}
    for _mode, _scorers, policy in modes[2:]:
        o = res[f"scorers_{policy}"]
        res["ratios"][f"score_p99_under_ingest_{policy}_vs_default"] = round(
            o["score_p99_ms_under_ingest"] / m["score_p99_ms_under_ingest"], 3)
        res["ratios"][f"ingest_{policy}_vs_default"] = round(o["ingest_events_per_s"] / m["ingest_events_per_s"], 3)
    res["goals_met"] = {"score_p99_ms_under_ingest": m["score_p99_ms_under_ingest"] <= 5.0,
                        "ingest_events_per_s": m["ingest_events_per_s"] >= 60_000,
                        "publish_to_serve_ms": m["publish_to_serve_ms_p99"] <= 20.0}
    return res


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=5.0)
    ap.add_argument("--part", choices=("all", "classic", "scorers"), default="all",
                    help="classic: the earlier figures (default config); scorers: only one process against "
                         "scorer processes; all: both")
    ap.add_argument("--repeat", type=int, default=1,
                    help="scorers part: score phases under ingest per mode (median and spread reported)")
    ap.add_argument("--policies", default="",
                    help="scorers part: comma-separated service.learner_policy values (batch, idle, normal) "
                         "measured as extra modes beside the default, in the same run")
    ap.add_argument("--producers", type=int, default=4,
                    help="scorers part: connections the producer posts 500-event bodies over (default 4)")
    ap.add_argument("--bare-server")
    ap.add_argument("--load", nargs="+")
    a = ap.parse_args()
    if a.bare_server:
        _bare_server(a.bare_server)
        return 0
    if a.load:
        import gc

        # a load generator keeps thousands of short-lived tasks: collect rarely, or its own pauses
        # (reported as client_gc_*) show up as server latency
        gc.collect()
        gc.freeze()
        gc.set_threshold(100_000, 50, 100)
        kind, url, secs, *rest = a.load
        fn = {"closed": lambda: _closed(url, float(secs), int(rest[0])),
              "rate": lambda: _rate(url, float(secs), float(rest[0])),
              "rate-aiohttp": lambda: _rate_aiohttp(url, float(secs), float(rest[0])),
              "ingest": lambda: _ingest(url, float(secs), int(rest[0]), rest[1], int(rest[2]),
                                        float(rest[3]) if len(rest) > 3 else 0.0,
                                        int(rest[4]) if len(rest) > 4 else 5000)}[kind]
        print(json.dumps(asyncio.run(fn())))
        return 0

    secs = a.seconds
    res: dict = {"machine": f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores",
                 "python": platform.python_version(), "load_average_at_start": os.getloadavg()[0]}
    if a.part == "scorers":
        res["scorers"] = scorer_comparison(secs, a.repeat, tuple(p for p in a.policies.split(",") if p), a.producers)
        print(json.dumps(res))
        return 0
    bare, bare_url = start_bare()
    with tempfile.TemporaryDirectory() as d:
        svc, url = start_service(d)
        try:
            run_load("closed", url, "1", "16")  # warm-up (compiled kernels, connection setup)
            # interleaved, best of three each: the machine is shared and its speed drifts
            bare_rps = score_rps = 0.0
            for _ in range(3):
                bare_rps = max(bare_rps, run_load("closed", bare_url, str(secs), "16")["rps"])
                score_rps = max(score_rps, run_load("closed", url, str(secs), "16")["rps"])
            res.update(bare_rps=round(bare_rps), score_rps=round(score_rps),
                       score_vs_bare=round(score_rps / bare_rps, 3))
            print(f"score: {score_rps:.0f} req/s vs bare {bare_rps:.0f} req/s", file=sys.stderr)

            n_bodies = int(max(8, secs * 16))
            ingest = run_load("ingest", url, str(secs), "2", "i", str(n_bodies))
            sample = bodies(6, tag="p")
            parse = parse_rate(sample)
            validate = validate_rate(sample)
            res.update(ingest_events_per_s=round(ingest["events_per_s"]), parse_events_per_s=round(parse),
                       ingest_vs_parse=round(ingest["events_per_s"] / parse, 3),
                       parse_validate_events_per_s=round(validate),
                       ingest_vs_parse_validate=round(ingest["events_per_s"] / validate, 3))
            print(f"ingest: {ingest['events_per_s']:.0f} events/s; parse only {parse:.0f}/s", file=sys.stderr)

            bg = subprocess.Popen([sys.executable, __file__, "--load", "ingest", url, str(secs + 2), "1", "g",
                                   str(n_bodies)], stdout=subprocess.PIPE, cwd=ROOT)  # as fast as acknowledged
            time.sleep(1.5)
            lat = run_load("rate", url, str(secs), "1000")
            bg_res = json.loads(bg.communicate()[0].decode().strip().splitlines()[-1])
            res.update(score_p99_ms_at_1000rps=round(lat["p99_ms"], 2),
                       score_p50_ms_at_1000rps=round(lat["p50_ms"], 2), score_errors_at_1000rps=lat["errors"],
                       background_ingest_events_per_s=round(bg_res["events_per_s"]))
            print(f"score at 1000 rps with ingest running: p50 {lat['p50_ms']:.2f} ms, p99 {lat['p99_ms']:.2f} ms "
                  f"(background ingest {bg_res['events_per_s']:.0f} events/s)", file=sys.stderr)
            # the same with a paced background ingest of 10,000 events/s (two 5,000-event bodies a second)
            bg = subprocess.Popen([sys.executable, __file__, "--load", "ingest", url, str(secs + 2), "1", "h",
                                   str(n_bodies), "2"], stdout=subprocess.PIPE, cwd=ROOT)
            time.sleep(1.5)
            paced = run_load("rate", url, str(secs), "1000")
            bg.communicate()
            quiet = run_load("rate", url, str(secs), "1000")
            bare_lat = run_load("rate", bare_url, str(secs), "1000")
            res.update(score_p99_ms_at_1000rps_paced_ingest_10k=round(paced["p99_ms"], 2),
                       score_p99_ms_at_1000rps_idle=round(quiet["p99_ms"], 2),
                       bare_p99_ms_at_1000rps=round(bare_lat["p99_ms"], 2))
            print(f"score at 1000 rps: p99 {paced['p99_ms']:.2f} ms with a 10k events/s ingest, "
                  f"{quiet['p99_ms']:.2f} ms idle; bare endpoint {bare_lat['p99_ms']:.2f} ms", file=sys.stderr)
        finally:
            svc.terminate()
            svc.wait(60)
            bare.terminate()
            bare.wait(10)
    res["goals_met"] = {"score_vs_bare": res["score_vs_bare"] >= 0.8,
                        "score_p99_ms_at_1000rps": res["score_p99_ms_at_1000rps"] <= 5.0,
                        "ingest_events_per_s": res["ingest_events_per_s"] >= 60_000}
    if a.part == "all":
        res["scorers"] = scorer_comparison(secs, a.repeat, tuple(p for p in a.policies.split(",") if p), a.producers)
    print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
