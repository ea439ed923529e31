"""The Redis feed under the faults of a real deployment, against real ``redis-server`` and ``trimtab
serve`` processes.

- a consumer that died with entries delivered and never acknowledged: the next learner takes them over
  at start (``XAUTOCLAIM``), learns them once, and the pending list empties;
- a pending entry deleted from the stream, and one delivered more than ``feed.max_deliveries`` times,
  go to the dead-letter stream with their reason (one already journaled is only acknowledged);
- ``redis-server`` SIGKILLed and restarted mid-stream (append-only file on, fsync on every write);
- the learner (``trimtab serve`` consuming the stream) SIGKILLed mid-stream and started again.

The outside reference in each case is an offline replay (``trimtab replay``'s :func:`run_replay`,
no service, no Redis) of the events the stream holds at the end, in stream order: the live model's
``state_digest`` must equal it, so no entry was lost and none was learned twice.
"""

from __future__ import annotations

import threading
import time
import urllib.request

import orjson
import pytest

from service.config import FeedConfig
from service.replay.runner import run_replay
from tests.service.faults.faultkit import Client, write_config
from tests.service.faults.faultkit import start as start_serve
from tests.service.rediskit import REDIS_MISSING, RedisServer
from tests.service.servicekit import demo_events, toml_text

redis = pytest.importorskip("redis")

pytestmark = [REDIS_MISSING]

STREAM, GROUP = "coldchain.events", "trimtab"


def _feed_config(tmp_path, url: str, **feed):
    cfg, _ = write_config(tmp_path, tmp_path / "data")
    section = {"source": url, "stream": STREAM, "group": GROUP, "consumer": "learner-1", "batch": 100,
               "block_ms": 100, "reconnect_max_s": 0.5, **feed}
    cfg = cfg.model_copy(update={"feed": FeedConfig(**section)})
    path = tmp_path / "serve-feed.toml"
    path.write_text(toml_text(cfg))
    return cfg, path


def _offline_digest(tmp_path, cfg, client) -> tuple[str, int]:
    """Digest of an offline replay of the stream's events in stream order (duplicates included: the
    replay drops a repeated id as the service does), and the number of distinct ids."""
    lines = [fields[b"event"] for _, fields in client.xrange(STREAM)]
    feed = tmp_path / "stream-copy.ndjson"
    feed.write_bytes(b"\n".join(lines) + b"\n")
    summary = run_replay([feed], cfg)["summary"]
    return summary["state_digest"], len({orjson.loads(x)["id"] for x in lines})


class Producer(threading.Thread):
    """Adds ``events`` to the stream in pipelined batches, a little at a time, retrying a batch whose
    answer was lost (the retry may add entries twice: the learner must drop the repeated ids). The
    second half waits for :attr:`gate`, so the fault always falls in the middle of the stream."""

    def __init__(self, url: str, events: list[dict], batch: int = 25, pause_s: float = 0.02) -> None:
        super().__init__(daemon=True)
        #: the first half is sent at once; the second waits for this (set when the fault is made)
        self.gate = threading.Event()
        self.client = redis.Redis.from_url(url, socket_timeout=5)
        self.events, self.batch, self.pause_s = events, batch, pause_s
        self.retries = self.sent = 0
        self.failed: BaseException | None = None

    def run(self) -> None:
        try:
            for k in range(0, len(self.events), self.batch):
                if k >= len(self.events) // 2:
                    self.gate.wait(120)
                deadline = time.monotonic() + 60
                while True:
                    try:
                        pipe = self.client.pipeline(transaction=False)
                        for e in self.events[k:k + self.batch]:
                            pipe.xadd(STREAM, {"event": orjson.dumps(e)})
                        pipe.execute()
                        self.sent = k + self.batch
                        break
                    except (redis.ConnectionError, redis.TimeoutError, redis.BusyLoadingError):
                        self.retries += 1
                        if time.monotonic() > deadline:
                            raise
                        time.sleep(0.1)
                time.sleep(self.pause_s)
        except BaseException as exc:  # reported by the test, not lost in the thread
            self.failed = exc


