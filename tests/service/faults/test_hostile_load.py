"""Hostile load against a real ``trimtab serve`` on 127.0.0.1: scoring with 70,000 distinct
categorical strings, 15 MB bodies (declared, chunked, compressed to a bomb), a burst at ten times
the queue's capacity, and 600 stalled connections.

What is held, and checked from outside the process: the server's resident memory (read with psutil
every 20 ms) stays under 512 MB; the checkpoint and the model card are byte-for-byte the same size
and ``state_digest`` after scoring as before (scoring keeps nothing); the scores equal those of an
offline :class:`Engine` fed the same events (the categorical hash is deterministic, so a value never
seen before scores right without being remembered); a normal client is served within 2 s
throughout. Refusals follow RFC 9110 (Fielding, Nottingham, Reschke, 2022: 408, 413 and 503 with
``Retry-After``) and RFC 6585 (Nottingham, Fielding, 2012: 429 with ``Retry-After``).
"""

from __future__ import annotations

import gzip
import re
import socket
import threading
import time
import urllib.request
from concurrent.futures import ThreadPoolExecutor

import orjson
import psutil
import pytest

from service.engine import Engine
from service.events import EventValidator
from tests.service.faults.rawhttp import TOKEN, exchange, request_bytes, serve
from tests.service.servicekit import demo_events, make_config

pytestmark = pytest.mark.slow

RSS_BOUND = 512 * 2**20
MB15 = 15 * 2**20
WARM = demo_events(500, tag="warm")
PROBES = [{"ambient_c": 4.0, "door_open_s": 30, "van": "V03", "route": "urban"},
          {"ambient_c": 21.5, "load_kg": 300, "van": "V07"}]


class Sampler(threading.Thread):
    """Peak resident memory of a process, sampled every 20 ms until stopped."""

    def __init__(self, pid: int) -> None:
        super().__init__(daemon=True)
        self.proc = psutil.Process(pid)
        self.peak = 0
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.is_set():
            try:
                self.peak = max(self.peak, self.proc.memory_info().rss)
            except psutil.Error:
                return
            time.sleep(0.02)


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("hostile")
    cfg = make_config(tmp / "data", queue_limit=20_000, header_timeout_s=3.0, checkpoint_every=1_000_000)
    proc = serve(tmp, cfg)
    sampler = Sampler(proc.proc.pid)
    sampler.start()
    proc.sampler = sampler
    try:
        # the first apply may compile the kernels (a fresh checkout has no cache): minutes on a busy machine
        status, out = call(proc, "POST", "/v1/events", orjson.dumps(WARM), timeout=300)
        assert status == 200 and out["accepted"] == 500, out
        yield proc
    finally:
        sampler.stop.set()
        code = proc.stop()
        print(f"\nserver peak RSS {sampler.peak / 2**20:.0f} MB (bound {RSS_BOUND / 2**20:.0f} MB)")
        assert code == 0
        assert not [line for line in proc.log if "Traceback" in line or " ERROR " in line], proc.log[-20:]


def call(srv, method: str, path: str, body: bytes | None = None, token: bool = True, timeout: float = 60):
    """A well-formed request with urllib: ``(status, parsed JSON body)``."""
    headers = {"Content-Type": "application/json"}
    if token:
        headers["Authorization"] = f"Bearer {TOKEN}"
    req = urllib.request.Request(srv.url + path, data=body, method=method, headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=timeout) as r:
            return r.status, orjson.loads(r.read())
    except urllib.error.HTTPError as e:
        return e.code, orjson.loads(e.read())


def normal_score(srv) -> float:
    """Seconds a normal client waits for a score (asserting it got one)."""
    start = time.perf_counter()
    status, out = call(srv, "POST", "/v1/score", orjson.dumps({"features": PROBES[0]}), token=False, timeout=10)
    assert status == 200, out
    return time.perf_counter() - start


def gauge(srv, name: str) -> float:
    with urllib.request.urlopen(srv.url + "/metrics", timeout=10) as r:
        text = r.read().decode()
    return float(re.search(rf"^{name} (\S+)$", text, re.M).group(1))


class NormalClient(threading.Thread):
    """Scores every 100 ms while a test runs; ``worst`` is its longest wait."""

    def __init__(self, srv) -> None:
        super().__init__(daemon=True)
        self.srv, self.waits, self.failures, self.stop = srv, [], [], threading.Event()

    def run(self) -> None:
        while not self.stop.is_set():
            try:
                self.waits.append(normal_score(self.srv))
            except (AssertionError, OSError) as exc:  # a refusal or a timeout: the test fails on exit
                self.failures.append(repr(exc))
                self.waits.append(float("inf"))
            time.sleep(0.1)

    def __enter__(self):
        self.start()
        return self

    def __exit__(self, *exc) -> None:
        self.stop.set()
        self.join(30)
        assert not self.failures, self.failures[:3]
        assert self.waits and max(self.waits) < 2.0, max(self.waits or [99])
        print(f"normal client: {len(self.waits)} scores, longest wait {max(self.waits) * 1000:.0f} ms")


