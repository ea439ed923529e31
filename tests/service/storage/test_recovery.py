"""Crash recovery is exact (must-show 2), corrupt checkpoints are skipped, readiness waits for recovery.

The reference for exactness is outside the service: an uninterrupted in-process :class:`Engine` run
over the acknowledged events, in the order the journal (read with the standard library's
``sqlite3``) holds them. Equal ``state_digest`` values mean bit-identical models.
"""

from __future__ import annotations

import asyncio
import random
import re
import sqlite3
import threading
import time
import urllib.error
import urllib.request

import orjson
import pytest

from service.http.app import create_app
from service.engine import Engine
from service.events import EventValidator
from service.ingest import encode_event
from service.storage.journal import Journal
from service.storage.seen import id_key
from tests.service.servicekit import AUTH, TOKEN, ServeProcess, demo_events, journal_positions, make_config, toml_text, wait_ready


def _post(url: str, events: list[dict], ndjson: bool) -> dict:
    body = b"\n".join(orjson.dumps(e) for e in events) if ndjson else orjson.dumps(events)
    ctype = "application/x-ndjson" if ndjson else "application/json"
    req = urllib.request.Request(url + "/v1/events", data=body, headers={"Content-Type": ctype, **AUTH})
    with urllib.request.urlopen(req, timeout=60) as r:
        return orjson.loads(r.read())


def _get(url: str, path: str) -> dict:
    with urllib.request.urlopen(url + path, timeout=30) as r:
        return orjson.loads(r.read())


def reference_digest(config, events: list[dict]) -> str:
    v = EventValidator(config)
    engine = Engine(config)
    engine.apply_events([v.validate(e) for e in events])
    return engine.state_digest


@pytest.mark.slow
def test_sigkill_at_random_moments_loses_and_repeats_nothing(tmp_path):
    """A ``trimtab serve`` subprocess gets a seeded feed in batches and is SIGKILLed at 6 random
    moments (some while a batch is in flight); the producer retries unacknowledged batches."""
    rng = random.Random(20261201)
    cfg = make_config(tmp_path / "data", checkpoint_every=700, checkpoint_min_interval_s=0.0, checkpoints_kept=2, prune_journal=False)
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(cfg))
    events = demo_events(4200, tag="k")
    batches = [events[i:i + 300] for i in range(0, len(events), 300)]
    # six kills: three while a batch is in flight (after a random delay), three right after an ack
    plan = dict(zip(sorted(rng.sample(range(1, len(batches) - 1), 6)), ["mid", "after", "mid", "mid", "after", "mid"]))
    acked: set[str] = set()
    mid_kills = kills = 0
    recoveries = []
    k = 0
    while True:
        server = ServeProcess(conf)
        server.wait_ready()
        while k < len(batches):
            batch, ndjson = batches[k], k % 2 == 1
            mode = plan.pop(k, None)
            if mode == "mid":
                result: dict = {}
                t = threading.Thread(target=_safe_post, args=(server.url, batch, ndjson, result))
                t.start()
                time.sleep(rng.uniform(0.0, 0.02))
                server.kill()
                t.join()
                if "answer" in result:
                    acked.update(e["id"] for e in batch)
                    k += 1
                else:
                    mid_kills += 1
                kills += 1
                break
            got = _post(server.url, batch, ndjson)
            assert got["accepted"] + len(got["duplicates"]) == len(batch) and not got["rejected"]
            acked.update(e["id"] for e in batch)
            k += 1
            if mode == "after":
                server.kill()
                kills += 1
                break
        recoveries.append("".join(server.log))
        if k == len(batches) and server.proc.poll() is None:
            live_digest = _get(server.url, "/v1/model")["state_digest"]
            assert server.stop() == 0
            recoveries[-1] = "".join(server.log)
            break
    assert kills == 6 and mid_kills >= 1, (kills, mid_kills)
    assert acked == {e["id"] for e in events}

    db = sqlite3.connect(tmp_path / "data" / "trimtab.sqlite")
    ids = [c[0] if kind == 0 else c["id"] for _, kind, c in journal_positions(db) if kind in (0, 3)]
    assert len(ids) == len(set(ids)) == len(acked) and set(ids) == acked
    by_id = {e["id"]: e for e in events}
    want = reference_digest(cfg, [by_id[i] for i in ids])
    assert live_digest == want

    # at least one restart loaded a checkpoint and then re-applied journal rows after it
    found = [tuple(map(int, m)) for log in recoveries
             for m in re.findall(r"checkpoint at position (\d+), (\d+) journal rows re-applied", log)]
    assert any(pos > 0 and n > 0 for pos, n in found), found
    # the clean stop wrote a final checkpoint: a restart re-applies nothing and serves the same state
    server = ServeProcess(conf)
    server.wait_ready()
    try:
        assert _get(server.url, "/v1/model")["state_digest"] == want
        assert _get(server.url, "/readyz")["recovery"]["replayed"] == 0
    finally:
        assert server.stop() == 0


