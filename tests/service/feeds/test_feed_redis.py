"""The Redis stream feed against a real ``redis-server`` started by the tests on a loopback port.

Checks: entries are journaled, learned and acknowledged (the consumer group's pending list empties);
entries delivered before a crash but never acknowledged are re-read at start and learned exactly
once (the journal deduplicates by id); a retried entry with a known id is not learned twice; an
invalid entry is acknowledged and lands in the dead-letter stream with where and why.
"""

from __future__ import annotations

import asyncio
import os
import shutil
import subprocess
import time

import orjson
import pytest

from service.http.app import create_app
from service.config import config_from_dict
from service.engine import Engine
from service.events import EventValidator

from tests.service.servicekit import AUTH, FEATURES, TOKEN, demo_events, free_port, wait_ready

redis = pytest.importorskip("redis")

# .ci/run installs redis-server; without it this must fail loudly in CI, not be skipped in silence
pytestmark = [pytest.mark.asyncio,
              pytest.mark.skipif(shutil.which("redis-server") is None and not os.environ.get("CI"),
                                 reason="redis-server is not installed (.ci/run installs it)")]


@pytest.fixture
def redis_url(tmp_path):
    port = free_port()
    proc = subprocess.Popen(["redis-server", "--port", str(port), "--bind", "127.0.0.1", "--save", "",
                             "--appendonly", "no", "--dir", str(tmp_path)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    client = redis.Redis(host="127.0.0.1", port=port)
    deadline = time.monotonic() + 10
    while True:
        try:
            client.ping()
            break
        except redis.ConnectionError:
            if time.monotonic() > deadline:
                proc.kill()
                raise
            time.sleep(0.05)
    yield f"redis://127.0.0.1:{port}/0"
    client.close()
    proc.terminate()
    proc.wait(10)


def _config(tmp_path, url):
    return config_from_dict({
        "name": "feed-test", "features": FEATURES, "monitor": {"check_every": 100, "window": 500},
        "service": {"host": "127.0.0.1", "port": 0, "data_dir": str(tmp_path / "data"),
                    "token_env": "TRIMTAB_TEST_TOKEN"},
        "feed": {"source": url, "stream": "coldchain.events", "group": "trimtab", "consumer": "learner-1",
                 "batch": 64, "block_ms": 100},
    })


async def _until(pred, timeout=30.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if await pred():
            return True
        await asyncio.sleep(0.05)
    return False


async def test_stream_entries_learned_once_and_acknowledged(aiohttp_client, tmp_path, redis_url):
    cfg = _config(tmp_path, redis_url)
    r = redis.asyncio.from_url(redis_url)
    events = demo_events(600, tag="s")
    # 200 entries are delivered to our consumer before the service starts and never acknowledged:
    # what a crash between delivery and acknowledgement leaves behind
    await r.xgroup_create("coldchain.events", "trimtab", id="0", mkstream=True)
    for e in events[:200]:
        await r.xadd("coldchain.events", {"event": orjson.dumps(e)})
    got = await r.xreadgroup("trimtab", "learner-1", {"coldchain.events": ">"}, count=500)
    assert len(got[0][1]) == 200
    for e in events[200:400]:
        await r.xadd("coldchain.events", {"event": orjson.dumps(e)})
    # a producer retry (same id twice) and an invalid entry
    await r.xadd("coldchain.events", {"event": orjson.dumps(events[10])})
    await r.xadd("coldchain.events", {"event": b'{"id": "bad-1", "features": {"ambient_c": "warm"}, "target": 1}'})
    # ids outside the grammar (a control character, 258 bytes of UTF-8 in 129 characters)
    for ident in ("bad-\x00-2", "\u00e9" * 129):
        await r.xadd("coldchain.events", {"event": orjson.dumps({**events[0], "id": ident})})

    client = await aiohttp_client(create_app(cfg, data_dir=str(tmp_path / "data"), token=TOKEN), headers=AUTH)
    await wait_ready(client)

    async def learned_all():
        card = await (await client.get("/v1/model")).json()
        return card["counters"]["events"] >= 400

    assert await _until(learned_all), "the feed did not deliver the first 400 events"
    for e in events[400:]:
        await r.xadd("coldchain.events", {"event": orjson.dumps(e)})

    async def done():
        card = await (await client.get("/v1/model")).json()
        pending = await r.xpending("coldchain.events", "trimtab")
        return card["counters"]["events"] >= 600 and pending["pending"] == 0

    assert await _until(done), "entries left pending or unlearned"
    card = await (await client.get("/v1/model")).json()
    assert card["counters"]["events"] == 600  # the retried id was not learned twice

    # the same 600 events in stream order through an in-process engine give the same model
    reference = Engine(cfg)
    v = EventValidator(cfg)
    reference.apply_events([v.validate(e) for e in events])
    assert card["state_digest"] == reference.state_digest

    dead = await r.xrange("coldchain.events.rejected")
    assert len(dead) == 3
    fields = dead[0][1]
    assert fields[b"where"].endswith(b".features.ambient_c")
    assert b"expected a number" in fields[b"reason"]
    assert [f[b"where"].endswith(b".id") for _, f in dead[1:]] == [True, True]
    assert b"control character U+0000" in dead[1][1][b"reason"] and b"258 bytes" in dead[2][1][b"reason"]
    await r.aclose()