def test_scoring_70000_distinct_strings_keeps_no_state(server):
    status, before = call(server, "POST", "/v1/checkpoints")
    assert status == 200, before
    card_before = call(server, "GET", "/v1/model")[1]
    probes_before = call(server, "POST", "/v1/score", orjson.dumps({"events": [{"features": p} for p in PROBES]}))[1]

    hostile = [[{"features": {"ambient_c": float(k % 30), "van": f"van-{k:06d}-{'x' * (k % 40)}",
                              "route": f"route-{k:06d}"}} for k in range(start, start + 1000)]
               for start in range(0, 70_000, 1000)]

    def score(batch):
        return call(server, "POST", "/v1/score", orjson.dumps({"events": batch}), token=False)

    with NormalClient(server), ThreadPoolExecutor(4) as pool:
        answers = list(pool.map(score, hostile))
    assert all(status == 200 for status, _ in answers)

    # the same events offline: same digest, and the same scores bit for bit, for new values too
    validator = EventValidator(server.config)
    ref = Engine(server.config)
    ref.apply_events([validator.validate(e, f"[{i}]") for i, e in enumerate(WARM)])
    assert ref.state_digest == card_before["state_digest"]
    for batch, (_, out) in zip(hostile[::10], answers[::10]):
        assert out["scores"] == ref.score([e["features"] for e in batch])[0].tolist()

    status, after = call(server, "POST", "/v1/checkpoints")
    card_after = call(server, "GET", "/v1/model")[1]
    probes_after = call(server, "POST", "/v1/score", orjson.dumps({"events": [{"features": p} for p in PROBES]}))[1]
    print(f"checkpoint {before['bytes']} bytes before 140,000 scored strings, {after['bytes']} after")
    assert after["bytes"] == before["bytes"] and after["state_digest"] == before["state_digest"]
    assert card_after["state_digest"] == card_before["state_digest"]
    assert len(orjson.dumps(card_after)) == len(orjson.dumps(card_before))
    assert probes_after["scores"] == probes_before["scores"]


