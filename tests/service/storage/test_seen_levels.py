"""The deduplication index in sorted runs (journal format 4), on real SQLite files, with small
constants so that a few hundred keys go through many buffer flushes and merges.

The reference for what the index must answer is a plain Python ``set`` of every committed key (and a
``dict`` of their positions); numbering goes through the rule written one event at a time
(``test_numbering.reference``). The flat cost of a flush is checked by counting what SQLite writes:
the rows it changes (``total_changes``) and the pages it appends to the write-ahead log (one WAL
frame per page written, sqlite.org "Write-Ahead Logging", "The WAL File Format"), at a small and at
a much larger history. No timing.
"""

from __future__ import annotations

import random
import sqlite3

import pytest

from service.storage import seen
from service.storage.journal import Journal
from service.storage.seen import id_key, number_events
from tests.service.storage.test_numbering import reference


def _merges_under_way(db: sqlite3.Connection) -> int:
    return db.execute("SELECT count(*) FROM seen_levels WHERE slices > slices_done").fetchone()[0]


def _legacy_file(folder, legacy: list[str], buffered: list[str]) -> None:
    """A file as journal format 3 left it: ``legacy`` ids indexed in ``seen``, ``buffered`` ids in
    ``seen_runs``, journal rows for both, no table of sorted runs."""
    Journal(folder).close()
    db = sqlite3.connect(folder / "trimtab.sqlite")
    db.executescript("DROP TABLE seen_sorted; DROP TABLE seen_levels; "
                     "UPDATE meta SET value = '3' WHERE key = 'journal_format';")
    ids = legacy + buffered
    db.executemany("INSERT INTO journal VALUES (?, ?, 0, ?)", [(k + 1, i, b"{}") for k, i in enumerate(ids)])
    db.executemany("INSERT INTO seen VALUES (?, ?)", sorted((id_key(i), k + 1) for k, i in enumerate(legacy)))
    if buffered:
        db.execute("INSERT INTO seen_runs VALUES (?, ?)",
                   (len(legacy) + 1, b"".join(id_key(i) for i in buffered)))
    db.commit()
    db.close()


