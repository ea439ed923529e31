"""Delayed labels (must-show 6): remembered at scoring, learned when the label arrives, refused as
expired after the TTL; the store is bounded and survives a restart.

The learning check is against an in-process :class:`Engine` fed the same events directly (a label
must turn into exactly the event the producer would have sent with its target attached).
"""

from __future__ import annotations

import asyncio
import sqlite3

import orjson
import pytest

from service.http.app import create_app
from service.engine import Engine
from service.events import EventValidator
from service.storage.labels import LabelStore
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready


class Clock:
    def __init__(self) -> None:
        self.now = 1_000.0

    def __call__(self) -> float:
        return self.now


def test_store_expires_bounds_and_persists(tmp_path):
    clock = Clock()
    store = LabelStore(tmp_path, ttl=10.0, limit=3, clock=clock)
    store.remember([("a", None, {"x": 1.0}), ("b", 5.0, {"x": 2.0})])
    clock.now += 6
    store.remember([("c", None, {"x": 3.0})])
    assert store.lookup("a")[0] == "ok" and store.lookup("zz") == ("unknown", None)
    clock.now += 5  # a and b are 11 s old: expired; c is 5 s old
    assert store.lookup("a")[0] == "expired" and store.lookup("c")[0] == "ok"
    assert store.counts() == {"live": 1, "expired": 2, "evicted": 0}
    # full: a new entry pushes out an expired one first, never a live one while expired ones remain
    store.remember([("d", None, {"x": 4.0})])
    assert len(store) == 3 and store.lookup("a")[0] == "unknown" and store.lookup("c")[0] == "ok"
    # the tombstone of b is dropped one more TTL after expiry
    clock.now += 9.5
    assert store.sweep() == 1 and store.lookup("b")[0] == "unknown"
    store.close()
    again = LabelStore(tmp_path, ttl=10.0, limit=3, clock=clock)
    state, item = again.lookup("d")
    assert state == "ok" and item.features == {"x": 4.0}
    again.remember([("e", None, {}), ("f", None, {}), ("g", None, {})])
    assert again.evicted == 1 and len(again) == 3  # d (live but oldest) had to go
    again.forget(["e"])
    assert again.lookup("e")[0] == "unknown"
    n = sqlite3.connect(tmp_path / "labels.sqlite").execute("SELECT count(*) FROM remembered").fetchone()[0]
    assert n == 2


@pytest.mark.asyncio
async def test_scored_and_remembered_events_learn_when_labelled(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, remember_ttl_s=1.0)
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    warm = demo_events(300, tag="w")
    await client.post("/v1/events", json=warm)
    later = demo_events(6, tag="s", start=300)
    r = await client.post("/v1/score", json={"events": [{k: e[k] for k in ("id", "ts", "features")}
                                                        for e in later[:4]], "remember": True})
    body = await r.json()
    assert r.status == 200 and body["remembered"] == 4 and len(body["scores"]) == 4
    single = later[4]
    r = await client.post("/v1/score", json={"id": single["id"], "features": single["features"], "remember": True})
    assert (await r.json())["remembered"] == 1
    r = await client.post("/v1/score", json={"features": single["features"], "remember": True})
    assert r.status == 422 and (await r.json())["error"]["where"] == "id"

    labels = [{"id": e["id"], "target": e["target"]} for e in later[:3]] + [{"id": "never-scored", "target": 1.0}]
    r = await client.post("/v1/labels", json=labels)
    got = await r.json()
    assert r.status == 200 and got["accepted"] == 3 and got["unknown"] == ["never-scored"]
    assert got["rejected"][0]["where"] == "labels[3].id"

    v = EventValidator(cfg)
    ref = Engine(cfg)
    ref.apply_events([v.validate(e) for e in warm + later[:3]])
    assert (await (await client.get("/v1/model")).json())["state_digest"] == ref.state_digest

    # a second label for an already learned id is a duplicate, not a second update
    r = await client.post("/v1/labels", json=[{"id": later[0]["id"], "target": 9.0}])
    again = await r.json()
    assert r.status == 200 and again["accepted"] == 0 and again["duplicates"] == [0]

    await asyncio.sleep(1.2)  # past remember_ttl_s
    r = await client.post("/v1/labels", json=[{"id": later[3]["id"], "target": later[3]["target"]},
                                              {"id": single["id"], "target": "high"}])
    err = await r.json()
    assert r.status == 422
    assert err["error"]["rejected"][0]["where"] == "labels[0].id"
    assert err["error"]["rejected"][0]["reason"].startswith("expired: scored")
    assert err["error"]["rejected"][1] == {"where": "labels[1].target", "reason": "expected a number, got a string"}
    assert (await (await client.get("/v1/model")).json())["state_digest"] == ref.state_digest

    rows = orjson.loads((await (await client.get("/v1/model")).read()))["journal"]["applied_seq"]
    assert rows == 303


@pytest.mark.asyncio
async def test_remembered_features_survive_a_restart(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path)
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    e = demo_events(1, tag="r")[0]
    await client.post("/v1/score", json={"id": e["id"], "features": e["features"], "remember": True})
    await client.close()
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    r = await client.post("/v1/labels", json=[{"id": e["id"], "target": e["target"]}])
    assert (await r.json())["accepted"] == 1