def _learned(server) -> int:
    return Client(server.url).card()["counters"]["events"]


def _until(pred, timeout: float = 120.0, what: str = "") -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if pred():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def _finish(tmp_path, cfg, server, producer: Producer, client) -> dict:
    """Wait for the producer and for the learner to catch up; compare with the offline replay."""
    producer.join(120)
    assert producer.failed is None, producer.failed
    digest, distinct = _offline_digest(tmp_path, cfg, client)
    _until(lambda: _learned(server) >= distinct and client.xpending(STREAM, GROUP)["pending"] == 0, what="catch-up")
    card = Client(server.url).card()
    assert card["counters"]["events"] == distinct
    assert card["state_digest"] == digest
    assert client.xpending(STREAM, GROUP)["pending"] == 0
    with urllib.request.urlopen(server.url + "/readyz", timeout=10) as r:
        return orjson.loads(r.read())["feed"]


def _mid_stream(tmp_path, url: str, tag: str, fault: str):
    """A served learner on a stream that a producer is filling, 800 events learned, the producer held
    back (its gate set) so that the ``fault`` falls mid-stream: ``(cfg, path, server, client, producer)``."""
    cfg, path = _feed_config(tmp_path, url)
    server = start_serve(path)
    client = redis.Redis.from_url(url)
    producer = Producer(url, demo_events(3000, tag=tag))
    producer.start()
    _until(lambda: _learned(server) >= 800, what=f"800 events learned before the {fault}")
    producer.gate.set()
    return cfg, path, server, client, producer


def test_redis_restart_mid_stream_loses_nothing(tmp_path, aof_redis):
    """SIGKILL of redis-server while entries flow; restarted from its append-only file on the same port,
    the learner reconnects and ends on the offline replay's digest with nothing pending."""
    cfg, path, server, client, producer = _mid_stream(tmp_path, aof_redis.url, "r", "restart")
    aof_redis.kill()
    assert producer.sent < len(producer.events), "the stream ended before the restart"
    time.sleep(0.5)
    aof_redis.start()
    status = _finish(tmp_path, cfg, server, producer, client)
    assert status["reconnects"] >= 1 and status["error"] is None
    assert producer.retries >= 1  # the producer saw the outage too
    assert server.stop() == 0
    client.close()


def test_learner_sigkill_mid_stream_learns_each_entry_once(tmp_path, aof_redis):
    """SIGKILL of ``trimtab serve`` while it consumes the stream; started again on the same data folder,
    it recovers from its journal, re-reads what it had not acknowledged, and ends on the offline
    replay's digest (no entry learned twice, none lost) with nothing pending."""
    cfg, path, server, client, producer = _mid_stream(tmp_path, aof_redis.url, "k", "kill")
    server.kill()
    assert producer.sent < len(producer.events), "the stream ended before the kill"
    server = start_serve(path)
    _finish(tmp_path, cfg, server, producer, client)
    assert server.stop() == 0
    client.close()