@pytest.mark.parametrize("step_every", [2, 1000], ids=["merges-in-slices", "merges-finished-when-due"])
def test_known_answers_as_a_set_of_every_committed_key_through_flushes_and_merges(tmp_path, monkeypatch,
                                                                                  step_every):
    """A format-3 file with a populated legacy table, then 120 commits of random ids (repeats within and
    across commits, ids of the legacy table and of the buffer again) with a buffer of 8 keys, a
    fan-out of 3 and slices of 4 keys: at every commit ``known`` is exactly the committed set, the
    numbering is the rule's, and at the end every level holds runs; a reopen answers the same."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 8)
    monkeypatch.setattr(seen, "FANOUT", 3)
    monkeypatch.setattr(seen, "SLICE_KEYS", 4)
    monkeypatch.setattr(seen, "STEP_EVERY", step_every)
    legacy, buffered = [f"old-{k}" for k in range(30)], [f"buf-{k}" for k in range(5)]
    _legacy_file(tmp_path, legacy, buffered)
    committed = {id_key(i): k + 1 for k, i in enumerate(legacy + buffered)}
    rng = random.Random(20261204)
    pool = legacy + buffered + [f"van-{k}" for k in range(600)]
    j = Journal(tmp_path, sync="normal")
    assert j.format == 3
    seq, merging_seen, levels = len(committed) + 1, 0, set()
    for _ in range(120):
        ids = [rng.choice(pool) for _ in range(rng.randrange(1, 12))]
        keys = [id_key(i) for i in ids]
        known = j.known(keys)
        assert known == {k for k in keys if k in committed}
        want = reference(keys, set(committed), seq)
        dups, pairs = number_events(keys, known, seq)
        assert dups == [k for k, s in enumerate(want) if s is None]
        assert pairs == [(k, s) for k, s in zip(keys, want) if s is not None]
        if pairs:
            j.append([(seq, [ids[k] for k, s in enumerate(want) if s is not None], [b"{}"] * len(pairs))], pairs)
            committed.update(pairs)
            seq += len(pairs)
        merging_seen += _merges_under_way(j._db) > 0
        levels |= {level for _, level, _ in seen.run_levels(j._db)}
        probe = keys + [id_key(i) for i in rng.sample(pool, 40)] + [id_key(f"never-{seq}")]
        assert j.known(probe) == {k for k in probe if k in committed}
    assert j.format == 4 and j.last_seq() == seq - 1
    assert levels == {0, 1, 2}  # lookups were checked with keys in runs of every level
    assert len([r for r in seen.run_levels(j._db) if r[1] == 2]) >= 2  # top runs are never merged
    if step_every == 2:
        assert merging_seen > 10  # lookups were checked while merges were half done
    pairs = seen.index_pairs(j._db)
    assert dict(pairs) == committed and len(pairs) == len(committed)  # each key once, at its position
    legacy_rows = j._db.execute("SELECT h, seq FROM seen ORDER BY seq").fetchall()
    assert legacy_rows == [(id_key(i), k + 1) for k, i in enumerate(legacy)]  # never written again
    everything = [id_key(i) for i in pool] + [id_key("never")]
    j.close()
    j = Journal(tmp_path, sync="normal")
    assert all(j._filter.maybe(list(committed)))  # the filter holds the legacy table, runs and buffer
    assert j.known(everything) == {k for k in everything if k in committed} and j.last_seq() == seq - 1
    j.close()


def test_a_format_3_file_opens_finds_its_keys_and_becomes_format_4_at_its_first_run(tmp_path, monkeypatch):
    """The versions before moved the buffer into ``seen``: opened by this one, that table and the
    buffer answer; new keys go to the buffer and leave the file format 3 (readable by the versions
    before) until the buffer becomes the first sorted run, which marks it 4 in the same commit."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 10)
    legacy, buffered = [f"old-{k}" for k in range(20)], [f"buf-{k}" for k in range(4)]
    _legacy_file(tmp_path, legacy, buffered)
    old = [id_key(i) for i in legacy + buffered]
    j = Journal(tmp_path)
    assert j.format == 3 and j.last_seq() == 24
    assert j.known(old + [id_key("new-0")]) == set(old) and all(j._filter.maybe(old))
    first = [id_key(f"new-{k}") for k in range(3)]
    j.append([(25, [f"new-{k}" for k in range(3)], [b"{}"] * 3)], [(h, 25 + k) for k, h in enumerate(first)])
    assert j.format == 3  # 7 keys buffered: no sorted run yet
    assert j._db.execute("SELECT count(*) FROM seen_sorted").fetchone()[0] == 0
    more = [id_key(f"new-{k}") for k in range(3, 6)]
    j.append([(28, [f"new-{k}" for k in range(3, 6)], [b"{}"] * 3)], [(h, 28 + k) for k, h in enumerate(more)])
    assert j.format == 4
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == "4"
    assert db.execute("SELECT count(*) FROM seen").fetchone()[0] == 20
    run = [(id_key(i), 21 + k) for k, i in enumerate(buffered)] + [(h, 25 + k) for k, h in enumerate(first + more)]
    assert db.execute("SELECT h, seq FROM seen_sorted WHERE run = 1").fetchall() == sorted(run)  # in key order
    db.close()
    j = Journal(tmp_path)
    everything = old + first + more
    assert j.known(everything + [id_key("never")]) == set(everything) and j.last_seq() == 30


def _quiet(db: sqlite3.Connection) -> bool:
    """No merge under way, and one more level-0 run would start none."""
    complete = [seen._complete_runs(db, level) for level in range(seen.TOP_LEVEL)]
    return not _merges_under_way(db) and len(complete[0]) <= seen.FANOUT - 2 and \
        all(len(runs) < seen.FANOUT for runs in complete)


