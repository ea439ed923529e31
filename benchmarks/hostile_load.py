"""A normal client's score latency while hostile clients send 15 MB bodies, against idle, in one run.

A ``trimtab serve`` subprocess on 127.0.0.1 with the default limits. First a normal client scores
one event at a time with nothing else running (the baseline); then fifteen clients send 15 MB score
bodies without a token (declared by ``Content-Length``) and fifteen more send them chunked, over and
over, while the normal client keeps scoring. Printed: the normal client's p50/p99 in both phases and
their ratio, the server's peak resident memory (psutil, every 20 ms) and the event loop's longest
lateness and longest work on the loop (``/metrics``). The last line is one JSON object.

Usage: ``python benchmarks/hostile_load.py [--seconds 10]``. The machine has two cores shared by the
server, the hostile clients and anything else running.
"""

from __future__ import annotations

import argparse
import json
import platform
import re
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.service.faults.rawhttp import exchange, request_bytes, serve  # noqa: E402
from tests.service.faults.test_hostile_load import Sampler, _chunked  # noqa: E402
from tests.service.servicekit import demo_events, make_config  # noqa: E402

PROBE = orjson.dumps({"features": {"ambient_c": 6.5, "door_open_s": 30, "van": "V03", "route": "urban"}})
MB15 = 15 * 2**20


def normal_waits(url: str, stop: threading.Event, waits: list) -> None:
    while not stop.is_set():
        start = time.perf_counter()
        req = urllib.request.Request(url + "/v1/score", data=PROBE, headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(req, timeout=30) as r:
            assert r.status == 200
            r.read()
        waits.append(time.perf_counter() - start)
        time.sleep(0.01)


def quantile(values: list, q: float) -> float:
    values = sorted(values)
    return values[min(len(values) - 1, int(q * len(values)))]


def gauge(url: str, name: str) -> float | None:
    """A gauge from ``/metrics`` (``None`` on a build that does not have it)."""
    with urllib.request.urlopen(url + "/metrics", timeout=10) as r:
        found = re.search(rf"^{name} (\S+)$", r.read().decode(), re.M)
    return float(found.group(1)) if found else None


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seconds", type=float, default=10.0)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        srv = serve(Path(tmp), make_config(Path(tmp) / "data"))
        try:
            warm = exchange(srv.url, request_bytes("POST", "/v1/events", orjson.dumps(demo_events(2000)),
                                                   {"Content-Type": "application/json"}), timeout=300)
            assert warm.status == 200, warm.body[:300]  # the first apply may compile the kernels
            sampler = Sampler(srv.proc.pid)
            sampler.start()
            idle: list = []
            stop = threading.Event()
            t = threading.Thread(target=normal_waits, args=(srv.url, stop, idle))
            t.start()
            time.sleep(args.seconds / 2)
            stop.set()
            t.join()
            idle_rss = sampler.peak

            declared = request_bytes("POST", "/v1/score", b"{" * MB15, {"Content-Type": "application/json"},
                                     token=False)
            chunked = _chunked("/v1/score", MB15)
            hostile_sent = {"n": 0}
            stop = threading.Event()

            def hostile(data: bytes) -> None:
                while not stop.is_set():
                    exchange(srv.url, data, timeout=120)
                    hostile_sent["n"] += 1

            attackers = [threading.Thread(target=hostile, args=(d,)) for d in [declared] * 15 + [chunked] * 15]
            attack: list = []
            normal = threading.Thread(target=normal_waits, args=(srv.url, stop, attack))
            for a in attackers:
                a.start()
            normal.start()
            time.sleep(args.seconds)
            stop.set()
            for a in [*attackers, normal]:
                a.join()
            sampler.stop.set()
            lag = gauge(srv.url, "trimtab_loop_lag_max_seconds")
            busy = gauge(srv.url, "trimtab_loop_busy_max_seconds")
        finally:
            try:
                srv.stop()
            except subprocess.TimeoutExpired:  # a build without timeouts may hang on the hostile connections
                print("the server did not stop within 60 s of SIGTERM; killed", file=sys.stderr)
                srv.kill()
    out = {
        "score_p50_ms_idle": round(quantile(idle, 0.5) * 1000, 2), "score_p99_ms_idle": round(quantile(idle, 0.99) * 1000, 2),
        "score_p50_ms_attack": round(quantile(attack, 0.5) * 1000, 2),
        "score_p99_ms_attack": round(quantile(attack, 0.99) * 1000, 2),
        "p99_attack_vs_idle": round(quantile(attack, 0.99) / quantile(idle, 0.99), 2),
        "hostile_15mb_bodies": hostile_sent["n"], "peak_rss_mb_idle": round(idle_rss / 2**20),
        "peak_rss_mb": round(sampler.peak / 2**20), "loop_lag_max_ms": lag and round(lag * 1000, 1),
        "loop_busy_max_ms": busy and round(busy * 1000, 1), "machine": f"{platform.machine()} {platform.node()}",
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
    }
    for k, v in out.items():
        print(f"{k:24} {v}")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