def test_dead_consumer_entries_taken_over_and_poison_dead_lettered(tmp_path):
    """Entries a dead consumer (``learner-0``) held are learned by ``learner-1`` at its start; a pending
    entry deleted from the stream and one delivered too often go to the dead-letter stream with why."""
    redis_server = RedisServer(tmp_path / "redis")
    try:
        client = redis.Redis.from_url(redis_server.url)
        client.xgroup_create(STREAM, GROUP, id="0", mkstream=True)
        events = demo_events(401, tag="d")
        # an entry that learner-1 was handed five times and never acknowledged
        worn = client.xadd(STREAM, {"event": orjson.dumps(events[400])})
        client.xreadgroup(GROUP, "learner-1", {STREAM: ">"}, count=10)
        for _ in range(4):
            client.xreadgroup(GROUP, "learner-1", {STREAM: "0"}, count=10)
        for e in events[:300]:
            client.xadd(STREAM, {"event": orjson.dumps(e)})
        trimmed = client.xadd(STREAM, {"event": orjson.dumps(events[300])})
        got = client.xreadgroup(GROUP, "learner-0", {STREAM: ">"}, count=1000)
        assert len(got[0][1]) == 301
        client.xdel(STREAM, trimmed)
        for e in events[301:400]:
            client.xadd(STREAM, {"event": orjson.dumps(e)})
        time.sleep(0.3)  # learner-0's entries are now idle longer than claim_idle_ms

        cfg, path = _feed_config(tmp_path, redis_server.url, claim_idle_ms=200, max_deliveries=6)
        server = start_serve(path)
        _until(lambda: client.xpending(STREAM, GROUP)["pending"] == 0 and _learned(server) >= 399,
               what="the taken-over entries to be learned")
        card = Client(server.url).card()
        assert card["counters"]["events"] == 399
        ref = tmp_path / "learned.ndjson"
        ref.write_bytes(b"\n".join(orjson.dumps(e) for e in events[:300] + events[301:400]) + b"\n")
        assert card["state_digest"] == run_replay([ref], cfg)["summary"]["state_digest"]

        dead = {fields[b"entry"]: fields for _, fields in client.xrange(f"{STREAM}.rejected")}
        assert set(dead) == {worn, trimmed}
        assert b"deleted from the stream" in dead[trimmed][b"reason"]
        assert b"delivered 7 times" in dead[worn][b"reason"] and b"feed.max_deliveries = 6" in dead[worn][b"reason"]
        assert orjson.loads(dead[worn][b"event"])["id"] == events[400]["id"]
        with urllib.request.urlopen(server.url + "/readyz", timeout=10) as r:
            status = orjson.loads(r.read())["feed"]
        assert status["claimed"] >= 300 and status["rejected"] == 2
        assert server.stop() == 0
        client.close()
    finally:
        redis_server.stop()


def test_over_delivered_entry_already_learned_is_acknowledged_not_dead_lettered(tmp_path):
    """An entry delivered too often whose event the journal already holds (a learner that crashed
    after learning it, before acknowledging) is acknowledged, not dead-lettered, and not learned twice."""
    redis_server = RedisServer(tmp_path / "redis")
    try:
        client = redis.Redis.from_url(redis_server.url)
        events = demo_events(51, tag="j")
        plain, plain_path = write_config(tmp_path, tmp_path / "data")  # same data folder, no feed yet
        server = start_serve(plain_path)
        Client(server.url).events(events[:50])
        assert server.stop() == 0
        client.xgroup_create(STREAM, GROUP, id="0", mkstream=True)
        client.xadd(STREAM, {"event": orjson.dumps(events[0])})
        client.xreadgroup(GROUP, "learner-1", {STREAM: ">"}, count=10)
        for _ in range(6):
            client.xreadgroup(GROUP, "learner-1", {STREAM: "0"}, count=10)
        client.xadd(STREAM, {"event": orjson.dumps(events[50])})

        cfg, path = _feed_config(tmp_path, redis_server.url, max_deliveries=3)
        server = start_serve(path)
        _until(lambda: client.xpending(STREAM, GROUP)["pending"] == 0 and _learned(server) >= 51,
               what="the feed to settle")
        assert client.xlen(f"{STREAM}.rejected") == 0
        assert Client(server.url).card()["counters"]["events"] == 51
        ref = tmp_path / "learned.ndjson"
        ref.write_bytes(b"\n".join(orjson.dumps(e) for e in events) + b"\n")
        assert Client(server.url).card()["state_digest"] == run_replay([ref], cfg)["summary"]["state_digest"]
        assert server.stop() == 0
        client.close()
    finally:
        redis_server.stop()
