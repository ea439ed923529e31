"""Round trip through a real server on a loopback port and a real SQLite file (must-show 1).

The outside references: the journal is read back with the standard library's ``sqlite3`` module,
the served scores and digest are compared with an uninterrupted in-process :class:`Engine` run over
the same events (the service must learn exactly what it acknowledged, no more, no less).
"""

from __future__ import annotations

import asyncio
import hashlib
import io
import sqlite3

import orjson
import pytest

from service.http.app import create_app
from service.engine import Engine
from service.events import EventValidator
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready

pytestmark = pytest.mark.asyncio

PROBE = {"ambient_c": 9.5, "compressor_duty": 0.6, "door_open_s": 40, "load_kg": 500, "van": "V03", "route": "urban"}
NDJSON = {"Content-Type": "application/x-ndjson"}


def reference(config, events: list[dict]) -> Engine:
    """The uninterrupted in-process run over ``events`` in order."""
    v = EventValidator(config)
    engine = Engine(config)
    engine.apply_events([v.validate(e) for e in events])
    return engine


async def started(aiohttp_client, config):
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    return client


async def test_json_ndjson_score_card_read_your_writes(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path)
    client = await started(aiohttp_client, cfg)
    events = demo_events(1250)

    r = await client.post("/v1/events", json=events[:600])
    body = await r.json()
    assert r.status == 200, body
    assert (body["accepted"], body["duplicates"], body["rejected"], body["seq"]) == (600, [], [], [1, 600])

    nd = b"\n".join(orjson.dumps(e) for e in events[600:1200])
    r = await client.post("/v1/events", data=nd, headers=NDJSON)
    body = await r.json()
    assert (r.status, body["accepted"], body["seq"]) == (200, 600, [601, 1200])

    ref = reference(cfg, events[:1200])
    r = await client.post("/v1/score", json={"features": PROBE})
    got = await r.json()
    assert r.status == 200
    want, iterate = ref.score([PROBE])
    assert got["score"] == float(want[0]) and got["iterate"] == iterate
    assert got["version"]["seq"] == 1200 and got["version"]["updates"] == ref.model.n_updates

    card = await (await client.get("/v1/model")).json()
    assert card["state_digest"] == ref.state_digest
    assert card["updates"] == ref.model.n_updates and card["counters"]["events"] == 1200
    assert set(card["coefficients"]["averaged"]["numeric"]) == set(cfg.features.numeric)
    assert card["certificate"] == orjson.loads(orjson.dumps(ref.model.certificate()))
    assert "licensed practice" in card["caution"]  # the card says what scores are not good for
    assert card["baseline_loss"] == orjson.loads(orjson.dumps(ref.baseline_loss))  # the same baseline live
    assert card["warnings"] == ref.warnings

    # read-your-writes: once the learn is acknowledged, the very next score reflects it
    r = await client.post("/v1/events", json=events[1200:])
    assert (await r.json())["accepted"] == 50
    after = await (await client.post("/v1/score", json={"features": PROBE})).json()
    ref.apply_events([EventValidator(cfg).validate(e) for e in events[1200:]])
    assert after["score"] == float(ref.score([PROBE])[0][0]) != got["score"]
    assert after["version"]["seq"] == 1250

    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    rows = db.execute("SELECT seq, id, kind, payload FROM journal ORDER BY seq").fetchall()
    # JSON bodies: one row per event; the NDJSON body: one row of its lines, at its last position
    assert [r[0] for r in rows] == list(range(1, 601)) + [1200] + list(range(1201, 1251))
    per_event = rows[:600] + rows[601:]
    assert [r[1] for r in per_event] == [e["id"] for e in events[:600] + events[1200:]]
    v = EventValidator(cfg)
    for (_, _, kind, payload), e in zip(per_event, events[:600] + events[1200:]):
        assert kind == 0 and orjson.loads(payload) == list(v.validate(e))
    _, ident, kind, payload = rows[600]
    assert (ident, kind) == (None, 3) and payload == nd + b"\n"  # the body's lines, as sent
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == "4"
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


async def test_retried_events_are_applied_once(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path)
    client = await started(aiohttp_client, cfg)
    events = demo_events(400)
    first = await (await client.post("/v1/events", json=events[:300])).json()
    digest = (await (await client.get("/v1/model")).json())["state_digest"]
    again = await (await client.post("/v1/events", json=events[:300])).json()
    assert first["accepted"] == 300 and again["accepted"] == 0 and again["duplicates"] == list(range(300))
    assert (await (await client.get("/v1/model")).json())["state_digest"] == digest
    # a batch mixing old and new ids, and one id twice: each new id once
    mixed = events[250:400] + [events[399]]
    got = await (await client.post("/v1/events", json=mixed)).json()
    assert got["accepted"] == 100 and got["duplicates"] == list(range(50)) + [150]
    card = await (await client.get("/v1/model")).json()
    assert card["state_digest"] == reference(cfg, events).state_digest