def _safe_post(url, batch, ndjson, result: dict) -> None:
    """Post from a thread; a request cut off by the kill leaves ``result`` empty."""
    try:
        result["answer"] = _post(url, batch, ndjson)
    except (urllib.error.URLError, ConnectionError, OSError):
        pass


@pytest.mark.asyncio
async def test_corrupt_and_truncated_checkpoints_fall_back_with_incidents(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, checkpoint_every=250, checkpoint_min_interval_s=0.0, checkpoints_kept=3)
    events = demo_events(1000)
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    for i in range(0, 1000, 100):
        assert (await (await client.post("/v1/events", json=events[i:i + 100])).json())["accepted"] == 100
    await client.close()  # clean stop: final checkpoint at 1000

    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    cps = db.execute("SELECT id, seq, length(blob) FROM checkpoints ORDER BY id DESC").fetchall()
    # written between requests once 250 events have been applied since the last one: 300, 600, 900,
    # and the final one at the clean stop; three are kept and the journal is pruned behind the oldest
    assert [c[1] for c in cps] == [1000, 900, 600]
    assert db.execute("SELECT min(seq) FROM journal").fetchone()[0] == 601
    newest = bytearray(db.execute("SELECT blob FROM checkpoints WHERE id = ?", (cps[0][0],)).fetchone()[0])
    newest[len(newest) // 3] ^= 0x01  # one flipped bit
    db.execute("UPDATE checkpoints SET blob = ? WHERE id = ?", (bytes(newest), cps[0][0]))
    db.execute("UPDATE checkpoints SET blob = substr(blob, 1, ?) WHERE id = ?", (cps[1][2] // 2, cps[1][0]))
    db.commit()
    db.close()

    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    ready = await (await client.get("/readyz")).json()
    assert ready["recovery"]["checkpoint"] == 600 and ready["recovery"]["replayed"] == 400
    card = await (await client.get("/v1/model")).json()
    assert card["state_digest"] == reference_digest(cfg, events)
    incidents = (await (await client.get("/v1/incidents")).json())["incidents"]
    bad = [i for i in incidents if i["kind"] == "corrupt_checkpoint"]
    assert [i["evidence"]["seq"] for i in bad] == [1000, 900]
    assert all("SHA-256 digest does not match" in i["reason"] for i in bad)


@pytest.mark.asyncio
async def test_periodic_checkpoints_wait_for_the_minimum_interval(aiohttp_client, tmp_path):
    """``checkpoint_every`` counts journal positions, ``checkpoint_min_interval_s`` holds the next periodic
    checkpoint back in time: ten requests of 100 events past a 100-event period give one checkpoint
    under a 600 s floor (the first period), ten without one; the model is the same either way."""
    events = demo_events(1000)
    counts = {}
    for floor in (600.0, 0.0):
        data = tmp_path / f"floor-{floor:g}"
        cfg = make_config(data, checkpoint_every=100, checkpoint_min_interval_s=floor, checkpoints_kept=20)
        client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
        await wait_ready(client)
        for i in range(0, 1000, 100):
            assert (await (await client.post("/v1/events", json=events[i:i + 100])).json())["accepted"] == 100
        for _ in range(200):  # a periodic checkpoint is written after its item is answered
            listed = (await (await client.get("/v1/checkpoints")).json())["checkpoints"]
            if floor or len(listed) == 10:
                break
            await asyncio.sleep(0.05)
        counts[floor] = sorted(c["seq"] for c in listed)
        assert (await (await client.get("/v1/model")).json())["state_digest"] == reference_digest(cfg, events)
        await client.close()
    assert counts[600.0] == [100]
    assert counts[0.0] == [100 * k for k in range(1, 11)]


@pytest.mark.asyncio
async def test_check_records_are_stored_once_beside_the_checkpoints(aiohttp_client, tmp_path):
    """A service checkpoint leaves its trace section empty: each check record (the live page's series)
    is stored once, beside the checkpoint that follows it, so checkpoints do not grow with the trace.
    After a clean stop, and after a crash that leaves events to re-apply from the journal, the
    restarted engine holds the same records as an uninterrupted engine over the same events."""
    from service.http.app import SERVICE

    cfg = make_config(tmp_path, checkpoint_every=300, checkpoint_min_interval_s=0.0, checkpoints_kept=2)
    events = demo_events(6000, tag="tr")
    app = create_app(cfg, token=TOKEN)
    client = await aiohttp_client(app, headers=AUTH)
    await wait_ready(client)
    for i in range(0, 6000, 300):
        assert (await (await client.post("/v1/events", json=events[i:i + 300])).json())["accepted"] == 300
    before = list(app[SERVICE].ingestor.engine.trace)
    await client.close()

    reference = Engine(cfg)
    reference.apply_events([EventValidator(cfg).validate(e) for e in events])
    assert len(before) > 50 and _same_records(before, list(reference.trace))
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    sizes = [n for (n,) in db.execute("SELECT length(blob) FROM checkpoints")]
    assert len(sizes) == 2 and max(sizes) < len(reference.to_bytes()) - 20 * len(before)  # no records inside
    assert db.execute("SELECT count(*) FROM checks").fetchone()[0] == len(before)
    db.execute("DELETE FROM checkpoints WHERE seq = (SELECT max(seq) FROM checkpoints)")  # as if it never came
    db.commit()
    db.close()

    app = create_app(cfg, token=TOKEN)
    client = await aiohttp_client(app, headers=AUTH)
    await wait_ready(client)
    assert (await (await client.get("/readyz")).json())["recovery"]["replayed"] > 0
    after = list(app[SERVICE].ingestor.engine.trace)
    assert after[:len(before) - 3] == before[:len(before) - 3]  # stored: the very records
    assert _same_records(after, before)  # the last ones made again by the journal's re-application
    await client.close()


def _same_records(a: list[dict], b: list[dict]) -> bool:
    """The same checks, actions and figures; sums over a segment (the progressive losses) may differ in
    their last bits when the events were applied in other slices."""
    return len(a) == len(b) and all(
        x.keys() == y.keys() and all(x[k] == pytest.approx(y[k], rel=1e-12, nan_ok=True)
                                     if isinstance(x[k], float) else x[k] == y[k] for k in x)
        for x, y in zip(a, b))


@pytest.mark.asyncio
async def test_readyz_is_503_until_the_journal_is_replayed(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, checkpoint_every=10**9)
    v = EventValidator(cfg)
    events = [v.validate(e) for e in demo_events(40_000)]
    j = Journal(tmp_path)
    from service.storage.journal import fingerprint

    j.claim(fingerprint(cfg))
    j.append([(1, [e.id for e in events], [encode_event(e) for e in events])],
             [(id_key(e.id), k + 1) for k, e in enumerate(events)])
    j.close()
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    first = await client.get("/readyz")
    err = (await first.json())["error"]
    assert first.status == 503 and err["code"] == "not_ready" and err["where"] == "startup"
    r = await client.post("/v1/score", json={"features": {"ambient_c": 1.0}})
    assert r.status == 503
    await wait_ready(client)
    ref = Engine(cfg)
    ref.apply_events(events)
    assert (await (await client.get("/v1/model")).json())["state_digest"] == ref.state_digest
