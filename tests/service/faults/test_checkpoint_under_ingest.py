"""Operator checkpoints while producers ingest, against a real ``trimtab serve``.

The journal thread hands committed chunks straight to the learner's thread, and the event loop
writes a checkpoint an item asks for once that item is applied, while later items keep being
learned. What must hold: every ``POST /v1/checkpoints`` is answered with a checkpoint whose position
lies between the applied positions seen just before and just after the call, and whose state is
exactly the model after the journal rows up to that position (the reference is an offline
:class:`Engine` replay of the SQLite journal file, outside the service); at the end the model equals
the replay of the whole journal and every acknowledged id was journaled once.
"""

from __future__ import annotations

import threading
import time

from tests.service.faults.faultkit import Client, journal_replay, start, write_config
from tests.service.servicekit import demo_events


def test_checkpoints_taken_during_ingest_hold_the_state_at_their_position(tmp_path):
    data = tmp_path / "data"
    cfg, conf = write_config(tmp_path, data, checkpoint_every=1_000_000, checkpoints_kept=50, prune_journal=False)
    db_path = data / "trimtab.sqlite"
    server = start(conf)
    client = Client(server.url)
    events = demo_events(12_000, tag="k")
    batches = [events[i:i + 300] for i in range(0, len(events), 300)]
    acked: list[str] = []
    lock = threading.Lock()

    def produce(k: int) -> None:
        for batch in batches[k::2]:
            got = client.events(batch, ndjson=k == 0)
            assert got["accepted"] == len(batch), got
            with lock:
                acked.extend(e["id"] for e in batch)

    producers = [threading.Thread(target=produce, args=(k,)) for k in range(2)]
    for t in producers:
        t.start()
    checkpoints = []
    while any(t.is_alive() for t in producers) or not checkpoints:
        before = client.card()["journal"]["applied_seq"]
        status, ck = client.call("POST", "/v1/checkpoints")
        assert status == 200, ck
        after = client.card()["journal"]["applied_seq"]
        assert before <= ck["seq"] <= after, (before, ck, after)
        checkpoints.append(ck)
        time.sleep(0.02)
    for t in producers:
        t.join()

    assert len({ck["seq"] for ck in checkpoints}) >= 2, checkpoints  # some were taken mid-ingest
    for ck in checkpoints:
        digest, _updates, _ids, last = journal_replay(cfg, db_path, upto=ck["seq"])
        assert last == ck["seq"] and digest == ck["state_digest"], ck
    digest, updates, ids, last = journal_replay(cfg, db_path)
    card = client.card()
    assert sorted(ids) == sorted(acked) and len(ids) == len(set(ids)) == len(events)
    assert card["state_digest"] == digest and card["updates"] == updates and card["journal"]["applied_seq"] == last
    server.stop()
