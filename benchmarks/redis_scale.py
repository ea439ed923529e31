"""Speed of the several-machine layout on one box: producers -> Redis stream -> learner -> model
published to Redis -> remote scorer (``trimtab serve --role scorer``), all real processes on loopback.

Prints a table; the last line is one JSON object:

* ``stream_events_per_s``: events a learner (``trimtab serve`` with ``[feed]``, no local scorers)
  takes from a pre-filled Redis stream, journals, learns and acknowledges, per wall second; and
  ``stream_vs_http``: that rate over the same learner's rate for the same events posted as
  500-event NDJSON bodies by two HTTP producers (the baseline, same run);
* ``scorer_scores_per_s``: single-event ``/v1/score`` answers per second of one remote scorer under a
  closed loop of 8 connections; ``scorer_vs_learner``: over the learner answering the same load
  itself (idle learner, same run);
* ``publish_to_serve_ms_p99`` (goal <= 250 ms): after the learner answers a post (the events are
  learned and the new model is handed to its Redis publisher), until the scorer's
  ``/v1/model/serving`` names the learner's new state digest; measured from outside by polling
  every millisecond, so it includes one poll's round trip (``poll_rtt_ms``, printed);
* ``*_cpu_s``: CPU seconds each process used during its measurement (the machine is shared: CPU
  time travels better than wall time), and peak RSS (``VmHWM``) of the learner and the scorer.

Usage: ``python3 benchmarks/redis_scale.py [--events 60000] [--rounds 200] [--seconds 4]``.
Needs ``redis-server`` on the PATH. Run from the repository root.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.config import FeedConfig, PublishConfig  # noqa: E402
from tests.service.rediskit import RedisServer  # noqa: E402
from tests.service.servicekit import TOKEN, ServeProcess, demo_events, make_config, toml_text  # noqa: E402

AUTH = {"Authorization": f"Bearer {TOKEN}"}
STREAM = "bench.events"
TICK = os.sysconf("SC_CLK_TCK")


def cpu_s(pid: int) -> float:
    """User + system CPU seconds of a process so far."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / TICK


def peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _get(url: str, path: str) -> tuple[int, bytes]:
    req = urllib.request.Request(url + path, headers=AUTH)
    try:
        with urllib.request.urlopen(req, timeout=30) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as err:
        return err.code, err.read()


def _post_events(url: str, events: list[dict]) -> None:
    req = urllib.request.Request(url + "/v1/events", data=b"\n".join(orjson.dumps(e) for e in events),
                                 headers={**AUTH, "Content-Type": "application/x-ndjson"}, method="POST")
    with urllib.request.urlopen(req, timeout=120) as r:
        assert r.status == 200


def write_config(folder: Path, name: str, redis_url: str, *, feed: bool) -> Path:
    cfg = make_config(folder / f"data-{name}", scorers=0)
    update = {"publish": PublishConfig(source=redis_url, key=f"bench.{name}.model")}
    if feed:
        update["feed"] = FeedConfig(source=redis_url, stream=STREAM, group="bench", consumer="learner-1")
    path = folder / f"{name}.toml"
    path.write_text(toml_text(cfg.model_copy(update=update)))
    return path


def start(path: Path, *args: str) -> ServeProcess:
    proc = ServeProcess(path, args=args)
    proc.wait_ready()
    return proc


# ------------------------------------------------------------------ measurements
def stream_rate(folder: Path, redis_url: str, n: int) -> dict:
    import redis

    client = redis.Redis.from_url(redis_url)
    events = demo_events(n, tag="s")
    for k in range(0, n, 1000):
        pipe = client.pipeline(transaction=False)
        for e in events[k:k + 1000]:
            pipe.xadd(STREAM, {"event": orjson.dumps(e)})
        pipe.execute()
    learner = start(write_config(folder, "stream", redis_url, feed=True))
    t0, c0 = time.perf_counter(), cpu_s(learner.proc.pid)
    while True:
        feed = orjson.loads(_get(learner.url, "/readyz")[1])["feed"]
        if feed["consumed"] >= n:
            break
        time.sleep(0.01)
    took, cpu = time.perf_counter() - t0, cpu_s(learner.proc.pid) - c0
    pending = client.xpending(STREAM, "bench")["pending"]
    learner.stop()
    client.close()
    return {"events_per_s": n / took, "cpu_s": cpu, "pending_after": pending}


def http_rate(folder: Path, redis_url: str, n: int) -> dict:
    from concurrent.futures import ThreadPoolExecutor

    learner = start(write_config(folder, "http", redis_url, feed=False))
    events = demo_events(n, tag="h")
    bodies = [events[k:k + 500] for k in range(0, n, 500)]
    t0, c0 = time.perf_counter(), cpu_s(learner.proc.pid)
    with ThreadPoolExecutor(2) as pool:
        list(pool.map(lambda b: _post_events(learner.url, b), bodies))
    took, cpu = time.perf_counter() - t0, cpu_s(learner.proc.pid) - c0
    return {"learner": learner, "events_per_s": n / took, "cpu_s": cpu}