def _chunked(path: str, total: int, headers: dict | None = None) -> bytes:
    piece = b"[" + b'{"features": {"van": "' + b"v" * 60000 + b'"}},'
    chunks = b"".join(b"%x\r\n%s\r\n" % (len(piece), piece) for _ in range(total // len(piece)))
    head = request_bytes("POST", path, headers={"Content-Type": "application/json", "Transfer-Encoding": "chunked",
                                                **(headers or {})}, token=False, length=False)
    return head + chunks + b"0\r\n\r\n"


def test_15mb_bodies_are_refused_within_the_memory_bound(server):
    line = orjson.dumps(demo_events(1, tag="big")[0]) + b"\n"
    ndjson = line * (MB15 // len(line))  # 15 MB, about 60,000 lines: over service.max_batch
    declared = request_bytes("POST", "/v1/score", b"{" * MB15, {"Content-Type": "application/json"}, token=False)
    ingest = request_bytes("POST", "/v1/events", ndjson, {"Content-Type": "application/x-ndjson"})
    chunked = _chunked("/v1/score", MB15)
    bomb = request_bytes("POST", "/v1/events", gzip.compress(b" " * (200 * 2**20)),
                         {"Content-Type": "application/json", "Content-Encoding": "gzip"})
    kinds = {"declared": declared, "chunked": chunked, "ingest": ingest}
    jobs = [(kind, data) for kind, data in kinds.items() for _ in range(15)]

    def send(job):
        kind, data = job
        return kind, exchange(server.url, data, timeout=120)

    with NormalClient(server), ThreadPoolExecutor(30) as pool:
        answers = list(pool.map(send, jobs))
        # then fifteen bombs at once (each claims its route's whole limit from the in-flight budget)
        answers += list(pool.map(send, [("bomb", bomb)] * 15))
    seen = {}
    for kind, a in answers:
        seen.setdefault(kind, []).append(a.status)
        assert a.status in (413, 503), (kind, a.status, a.body[:200])
        err = a.error()
        assert err["where"] == "body", err
        if a.status == 503:
            assert err["code"] == "busy" and int(a.headers["retry-after"]) >= 1
        else:
            assert err["code"] == "too_large" and "limit" in err["message"]
    print("15 MB bodies:", {k: sorted(set(v)) for k, v in seen.items()})
    assert set(seen["declared"]) == {413} and set(seen["chunked"]) <= {413, 503}
    assert 413 in seen["ingest"] and 413 in seen["bomb"]
    assert server.sampler.peak < RSS_BOUND, server.sampler.peak / 2**20


def test_burst_at_ten_times_the_queue_gets_429_with_retry_after(server):
    learned_before = call(server, "GET", "/v1/model")[1]["counters"]
    bodies = [b"\n".join(orjson.dumps(e) for e in demo_events(4000, tag=f"burst{k}-")) for k in range(50)]

    def post(body):
        return exchange(server.url, request_bytes("POST", "/v1/events", body,
                                                  {"Content-Type": "application/x-ndjson"}), timeout=120)

    with NormalClient(server), ThreadPoolExecutor(25) as pool:  # 200,000 events at a 20,000-event queue
        answers = list(pool.map(post, bodies))
    ok = [a for a in answers if a.status == 200]
    refused = [a for a in answers if a.status in (429, 503)]
    assert len(ok) + len(refused) == len(answers), sorted({a.status for a in answers})
    assert ok and len(refused) >= 10, (len(ok), len(refused))
    assert all(int(a.headers["retry-after"]) >= 1 and a.error()["code"] in ("overloaded", "busy") for a in refused)
    accepted = sum(orjson.loads(a.body)["accepted"] for a in ok)
    time.sleep(0.5)
    c = call(server, "GET", "/v1/model")[1]["counters"]
    assert c["learned"] + c["held_out"] == learned_before["learned"] + learned_before["held_out"] + accepted
    print(f"burst: {len(ok)} accepted ({accepted} events), {len(refused)} refused with Retry-After")
    assert server.sampler.peak < RSS_BOUND, server.sampler.peak / 2**20


def test_burst_of_large_valid_bodies_stays_within_the_memory_bound(server):
    """Twenty 7 MB bodies of 20,000 valid events at once: ten times what the in-flight budget
    (``service.max_inflight_bytes``, 24 MiB) lets through together; the rest wait their turn (503,
    or 429 while the queue is full)."""
    def body(k):
        events = demo_events(20_000, tag=f"large{k}-")
        for e in events:
            e["features"]["route"] = f"{'r' * 200}{k}"
        return b"\n".join(orjson.dumps(e) for e in events)

    bodies = [body(k) for k in range(20)]

    def post(data):
        return exchange(server.url, request_bytes("POST", "/v1/events", data,
                                                  {"Content-Type": "application/x-ndjson"}), timeout=300)

    with NormalClient(server), ThreadPoolExecutor(20) as pool:
        answers = list(pool.map(post, bodies))
    statuses = sorted(a.status for a in answers)
    print(f"large bodies ({len(bodies[0]) / 2**20:.1f} MB each): statuses {statuses}; "
          f"peak RSS so far {server.sampler.peak / 2**20:.0f} MB")
    assert set(statuses) <= {200, 429, 503} and 200 in statuses and 503 in statuses
    assert all(a.error()["code"] in ("busy", "overloaded") and int(a.headers["retry-after"]) >= 1
               for a in answers if a.status != 200)
    assert server.sampler.peak < RSS_BOUND, server.sampler.peak / 2**20


def test_600_stalled_connections_do_not_starve_a_normal_client(server):
    host, port = server.url.removeprefix("http://").split(":")
    stalled = []
    for k in range(600):
        s = socket.create_connection((host, int(port)), timeout=10)
        s.sendall(b"POST /v1/score HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Ty" if k % 2 else b"GE")
        stalled.append(s)
    time.sleep(0.5)
    try:
        wait = normal_score(server)
        fds = psutil.Process(server.proc.pid).num_fds()
        open_now = gauge(server, "trimtab_connections_open")
        print(f"600 stalled connections: normal score in {wait * 1000:.0f} ms, server fds {fds}, "
              f"open connections {open_now:.0f}")
        assert wait < 2.0
        assert open_now <= server.config.service.max_connections
        assert fds <= server.config.service.max_connections + 256
        # past service.header_timeout_s (3 s here) every stalled connection has been closed by the server
        time.sleep(server.config.service.header_timeout_s + 1.5)
        answers = set()
        for s in stalled:
            s.settimeout(5)
            data = b""
            try:
                while chunk := s.recv(65536):  # until the server closes (a timeout here fails the test)
                    data += chunk
            except ConnectionResetError:
                pass
            answers.add(data[:30])
            assert not data or data.startswith(b"HTTP/1.1 408 "), data[:100]
        print("stalled connections ended with:", answers)
    finally:
        for s in stalled:
            s.close()
    assert normal_score(server) < 2.0


def test_loop_lag_and_memory_bounds(server):
    """Runs last: the bounds held over everything above.

    The work done on the event loop (``trimtab_loop_busy_max_seconds``: the loop thread's CPU time
    past its 10 ms timer) stays near 25-40 ms in these runs; the bound asserted is 100 ms because a
    full collection of Python's garbage collector, which stops every thread and lands on the loop
    thread about one run in five here, took 50-90 ms (measured with ``gc.callbacks``) with a burst's
    events alive. The wall-clock lateness is printed too; on a machine shared with other work it
    also counts time the process was not scheduled.
    """
    lag = gauge(server, "trimtab_loop_lag_max_seconds")
    busy = gauge(server, "trimtab_loop_busy_max_seconds")
    print(f"server peak RSS {server.sampler.peak / 2**20:.0f} MB; event loop: longest work on the loop "
          f"{busy * 1000:.1f} ms, longest wall-clock lateness {lag * 1000:.1f} ms")
    assert server.sampler.peak < RSS_BOUND
    assert busy < 0.1