async def test_rejected_items_are_reported_and_the_rest_learned(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path)
    client = await started(aiohttp_client, cfg)
    events = demo_events(300)
    batch = [dict(e) for e in events]
    batch[5] = {**batch[5], "target": "4.2"}
    batch[9] = {**batch[9], "features": {**batch[9]["features"], "ambient_c": "NaN"}}
    batch[11] = {"id": "x", "features": {}, "target": 1.0, "colour": "red"}
    r = await client.post("/v1/events", json=batch)
    body = await r.json()
    assert r.status == 200 and body["accepted"] == 297
    assert body["rejected"] == [
        {"where": "events[5].target", "reason": "expected a number, got a string"},
        {"where": "events[9].features.ambient_c", "reason": "expected a number, got a string"},
        {"where": "events[11].colour", "reason": "unknown key (valid keys: features, id, target, ts)"}]
    kept = [e for k, e in enumerate(events) if k not in (5, 9, 11)]
    card = await (await client.get("/v1/model")).json()
    assert card["state_digest"] == reference(cfg, kept).state_digest
    assert card["counters"]["rejected"] == 3

    lines = [orjson.dumps(e) for e in demo_events(20, tag="n")]
    lines[3] = b'{"id": "n3", "features": {"ambient_c": NaN}, "target": 1.0}'
    lines[7] = b"\xff\xfe not utf-8"
    r = await client.post("/v1/events", data=b"\n".join(lines), headers=NDJSON)
    body = await r.json()
    assert body["accepted"] == 18
    assert [x["where"] for x in body["rejected"]] == ["line 4", "line 8"]
    assert body["rejected"][1]["reason"] == "not valid JSON: invalid UTF-8 at byte offset 0 of the line"

    r = await client.post("/v1/events", json=[{"features": {}, "target": 2.0}])
    err = await r.json()
    assert r.status == 422 and err["error"]["where"] == "events[0].id"
    assert err["error"]["rejected"][0]["reason"].startswith("required for an event with a target")


async def test_limits_and_content_types(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, max_body_bytes=64 * 1024, max_batch=100)
    client = await started(aiohttp_client, cfg)
    r = await client.post("/v1/events", json=demo_events(101))
    err = (await r.json())["error"]
    assert r.status == 413 and "101 events" in err["message"] and "100-item limit" in err["message"]
    r = await client.post("/v1/events", data=b"x" * (65 * 1024), headers=NDJSON)
    err = (await r.json())["error"]
    assert r.status == 413 and "65536-byte limit" in err["message"] and err["where"] == "body"
    r = await client.post("/v1/events", data=b"[]", headers={"Content-Type": "text/plain"})
    assert r.status == 415 and (await r.json())["error"]["where"] == "Content-Type"
    r = await client.get("/v1/events")
    assert r.status == 405 and (await r.json())["error"]["code"] == "method_not_allowed"
    r = await client.post("/v1/score", json={"features": PROBE, "events": []})
    assert r.status == 422 and "exactly one" in (await r.json())["error"]["message"]


async def test_operator_routes_rollback_checkpoint_incidents(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, checkpoint_every=100_000)
    client = await started(aiohttp_client, cfg)
    events = demo_events(500)
    await client.post("/v1/events", json=events)
    r = await client.post("/v1/model/rollback", json={"reason": "test: operator rollback"})
    body = await r.json()
    assert r.status == 200 and body["rolled_back"] and body["applied_seq"] == 501
    ref = reference(cfg, events)
    ref.rollback("test: operator rollback")
    assert body["state_digest"] == ref.state_digest
    incidents = (await (await client.get("/v1/incidents")).json())["incidents"]
    assert any(i["kind"] == "rollback" and i["reason"] == "test: operator rollback" for i in incidents)

    ck = await (await client.post("/v1/checkpoints")).json()
    listed = (await (await client.get("/v1/checkpoints")).json())["checkpoints"]
    assert listed[0]["id"] == ck["id"] and ck["seq"] == 501 and ck["state_digest"] == ref.state_digest
    blob = sqlite3.connect(tmp_path / "trimtab.sqlite").execute(
        "SELECT blob FROM checkpoints WHERE id = ?", (ck["id"],)).fetchone()[0]
    assert hashlib.sha256(blob).hexdigest() == ck["digest"]
    assert Engine.from_bytes(cfg, blob).state_digest == ref.state_digest


async def test_scoring_answers_while_a_big_ingest_runs(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path)
    client = await started(aiohttp_client, cfg)
    await client.post("/v1/events", json=demo_events(300, tag="w"))
    body = b"\n".join(orjson.dumps(e) for e in demo_events(20_000))
    ingest = asyncio.ensure_future(client.post("/v1/events", data=io.BytesIO(body), headers=NDJSON))
    answered_during = 0
    latencies = []
    while not ingest.done():
        t = asyncio.get_running_loop().time()
        r = await client.post("/v1/score", json={"features": PROBE})
        assert r.status == 200
        latencies.append(asyncio.get_running_loop().time() - t)
        if not ingest.done():
            answered_during += 1
    assert (await (await ingest).json())["accepted"] == 20_000
    # scores were answered throughout the ingest, not queued behind it
    assert answered_during >= 20, answered_during
    latencies.sort()
    assert latencies[len(latencies) // 2] < 0.05, latencies[len(latencies) // 2]