async def _closed_loop(url: str, seconds: float, conns: int = 8) -> float:
    import aiohttp

    body = orjson.dumps({"features": demo_events(1, tag="q")[0]["features"]})
    headers = {**AUTH, "Content-Type": "application/json"}
    done = 0
    async with aiohttp.ClientSession(connector=aiohttp.TCPConnector(limit=conns)) as s:
        stop = time.perf_counter() + seconds

        async def worker():
            nonlocal done
            while time.perf_counter() < stop:
                async with s.post(url + "/v1/score", data=body, headers=headers) as r:
                    await r.read()
                    done += r.status == 200
        t0 = time.perf_counter()
        await asyncio.gather(*(worker() for _ in range(conns)))
        return done / (time.perf_counter() - t0)


def score_rate(proc: ServeProcess, seconds: float) -> dict:
    asyncio.run(_closed_loop(proc.url, 0.5))  # warm: connections, the first calls of the compiled scorer
    c0, me0 = cpu_s(proc.proc.pid), time.process_time()
    rps = asyncio.run(_closed_loop(proc.url, seconds))
    return {"scores_per_s": rps, "cpu_s": cpu_s(proc.proc.pid) - c0, "load_generator_cpu_s": time.process_time() - me0}


def publish_to_serve(learner: ServeProcess, scorer: ServeProcess, rounds: int) -> dict:
    delays, rtts = [], []
    for k in range(rounds):
        _post_events(learner.url, demo_events(10, tag=f"p{k}-"))
        t0 = time.perf_counter()
        want = orjson.loads(_get(learner.url, "/v1/model/serving")[1])["state_digest"]
        while True:
            t = time.perf_counter()
            got = orjson.loads(_get(scorer.url, "/v1/model/serving")[1])
            rtts.append(time.perf_counter() - t)
            if got.get("state_digest") == want:
                break
            time.sleep(0.001)
        delays.append(time.perf_counter() - t0)
    delays.sort()
    rtts.sort()
    return {"p50_ms": 1e3 * delays[len(delays) // 2], "p99_ms": 1e3 * delays[int(0.99 * (len(delays) - 1))],
            "max_ms": 1e3 * delays[-1], "poll_rtt_ms": 1e3 * rtts[len(rtts) // 2]}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--events", type=int, default=60_000)
    ap.add_argument("--rounds", type=int, default=200)
    ap.add_argument("--seconds", type=float, default=4.0)
    args = ap.parse_args()
    if shutil.which("redis-server") is None:
        print(json.dumps({"skipped": "redis-server is not installed"}))
        return 0
    os.environ.setdefault("TRIMTAB_TEST_TOKEN", TOKEN)
    with tempfile.TemporaryDirectory(prefix="trimtab-redis-bench-") as tmp:
        folder = Path(tmp)
        server = RedisServer(folder / "redis", appendonly=True)
        procs: list[ServeProcess] = []
        try:
            stream = stream_rate(folder, server.url, args.events)
            http = http_rate(folder, server.url, args.events)
            learner = http.pop("learner")
            procs.append(learner)
            scorer = start(write_config(folder, "http", server.url, feed=False), "--role", "scorer")
            procs.append(scorer)
            own = score_rate(learner, args.seconds)
            remote = score_rate(scorer, args.seconds)
            p2s = publish_to_serve(learner, scorer, args.rounds)
            rss = {"learner_peak_rss_mb": peak_rss_mb(learner.proc.pid),
                   "scorer_peak_rss_mb": peak_rss_mb(scorer.proc.pid)}
        finally:
            for p in procs:
                if p.proc.poll() is None:
                    p.proc.send_signal(signal.SIGTERM)
                    p.proc.wait(60)
            server.stop()
    out = {
        "stream_events_per_s": round(stream["events_per_s"]), "stream_learner_cpu_s": round(stream["cpu_s"], 2),
        "stream_pending_after": stream["pending_after"],
        "http_events_per_s": round(http["events_per_s"]), "http_learner_cpu_s": round(http["cpu_s"], 2),
        "stream_vs_http": round(stream["events_per_s"] / http["events_per_s"], 3),
        "scorer_scores_per_s": round(remote["scores_per_s"]), "scorer_cpu_s": round(remote["cpu_s"], 2),
        "learner_scores_per_s": round(own["scores_per_s"]), "learner_score_cpu_s": round(own["cpu_s"], 2),
        "scorer_vs_learner": round(remote["scores_per_s"] / own["scores_per_s"], 3),
        "load_generator_cpu_s": round(remote["load_generator_cpu_s"], 2),
        "publish_to_serve_ms_p50": round(p2s["p50_ms"], 1), "publish_to_serve_ms_p99": round(p2s["p99_ms"], 1),
        "publish_to_serve_ms_max": round(p2s["max_ms"], 1), "poll_rtt_ms": round(p2s["poll_rtt_ms"], 2),
        "publish_to_serve_p99_vs_poll_rtt": round(p2s["p99_ms"] / p2s["poll_rtt_ms"], 1),
        **{k: round(v, 1) for k, v in rss.items()},
        "events": args.events, "rounds": args.rounds, "machine": platform.machine(), "cores": os.cpu_count(),
        "load_avg_1m": round(os.getloadavg()[0], 2),
    }
    width = max(map(len, out))
    for k, v in out.items():
        print(f"{k:<{width}}  {v}")
    print(json.dumps(out))
    return 0


if __name__ == "__main__":
    sys.exit(main())