def _commit_until_flush(j: Journal, seq: int, body: int) -> tuple[int, int, int]:
    """Commit bodies of ``body`` new ids until one fills the buffer; return the next position and what
    that last commit wrote: rows changed and pages appended to the (emptied) write-ahead log."""
    while True:
        ids = [f"ev-{s}" for s in range(seq, seq + body)]
        pairs = [(id_key(i), seq + k) for k, i in enumerate(ids)]
        j._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        rows = j._db.total_changes
        j.append([(seq, ids, [b"x" * 100] * body)], pairs)
        seq += body
        if not j._buffer:  # the commit turned the buffer into a run
            frames = j._db.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()[1]
            return seq, j._db.total_changes - rows, frames


def test_a_flush_writes_as_much_whatever_the_history(tmp_path, monkeypatch):
    """The commit that turns a buffer of 2,048 random keys into a run writes the same rows and about
    the same pages with 2,048 keys in the index as with 65,536 (32 times more): the run goes to the
    right edge of the B-tree. (The previous layout merged the buffer into one table of every key:
    at 65,536 keys that touches most of its ~600 leaf pages, not ~20.)"""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 2048)
    j = Journal(tmp_path, sync="normal")
    seq, rows_small, frames_small = _commit_until_flush(j, 1, 512)
    assert seen.run_levels(j._db) == [(1, 0, 2048)]
    for _ in range(200):  # merges run on their normal schedule meanwhile
        seq, _, _ = _commit_until_flush(j, seq, 512)
        if seq > 65_536 and _quiet(j._db):
            break
    assert _quiet(j._db) and seen.indexed_count(j._db) >= 65_536
    assert 2 in {level for _, level, _ in seen.run_levels(j._db)}
    monkeypatch.setattr(seen, "STEP_EVERY", 10**9)  # the measured commit moves no slice of a merge
    seq, rows_large, frames_large = _commit_until_flush(j, seq, 512)
    assert rows_large == rows_small
    # a B-tree one level deeper and a freelist page or two: a few pages, not one per key
    assert frames_large <= frames_small + 6, (frames_small, frames_large)
    j.close()


def test_lookups_and_merge_steps_seek_by_primary_key_and_scan_no_run(tmp_path):
    """SQLite's plan for the statements that read runs: every access to ``seen`` and
    ``seen_sorted`` is a SEARCH on the primary key (``(run, h)``), never a SCAN."""
    db = sqlite3.connect(tmp_path / "plan.sqlite")
    db.executescript(seen.SCHEMA)
    where = "run IN (SELECT run FROM seen_levels WHERE into_run = ?1) AND h >= ?2 AND h < ?3"
    move = f"INSERT INTO seen_sorted (run, h, seq) SELECT ?1, h, seq FROM seen_sorted WHERE {where} ORDER BY h"
    statements = {seen._lookup_sql(3): (b"a", b"b", b"c"), move: (1, b"", b"z"),
                  f"DELETE FROM seen_sorted WHERE {where}": (1, b"", b"z")}
    assert where in seen._move_slice.__code__.co_consts  # the statements checked are the module's own
    for sql, args in statements.items():
        plan = [r[3] for r in db.execute(f"EXPLAIN QUERY PLAN {sql}", args)]
        on_index = [p for p in plan if "seen_sorted" in p or p.startswith(("SEARCH seen ", "SCAN seen "))]
        assert on_index and all(p.startswith("SEARCH") and "PRIMARY KEY" in p for p in on_index), plan


