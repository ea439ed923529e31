"""A crash matrix: one data dir, a real ``trimtab serve`` SIGKILLed at seven points in a row.

The points: right after an acknowledgement, right after a restart (nothing new applied), right
after a checkpoint taken after a restart (the position such a checkpoint records was once 0, so the
next restart applied the journal twice), mid-ingest (the producer retries the unanswered batch),
right after an operator rollback, during a checkpoint write (the write-ahead log is growing with
the checkpoint's pages and the checkpoint is not yet committed), and during recovery.

After every restart the reference is outside the service: an offline :class:`Engine` replay of the
events in the SQLite journal file, read with ``sqlite3`` (the engine is deterministic, so equal
``state_digest`` values mean bit-identical models). Checked each time: the digest equals the
replay's, the applied events equal the distinct journaled ids, the updates equal the replay's, every
acknowledged id is journaled once, and the model card's applied position is the journal's last.
"""

from __future__ import annotations

import os
import sqlite3
import threading
import time

from tests.service.faults.faultkit import Client, journal_replay, start, write_config
from tests.service.servicekit import demo_events


def _check(cfg, db_path, client: Client, acked: set[str]) -> dict:
    digest, updates, ids, last = journal_replay(cfg, db_path)
    card = client.card()
    assert len(ids) == len(set(ids)), "an id was journaled twice"
    assert acked <= set(ids), "an acknowledged event is missing from the journal"
    assert card["counters"]["events"] == len(ids), (card["counters"], len(ids))
    assert card["updates"] == updates and card["state_digest"] == digest
    assert card["journal"]["applied_seq"] == last
    return card


def _in_thread(call, out: dict) -> threading.Thread:
    """Run ``call()`` on a thread; ``out["answer"]`` is its result unless the kill cut it off."""
    def run():
        try:
            out["answer"] = call()
        except OSError:
            pass
    t = threading.Thread(target=run)
    t.start()
    return t


def test_sigkill_at_seven_points_keeps_exactly_once(tmp_path):
    data = tmp_path / "data"
    cfg, conf = write_config(tmp_path, data, checkpoint_every=900, checkpoint_min_interval_s=0.0, checkpoints_kept=2, prune_journal=False,
                             hash_bits=16)  # a state of several MB: its write spills pages before COMMIT
    db_path = data / "trimtab.sqlite"
    events = demo_events(6000, tag="m")
    batches = [events[i:i + 300] for i in range(0, len(events), 300)]
    acked: set[str] = set()
    points: list[str] = []
    pending = list(batches)

    def send(client: Client, n: int) -> None:
        for _ in range(n):
            batch = pending.pop(0)
            got = client.events(batch, ndjson=len(pending) % 2 == 0)
            assert got["accepted"] + len(got["duplicates"]) == len(batch) and not got["rejected"]
            acked.update(e["id"] for e in batch)

    # 1. right after an acknowledgement
    server = start(conf)
    send(Client(server.url), 4)
    server.kill()
    points.append("after_ack")

    # 2. right after a restart
    server = start(conf)
    _check(cfg, db_path, Client(server.url), acked)
    server.kill()
    points.append("after_restart")

    # 3. right after a checkpoint taken right after a restart
    server = start(conf)
    client = Client(server.url)
    status, ck = client.call("POST", "/v1/checkpoints")
    assert status == 200 and ck["seq"] == client.card()["journal"]["applied_seq"] > 0, ck
    server.kill()
    points.append("after_checkpoint_after_restart")

    # 4. mid-ingest: the batch is in flight when the process dies; the producer retries it later
    server = start(conf)
    client = Client(server.url)
    _check(cfg, db_path, client, acked)  # the checkpoint of step 3 did not double anything
    send(client, 2)
    in_flight, out = pending.pop(0), {}
    t = _in_thread(lambda: client.call("POST", "/v1/events", in_flight), out)
    time.sleep(0.01)
    server.kill()
    t.join()
    # The kill takes the learner and the front in turn: the front may still answer 503
    # ``learner_unreachable``, which acknowledges nothing. Only a 200 is an acknowledgement.
    if out.get("answer", (None,))[0] == 200:
        acked.update(e["id"] for e in in_flight)
    pending.insert(0, in_flight)
    points.append("mid_ingest")

    # 5. right after an operator rollback (a journal row of its own)
    server = start(conf)
    client = Client(server.url)
    _check(cfg, db_path, client, acked)
    send(client, 3)  # the retried batch first: its ids are accepted once, duplicates otherwise
    status, rb = client.call("POST", "/v1/model/rollback", {"reason": "crash matrix"})
    assert status == 200 and rb["rolled_back"], rb
    server.kill()
    points.append("after_rollback")

    # 6. during a checkpoint write: killed while the WAL grows with its pages, before it commits
    server = start(conf)
    client = Client(server.url)
    _check(cfg, db_path, client, acked)
    send(client, 2)
    before = client.call("GET", "/v1/checkpoints")[1]["checkpoints"]
    wal = db_path.with_name(db_path.name + "-wal")
    base = wal.stat().st_mtime_ns
    out = {}
    t = _in_thread(lambda: client.call("POST", "/v1/checkpoints"), out)
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and wal.stat().st_mtime_ns == base and "answer" not in out:
        time.sleep(0.0002)
    server.kill()  # at the first write of the checkpoint's pages into the WAL
    t.join()
    assert out.get("answer", (None,))[0] != 200, "the kill came after the checkpoint was answered"
    db = sqlite3.connect(db_path)
    committed = db.execute("SELECT max(id) FROM checkpoints").fetchone()[0] != before[0]["id"]
    db.close()
    points.append("during_checkpoint" + ("_after_commit" if committed else ""))

    # 7. during recovery: killed as soon as the process listens, before or while it replays
    server = start(conf, ready=False)
    server.kill()
    points.append("during_recovery")

    server = start(conf)
    client = Client(server.url)
    send(client, len(pending))
    card = _check(cfg, db_path, client, acked)
    assert server.stop() == 0
    assert acked == {e["id"] for e in events} and card["counters"]["events"] == len(events)
    assert len(points) == 7 and os.path.exists(data / "trimtab.lock"), points
    # a clean stop then a restart: the final checkpoint holds the true position, nothing is re-applied
    server = start(conf)
    client = Client(server.url)
    assert client.call("GET", "/readyz")[1]["recovery"]["replayed"] == 0
    assert client.card()["state_digest"] == card["state_digest"]
    assert server.stop() == 0
