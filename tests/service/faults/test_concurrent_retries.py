"""Concurrent producers retrying the same ids against a real ``trimtab serve``: every answer is a
200, each id is accepted exactly once across all answers (one producer gets it, the others see a
duplicate), and the model applied exactly the distinct ids, as an offline replay of the journal
file says. Before the index, such retries got 503 "UNIQUE constraint failed" in 1 to 6 of 6 rounds.
"""

from __future__ import annotations

import random
import threading
from collections import Counter

from tests.service.faults.faultkit import Client, journal_replay, start, write_config
from tests.service.servicekit import demo_events


def test_producers_retrying_the_same_ids_never_get_an_error(tmp_path):
    data = tmp_path / "data"
    cfg, conf = write_config(tmp_path, data, prune_journal=False)
    server = start(conf)
    client = Client(server.url)
    rng = random.Random(12)
    accepted: Counter = Counter()
    statuses: Counter = Counter()
    lock = threading.Lock()
    all_ids: set[str] = set()
    for round_no in range(6):
        events = demo_events(600, tag=f"r{round_no}-")
        all_ids.update(e["id"] for e in events)
        batches = [events[i:i + 200] for i in range(0, 600, 150)]  # overlapping windows

        def produce(seed: int) -> None:
            order = list(batches)
            random.Random(seed).shuffle(order)
            for batch in order:
                status, got = client.call("POST", "/v1/events", batch, ndjson=seed % 2 == 0)
                with lock:
                    statuses[status] += 1
                    if status == 200:
                        for k, e in enumerate(batch):
                            if k not in got["duplicates"]:
                                accepted[e["id"]] += 1
        threads = [threading.Thread(target=produce, args=(rng.randrange(10**6),)) for _ in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    card = client.card()
    assert server.stop() == 0
    assert set(statuses) == {200}, statuses
    assert set(accepted) == all_ids and set(accepted.values()) == {1}
    digest, updates, ids, _ = journal_replay(cfg, data / "trimtab.sqlite")
    assert sorted(ids) == sorted(all_ids)
    assert (card["counters"]["events"], card["updates"], card["state_digest"]) == (len(all_ids), updates, digest)
