"""Deduplication over the whole history: a batch re-sent after 100,000 further events is all duplicates.

The journal is pruned behind the checkpoints (every 5,000 events, two kept), so the batch's rows are
long gone from it when it comes back, before and after a restart. The reference outside the service
is the SQLite file itself, read with ``sqlite3``: its first retained row lies far past the batch, and
its ``seen`` table still holds the BLAKE2b-128 digest (computed here with ``hashlib``) of every id.
"""

from __future__ import annotations

import hashlib
import sqlite3

from service.storage import seen
from tests.service.faults.faultkit import Client, start, write_config
from tests.service.servicekit import demo_events


def test_a_batch_resent_after_100k_events_is_all_duplicates(tmp_path):
    data = tmp_path / "data"
    _, conf = write_config(tmp_path, data, checkpoint_every=5000, checkpoint_min_interval_s=0.0, checkpoints_kept=2, max_batch=20_000)
    first = demo_events(1000, tag="retry-")
    server = start(conf)
    client = Client(server.url)
    got = client.events(first)
    assert got["accepted"] == 1000 and got["seq"] == [1, 1000]
    for start_at in range(0, 100_000, 10_000):
        got = client.events(demo_events(10_000, tag="later-", start=start_at), ndjson=True)
        assert got["accepted"] == 10_000, {k: got[k] for k in ("accepted", "seq")}
    card = client.card()
    assert card["counters"]["events"] == 101_000

    again = client.events(first)
    assert (again["accepted"], again["duplicates"], again["seq"]) == (0, list(range(1000)), None)
    nd = client.events(first[:10], ndjson=True)  # NDJSON positions count from 0 as well
    assert nd["duplicates"] == list(range(10))
    assert client.card()["state_digest"] == card["state_digest"]
    assert server.stop() == 0

    db = sqlite3.connect(data / "trimtab.sqlite")
    first_row = db.execute("SELECT min(seq) FROM journal").fetchone()[0]
    key = hashlib.blake2b(b"retry-0", digest_size=16).digest()
    assert first_row > 90_000  # the batch's rows were pruned long ago
    pairs = seen.index_pairs(db)
    assert [s for h, s in pairs if h == key] == [1]
    assert len(pairs) == len({h for h, _ in pairs}) == 101_000
    db.close()

    server = start(conf)  # and after a restart: the index is on disk, not in the old process
    client = Client(server.url)
    again = client.events(first)
    assert again["accepted"] == 0 and again["duplicates"] == list(range(1000))
    mixed = client.events([first[5], demo_events(1, tag="fresh-")[0], first[5]])
    assert (mixed["accepted"], mixed["duplicates"]) == (1, [0, 2])
    assert client.card()["counters"]["events"] == 101_001
    assert server.stop() == 0
