"""Overload (must-show 4): a burst at many times the queue's capacity gets 429 with Retry-After, the
queue (and so memory) stays within ``service.queue_limit``, scoring keeps answering, and every
accepted event is journaled once and applied.

Status and header follow RFC 6585 ("Additional HTTP Status Codes", Nottingham and Fielding, 2012,
section 4: 429 Too Many Requests, which may carry Retry-After). The applied state is checked
against an uninterrupted in-process :class:`Engine` over the journal's events.
"""

from __future__ import annotations

import asyncio
import io
import sqlite3

import orjson
import psutil
import pytest

from service.http.app import SERVICE, create_app
from service.engine import Engine
from service.events import Event, EventValidator
from tests.service.servicekit import AUTH, TOKEN, demo_events, journal_positions, make_config, wait_ready

pytestmark = pytest.mark.asyncio
PROBE = {"ambient_c": 7.0, "door_open_s": 10, "van": "V02"}


async def test_burst_gets_429_and_nothing_accepted_is_lost(aiohttp_client, tmp_path):
    limit = 1500
    cfg = make_config(tmp_path, queue_limit=limit, chunk_events=500, apply_slice=128, checkpoint_every=5000, checkpoint_min_interval_s=0.0)
    app = create_app(cfg, token=TOKEN)
    client = await aiohttp_client(app, headers=AUTH)
    await wait_ready(client)
    ing = app[SERVICE].ingestor
    await client.post("/v1/events", json=demo_events(300, tag="warm"))

    bodies = [b"\n".join(orjson.dumps(e) for e in demo_events(500, tag=f"b{k}-")) for k in range(80)]
    rss_before = psutil.Process().memory_info().rss
    peak = {"queued": 0, "rss": rss_before}
    stop = asyncio.Event()

    async def sample():
        while not stop.is_set():
            peak["queued"] = max(peak["queued"], ing.queued_events)
            peak["rss"] = max(peak["rss"], psutil.Process().memory_info().rss)
            await asyncio.sleep(0.002)

    scores = []

    async def score():
        while not stop.is_set():
            r = await client.post("/v1/score", json={"features": PROBE})
            scores.append(r.status)

    async def post(body):
        r = await client.post("/v1/events", data=io.BytesIO(body), headers={"Content-Type": "application/x-ndjson"})
        return r.status, r.headers.get("Retry-After"), await r.json()

    watchers = [asyncio.ensure_future(sample()), asyncio.ensure_future(score())]
    results = await asyncio.gather(*(post(b) for b in bodies))
    stop.set()
    await asyncio.gather(*watchers)

    ok = [r for r in results if r[0] == 200]
    refused = [r for r in results if r[0] == 429]
    assert len(ok) + len(refused) == len(bodies)
    assert len(refused) >= 10 and len(ok) >= 3, (len(ok), len(refused))
    for _, retry, body in refused:
        assert int(retry) >= 1
        assert body["error"]["code"] == "overloaded" and body["error"]["where"] == "queue"
        assert "service.queue_limit" in body["error"]["message"]
    assert 0 < peak["queued"] <= limit
    # the queue bound keeps memory bounded: the whole burst is 40,000 events (~15 MB as text)
    assert peak["rss"] - rss_before < 150 * 2**20, peak["rss"] - rss_before
    # scoring kept answering during the burst (client and server share this test's event loop)
    assert set(scores) == {200} and len(scores) >= 3, scores

    accepted = 300 + sum(r[2]["accepted"] for r in ok)
    assert ing.queued_events == 0 and ing.engine.events == accepted
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    v = EventValidator(cfg)
    journaled = [Event(*c) if kind == 0 else v.validate(c) for _, kind, c in journal_positions(db) if kind in (0, 3)]
    assert len(journaled) == accepted
    ref = Engine(cfg)
    ref.apply_events(journaled)
    card = await (await client.get("/v1/model")).json()
    assert card["state_digest"] == ref.state_digest

    # the refused bodies go through once the burst is over (the producer's retry)
    for status, _, _ in refused[:3]:
        assert status == 429
    again = await post(bodies[[r[0] for r in results].index(429)])
    assert again[0] == 200 and again[2]["accepted"] == 500
