"""Numbering an item's events (:func:`service.storage.seen.number_events`) and what its receipt
answers (:class:`service.ingest_queue.Receipt`) agree with the rule written one event at a time.

The rule (exactly-once, first occurrence in queue order wins): an event whose id was accepted
before, in an earlier commit or earlier in the same commit, is a duplicate and gets no position;
every other event, with or without an id, gets the next position. The reference below is that
rule as a plain loop; the function under test takes a whole-item fast path when no event can be
a duplicate and falls back to the loop otherwise, and both must give the same answer on items of
new ids, ids repeated within an item, ids repeated across items, ids already journaled and events
without an id.
"""

from __future__ import annotations

import random

import pytest

from service.ingest_queue import Receipt
from service.storage.seen import id_key, number_events


def reference(keys: list, known: set, first_seq: int) -> list:
    """The rule, one event at a time: a position per event, ``None`` for a duplicate."""
    seqs, seq = [], first_seq
    for key in keys:
        if key is not None and key in known:
            seqs.append(None)
            continue
        if key is not None:
            known.add(key)
        seqs.append(seq)
        seq += 1
    return seqs


def check_chunk(items: list[list], history: set, first_seq: int) -> None:
    """Number a chunk of items both ways (the known set carried from item to item, as a commit does)
    and compare the positions, the duplicates, the new keys and the receipts' answers."""
    known_ref, known = set(history), set(history)
    seq = first_seq
    for keys in items:
        want = reference(keys, known_ref, seq)
        dups, pairs = number_events(keys, known, seq)
        r = Receipt()
        r.numbered(seq, len(keys), dups)
        assert dups == [k for k, s in enumerate(want) if s is None]
        assert pairs == [(key, s) for key, s in zip(keys, want) if s is not None and key is not None]
        assert r.accepted == sum(s is not None for s in want)
        got = [s for s in want if s is not None]
        assert r.seq_range() == ([got[0], got[-1]] if got else None)
        assert r.kept() == (None if not dups else [k for k, s in enumerate(want) if s is not None])
        assert r.duplicates() == dups
        assert known == known_ref
        seq += r.accepted


def test_an_item_of_new_ids_is_one_range():
    keys = [id_key(f"v07-{k}") for k in range(500)]
    dups, pairs = number_events(keys, set(), 41)
    assert dups == [] and pairs == list(zip(keys, range(41, 541)))
    check_chunk([keys], set(), 41)


def test_repeats_within_an_item_across_items_and_in_the_history():
    a, b, c, d = (id_key(x) for x in "abcd")
    # within one item: the first occurrence wins; across items of one commit: the earlier item wins;
    # a key journaled before (history) is a duplicate wherever it appears
    check_chunk([[a, b, a, c, a], [c, d, None, b], [None, None], [d]], {b"\x00" * 16}, 7)
    check_chunk([[a, b], [b, a]], {a}, 1)
    dups, pairs = number_events([a, None, a, b], {b}, 10)
    assert dups == [2, 3] and pairs == [(a, 10)]  # the id-less event took position 11


def test_events_without_an_id_are_never_duplicates():
    check_chunk([[None] * 5, [None, id_key("x"), None]], set(), 1)
    dups, pairs = number_events([None, None], set(), 3)
    assert dups == [] and pairs == []


@pytest.mark.parametrize("seed", range(20))
def test_random_chunks_agree_with_the_rule(seed):
    rng = random.Random(seed)
    pool = [id_key(f"id-{k}") for k in range(rng.choice([5, 50, 2000]))]
    history = set(rng.sample(pool, rng.randrange(0, len(pool) // 2 + 1)))
    items = []
    for _ in range(rng.randrange(1, 6)):
        size = rng.randrange(0, 300)
        if rng.random() < 0.3:  # an item of fresh ids only: the fast path
            items.append([id_key(f"fresh-{seed}-{len(items)}-{k}") for k in range(size)])
        else:
            items.append([None if rng.random() < 0.05 else rng.choice(pool) for _ in range(size)])
    check_chunk(items, history, rng.randrange(1, 10_000))


def test_an_empty_item_and_an_operator_action():
    r = Receipt()
    dups, pairs = number_events([], set(), 5)
    r.numbered(5, 0, dups)
    assert (dups, pairs, r.accepted, r.seq_range(), r.kept(), r.duplicates()) == ([], [], 0, None, None, [])


def test_the_index_holds_each_new_key_at_the_position_the_rule_gives(tmp_path):
    """Items numbered as the committer does, committed to a real journal: every key ever accepted is
    in the index once, at its position by the per-event rule; id-less events and duplicates leave
    gaps, and the buffer holds one run per commit and stretch of consecutive positions."""
    from service.storage.journal import Journal
    from service.storage.seen import index_pairs

    rng = random.Random(7)
    pool = [id_key(f"van-{k}") for k in range(400)]
    j = Journal(tmp_path, sync="normal")
    known_ref: set = set()
    expect: dict = {}
    seq = 1
    for _ in range(12):
        keys = [None if rng.random() < 0.1 else rng.choice(pool) for _ in range(rng.randrange(1, 120))]
        want = reference(keys, known_ref, seq)
        expect.update({key: s for key, s in zip(keys, want) if s is not None and key is not None})
        dups, pairs = number_events(keys, j.known(list({k for k in keys if k is not None})), seq)
        count = len(keys) - len(dups)
        if count:
            j.append([(seq, [None] * count, [b"{}"] * count)], pairs)
        seq += count
    assert dict(index_pairs(j._db)) == expect and len(index_pairs(j._db)) == len(expect)
    runs = j._db.execute("SELECT seq, length(keys) / 16 FROM seen_runs ORDER BY rowid").fetchall()
    positions = [s + k for s, n in runs for k in range(n)]
    assert positions == sorted(expect.values())  # the runs cover exactly the keyed positions, in order
    gaps = sum(1 for a, b in zip(positions, positions[1:]) if b != a + 1)
    assert len(runs) <= 12 + gaps  # a run per commit and stretch of consecutive positions, no more
    j.close()
