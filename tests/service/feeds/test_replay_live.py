"""Live replay: the same feed posted to a real ``trimtab serve`` subprocess ends at the offline digest.

Must-show 2 of the replay issue: replay is only a different event source, so a live replay into
the service (journal, ingestion loop, HTTP) and an offline replay of the same feed must give
bit-identical models. The server is a real subprocess on a loopback port with a real SQLite
journal; the client honours ``429`` with ``Retry-After`` (checked against a small aiohttp server
that refuses the first tries, as RFC 9110 section 10.2.3 describes the header).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import orjson
import pytest
from aiohttp import web

from service.config import load_config
from service.replay.runner import run_replay
from service.feeds.into_service import replay_live
from service.replay.scenario import write_ndjson

from tests.service.servicekit import TOKEN, free_port

ROOT = Path(__file__).resolve().parents[3]
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"

pytestmark = pytest.mark.asyncio


def _serve(config: Path, data_dir: Path, port: int) -> subprocess.Popen:
    env = dict(os.environ, TRIMTAB_TOKEN=TOKEN)  # the demo configs read the token from $TRIMTAB_TOKEN
    return subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "-c", str(config), "--port", str(port),
                             "--data-dir", str(data_dir)], cwd=ROOT, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT)


def _wait_ready(proc: subprocess.Popen, port: int, timeout: float = 90.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"trimtab serve exited with {proc.returncode}:\n{proc.stdout.read().decode()[-3000:]}")
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=1) as r:
                if r.status == 200:
                    return
        except OSError:
            pass
        time.sleep(0.1)
    raise AssertionError("trimtab serve did not become ready")


async def _replay_into_serve(feed: Path, tmp_path: Path, batch: int) -> dict:
    """``replay_live`` of ``feed`` into a fresh ``trimtab serve`` subprocess (stopped afterwards)."""
    port = free_port()
    proc = _serve(GUARDED, tmp_path / "data", port)
    try:
        _wait_ready(proc, port)
        return await replay_live([feed], f"http://127.0.0.1:{port}", batch=batch, token=TOKEN)
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        proc.stdout.close()


async def test_live_replay_into_trimtab_serve_matches_the_offline_digest(tmp_path):
    """Must-show 2: a seeded feed with malformed lines, posted to a ``trimtab serve`` subprocess,
    leaves the service at the state_digest of the offline replay of the same file."""
    import service.http.app  # noqa: F401  (the service must exist: fail loudly, never skip)

    feed = tmp_path / "feed.ndjson.gz"
    write_ndjson(feed, 20_000, seed=21)
    live = await _replay_into_serve(feed, tmp_path, batch=700)
    offline = run_replay([feed], load_config(GUARDED))["summary"]
    print("live", live["acks"], live["latency_ms"], live["state_digest"][:16], "offline", offline["state_digest"][:16])
    assert live["acks"]["accepted"] == offline["events"] == 20_000
    assert live["acks"]["rejected"] == offline["rejected"] > 0
    assert live["state_digest"] == offline["state_digest"]


async def test_client_waits_for_retry_after_and_resends_the_same_body(aiohttp_server, tmp_path):
    """Two 429 answers with ``Retry-After: 1`` are waited out; the body is resent unchanged and in order."""
    bodies, refusals = [], [2]

    async def events(request: web.Request) -> web.Response:
        body = await request.read()
        if refusals[0] > 0:
            refusals[0] -= 1
            return web.json_response({"error": {"code": "overloaded", "message": "full", "where": "queue"}},
                                     status=429, headers={"Retry-After": "1"})
        bodies.append(body)
        n = body.count(b"\n")
        return web.json_response({"accepted": n, "duplicates": [], "rejected": [], "seq": [1, n]})

    async def model(request: web.Request) -> web.Response:
        return web.json_response({"state_digest": "d" * 64, "serving": "averaged"})

    app = web.Application()
    app.router.add_post("/v1/events", events)
    app.router.add_get("/v1/model", model)
    server = await aiohttp_server(app)
    feed = tmp_path / "f.ndjson"
    feed.write_bytes(b"".join(orjson.dumps({"id": f"e{k}", "features": {}, "target": 1.0}) + b"\n" for k in range(25)))
    start = time.monotonic()
    out = await replay_live([feed], str(server.make_url("/")), batch=10)
    assert time.monotonic() - start >= 2.0
    assert out["acks"]["retries"] == 2 and out["acks"]["accepted"] == 25 and out["acks"]["requests"] == 3
    assert b"".join(bodies) == feed.read_bytes()
    assert out["state_digest"] == "d" * 64


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
async def test_live_replay_of_csv_and_parquet_matches_the_offline_digest(tmp_path, fmt):
    """``--to`` reads every format an offline replay reads: the same CSV or Parquet feed, posted to a
    real ``trimtab serve``, ends at the offline replay's state_digest (the service's numeric columns
    come from its own model card, as the offline CSV reader takes them from the config)."""
    from service.replay.scenario import write_csv

    source = tmp_path / "feed.csv"
    write_csv(source, 6_000, seed=23)
    feed = source
    if fmt == "parquet":
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        feed = tmp_path / "feed.parquet"
        pq.write_table(pacsv.read_csv(source), feed)
    live = await _replay_into_serve(feed, tmp_path, batch=500)
    offline = run_replay([feed], load_config(GUARDED))["summary"]
    assert live["acks"]["accepted"] == offline["events"] > 5_000
    assert live["acks"]["rejected"] + live["acks"]["skipped_malformed"] == offline["rejected"]
    assert live["state_digest"] == offline["state_digest"]


async def test_speed_paces_by_event_timestamps(aiohttp_server, tmp_path):
    """``--speed X`` sends each event when ``(ts - first ts) / X`` seconds have passed, never earlier,
    and events due at the same moment share a body."""
    arrivals: list[tuple[float, list[float]]] = []

    async def events(request: web.Request) -> web.Response:
        body = await request.read()
        stamps = [orjson.loads(line)["ts"] for line in body.splitlines() if line]
        arrivals.append((time.monotonic(), stamps))
        return web.json_response({"accepted": len(stamps), "duplicates": [], "rejected": [], "seq": [1, 1]})

    async def model(request: web.Request) -> web.Response:
        return web.json_response({"state_digest": "d" * 64, "serving": "averaged", "config": {}})

    app = web.Application()
    app.router.add_post("/v1/events", events)
    app.router.add_get("/v1/model", model)
    server = await aiohttp_server(app)
    t0 = 1_772_439_300.0
    stamps = [t0, t0, t0, t0 + 0.8, t0 + 0.8, t0 + 1.6, t0 + 2.4]
    feed = tmp_path / "paced.ndjson"
    feed.write_bytes(b"".join(orjson.dumps({"id": f"e{k}", "ts": ts, "features": {}, "target": 1.0}) + b"\n"
                              for k, ts in enumerate(stamps)))
    start = time.monotonic()
    out = await replay_live([feed], str(server.make_url("/")), speed=2.0, batch=1000)
    assert out["acks"]["accepted"] == len(stamps)
    assert [group for _, group in arrivals] == [stamps[:3], stamps[3:5], stamps[5:6], stamps[6:]]
    for arrived, group in arrivals:
        due = (group[0] - t0) / 2.0
        assert arrived - start >= due - 0.01, (arrived - start, due)
    assert arrivals[-1][0] - start < 1.2 + 2.0  # the last event is due at 1.2 s; generous for a loaded machine