@pytest.mark.parametrize("retained", [5, 300], ids=["fits-the-buffer", "a-run-at-the-top"])
def test_a_format_1_journal_without_an_index_gets_its_retained_ids_indexed_at_open(tmp_path, monkeypatch,
                                                                                    retained):
    """A journal written before any index table existed (format 1): at open its retained ids are
    indexed in one transaction, as a buffer (format 3) or, when they fill it, as one run, put at
    the level its size calls for (300 keys with a buffer of 8 and a fan-out of 3: the top), which
    marks the file 4. Lookups, the filter and the last position answer for them."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 8)
    monkeypatch.setattr(seen, "FANOUT", 3)
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    db.execute("CREATE TABLE journal (seq INTEGER PRIMARY KEY, id TEXT, kind INTEGER NOT NULL, payload BLOB NOT NULL)")
    ids = [f"first-{k}" for k in range(retained)]
    db.executemany("INSERT INTO journal VALUES (?, ?, 0, ?)", [(k + 11, i, b"{}") for k, i in enumerate(ids)])
    db.commit()
    db.close()
    keys = [id_key(i) for i in ids]
    j = Journal(tmp_path)
    assert j.known(keys + [id_key("never")]) == set(keys) and all(j._filter.maybe(keys))
    assert j.last_seq() == 10 + retained
    if retained < 8:
        assert j.format == 3 and seen.run_levels(j._db) == [] and seen.buffered_count(j._db) == retained
    else:
        assert j.format == 4 and seen.run_levels(j._db) == [(1, seen.TOP_LEVEL, retained)]
    assert dict(seen.index_pairs(j._db)) == {k: s + 11 for s, k in enumerate(keys)}
    j.close()


@pytest.mark.parametrize("idle_steps", [True, False], ids=["moved-while-idle", "journal-never-idle"])
def test_owed_merge_slices_move_while_idle_and_never_fall_far_behind(tmp_path, monkeypatch, idle_steps):
    """Commits owe merge slices instead of moving them; ``merge_step`` (the journal thread, while no
    commit waits) moves them one at a time. Without idle steps a commit moves them itself once more
    than ``OWED_LIMIT`` are owed (those beyond it). Either way ``known`` stays exactly the committed set, mid-merge
    included, and every merge completes."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 8)
    monkeypatch.setattr(seen, "FANOUT", 3)
    monkeypatch.setattr(seen, "SLICE_KEYS", 4)
    monkeypatch.setattr(seen, "STEP_EVERY", 2)
    monkeypatch.setattr(seen, "OWED_LIMIT", 5)
    rng = random.Random(7)
    j = Journal(tmp_path, sync="normal")
    committed: dict[bytes, int] = {}
    seq, idle_moves, most_owed, mid_merge_checks = 1, 0, 0, 0
    for c in range(150):
        ids = [f"reefer-{c}-{k}" for k in range(rng.randrange(1, 6))]
        pairs = [(id_key(i), seq + k) for k, i in enumerate(ids)]
        assert not j.known([h for h, _ in pairs])
        j.append([(seq, ids, [b"{}"] * len(ids))], pairs)
        committed.update(pairs)
        seq += len(ids)
        most_owed = max(most_owed, j.owed_steps)
        if idle_steps and j.merging and rng.random() < 0.5:
            done = j._db.execute("SELECT coalesce(sum(slices_done), 0) FROM seen_levels").fetchone()[0]
            j.merge_step()
            idle_moves += j._db.execute("SELECT coalesce(sum(slices_done), 0) FROM seen_levels").fetchone()[0] != done
        if _merges_under_way(j._db):
            mid_merge_checks += 1
            probe = rng.sample(list(committed), min(20, len(committed))) + [id_key(f"never-{c}")]
            assert j.known(probe) == {k for k in probe if k in committed}
    assert most_owed <= seen.OWED_LIMIT  # a commit past the limit moved what was owed
    assert mid_merge_checks > 10
    if idle_steps:
        assert idle_moves > 10
    while j.merging:  # an idle journal thread finishes every merge
        j.merge_step()
    assert _merges_under_way(j._db) == 0 and j.owed_steps == 0
    assert {level for _, level, _ in seen.run_levels(j._db)} >= {1, 2}
    pairs = seen.index_pairs(j._db)
    assert dict(pairs) == committed and len(pairs) == len(committed)
    j.close()
