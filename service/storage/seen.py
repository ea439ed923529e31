"""The deduplication index: every event id ever journaled, as a 128-bit hash in sorted runs.

An id that was accepted once is a duplicate forever, however long ago and whatever the journal kept:
the index lives in the journal database next to the rows and is never pruned with them.
It is keyed by ``id_key(id)``, the 16-byte BLAKE2b digest of the id's UTF-8 bytes, so

* ids are compared as bytes, never through SQLite's text or JSON functions (an id holding U+0000 is
  an id like any other);
* a row costs about the same whatever the id's length (measured in ``benchmarks/dedup.py``);
* memory stays bounded: lookups go through SQLite's page cache (a fixed size), a buffer of at
  most :data:`BUFFER_KEYS` recent keys and a Bloom filter of 8-32 MiB that rules out most new ids
  before any lookup (:mod:`service.storage.keyfilter`), not a dict of every id.

New keys are appended to ``seen_runs``, a table in insertion order without an index (a commit
writes only its tail pages), and mirrored in memory for lookups: one row per stretch of consecutive
journal positions, the keys joined into one blob (``keys``, 16 bytes each) with the position of the
first (``seq``). An item's new events are numbered in a row, so a commit of a 500-event body writes
one row of 8 KB instead of 500 rows.

When the buffer holds :data:`BUFFER_KEYS` keys, the commit that filled it turns them into a *sorted
run*: rows ``(run, h, seq)`` of ``seen_sorted`` (primary key ``(run, h)``) under a run number above
every existing one, inserted in key order, so they land at the right edge of the B-tree and the
commit writes new pages only, however many keys the index already holds. ``seen_levels`` lists the
runs (``run``, ``level``, ``n`` keys, ``last_seq`` their highest position; ``into_run``, ``slices``
and ``slices_done`` follow a merge, below). A new run is at level 0;
when a level below :data:`TOP_LEVEL` holds :data:`FANOUT` runs, a merge of them into one new run of
the next level starts. It is not done in one commit: a merge is cut into slices of the key space of
about :data:`SLICE_KEYS` keys each (keys are uniform hashes, so equal shares of the key space hold
about as many), and every :data:`STEP_EVERY` keys added to the buffer, each merge under way owes a
move of its next slice (``INSERT ... SELECT ... ORDER BY h`` of that key range from the source runs
to the end of the new run, then ``DELETE`` of the range). The journal's thread moves owed slices in
transactions of their own while no commit waits (:meth:`service.storage.journal.Journal.merge_step`),
so a commit does not carry them; a commit moves only those owed beyond :data:`OWED_LIMIT` (a
journal thread that is never idle then moves each commit's share in the commit, as if owed slices
were moved at once, :data:`OWED_LIMIT` steps late). A key is in exactly one run at any moment, so
lookups answer the same mid-merge. Runs at the top level are never merged again. With the
defaults (buffer 65,536, fan-out 4, top level 2, slices of 4,096 keys, a step per 2,048 keys):

* every key is written three times in the index (into a level-0 run, a level-1 run, a top run),
  whatever the history: the write amplification is the number of levels (plus the buffer);
* the largest merge rewrites ``FANOUT ** TOP_LEVEL * BUFFER_KEYS`` keys (1,048,576: the top runs
  hold about 1M keys), but an idle step moves one slice of each merge under way (at most one per
  level below the top), a commit at most the slices its own keys owe (one per :data:`STEP_EVERY`)
  and only once :data:`OWED_LIMIT` are owed, and one commit in 131 at 500 keys per commit carries
  the flush of the buffer (65,536 keys sorted and written). A merge moves two slices per ``SLICE_KEYS``
  new keys, so it ends in half the time before the next merge of its level is due (one that is
  still under way then is finished at once, which only a burst of very large commits can cause);
* a lookup of a key the Bloom filter does not rule out probes every run by primary key: at most
  ``FANOUT - 1`` complete runs per level below the top (3 + 3), one per 1M ids of history at the
  top, the sources and target of the merges under way, and the legacy table. A higher top level
  would keep fewer top runs (fewer probes in a long history) at one more write per key; a larger
  fan-out writes each key as often but probes more runs per level.

Before this layout (journal format 3 and older) the buffer moved into ``seen (h, seq)``, one indexed
table, in one sorted pass; with uniformly random keys every move touched nearly every leaf of the
table, so its cost grew with the whole history (``benchmarks/README.md``). Such a table is kept as a
frozen *legacy level*: read by every lookup, never written again. Files of journal format 1 and 2
buffered keys one row each in ``seen_new (h, seq)``; such rows are still read (they belong to the
buffer) and go into the next run with it. The first run written marks the file format 4
(:mod:`service.storage.journal`), which the versions before refuse.

Two different ids share a key with probability about ``n**2 / 2**129`` for ``n`` ids ever seen
(birthday bound): below 1e-20 for ten billion ids. Such a pair would make the later one a duplicate.

Within one commit the first occurrence of an id wins and later ones are duplicates
(:func:`number_events`); commits run one at a time on the journal's thread, in queue order, so
concurrent producers retrying the same ids get a deterministic answer: one accepted, the others
duplicates, never an error.
"""

from __future__ import annotations

import hashlib
import sqlite3
from operator import itemgetter

import numpy as np
import orjson

from service.storage.keyfilter import KeyFilter

__all__ = ["BUFFER_KEYS", "FANOUT", "OWED_LIMIT", "SCHEMA", "SLICE_KEYS", "STEP_EVERY", "TOP_LEVEL", "advance_merges",
           "buffered_count", "id_key", "index_pairs", "indexed_count", "indexed_keys", "insert_keys", "key_filter",
           "known_keys", "last_position", "load_buffer", "merges_under_way", "number_events", "run_levels",
           "steps_owed"]

SCHEMA = ("CREATE TABLE IF NOT EXISTS seen (h BLOB PRIMARY KEY, seq INTEGER NOT NULL) WITHOUT ROWID;\n"
          "CREATE TABLE IF NOT EXISTS seen_new (h BLOB NOT NULL, seq INTEGER NOT NULL);\n"
          "CREATE TABLE IF NOT EXISTS seen_runs (seq INTEGER NOT NULL, keys BLOB NOT NULL);\n"
          "CREATE TABLE IF NOT EXISTS seen_sorted (run INTEGER NOT NULL, h BLOB NOT NULL, seq INTEGER NOT NULL, "
          "PRIMARY KEY (run, h)) WITHOUT ROWID;\n"
          "CREATE TABLE IF NOT EXISTS seen_levels (run INTEGER PRIMARY KEY, level INTEGER NOT NULL, "
          "n INTEGER NOT NULL, last_seq INTEGER NOT NULL, into_run INTEGER, "
          "slices INTEGER NOT NULL DEFAULT 0, slices_done INTEGER NOT NULL DEFAULT 0);")

#: keys buffered in ``seen_runs`` (and in memory, about 100 bytes each) before they become a sorted run
BUFFER_KEYS = 65_536
#: runs of one level merged into one run of the next level
FANOUT = 4
#: the level whose runs are never merged again (runs of about ``FANOUT ** TOP_LEVEL * BUFFER_KEYS`` keys)
TOP_LEVEL = 2
#: keys of a merge moved per step (a slice of the key space holding about this many)
SLICE_KEYS = 4096
#: every time this many more keys are buffered, each merge under way owes one more slice (two slices
#: per ``SLICE_KEYS`` new keys: a merge ends within half the time before the next one of its level starts)
STEP_EVERY = SLICE_KEYS // 2
#: owed slices are moved by the journal thread while no commit waits (:meth:`Journal.merge_step`); a
#: commit moves those owed beyond this many itself (a journal thread never idle lags this far behind)
OWED_LIMIT = 16

#: bound parameters per lookup statement (SQLite allows 32,766 since 3.32)
_LOOKUP_CHUNK = 4000
_KEY_BYTES = 16


def id_key(ident: str) -> bytes:
    """The 16-byte index key of an event id (BLAKE2b-128 of its UTF-8 bytes)."""
    return hashlib.blake2b(ident.encode("utf-8", "surrogatepass"), digest_size=16).digest()


def _runs(db: sqlite3.Connection) -> tuple[bytes, np.ndarray]:
    """The keys of ``seen_runs`` (the buffer), joined in insertion order, and their positions."""
    blobs, seqs = [], []
    for seq, blob in db.execute("SELECT seq, keys FROM seen_runs ORDER BY rowid"):
        blobs.append(blob)
        seqs.append(np.arange(seq, seq + len(blob) // _KEY_BYTES, dtype=np.int64))
    return b"".join(blobs), np.concatenate(seqs) if seqs else np.zeros(0, dtype=np.int64)


def _split(joined: bytes) -> list[bytes]:
    return [joined[i:i + _KEY_BYTES] for i in range(0, len(joined), _KEY_BYTES)]


def load_buffer(db: sqlite3.Connection) -> set[bytes]:
    """The keys not yet in a sorted run: the rows of ``seen_new`` (files before format 3) and of
    ``seen_runs`` (at open: the in-memory mirror of the buffer)."""
    return {r[0] for r in db.execute("SELECT h FROM seen_new")} | set(_split(_runs(db)[0]))


def buffered_count(db: sqlite3.Connection) -> int:
    """How many keys the buffer holds."""
    return db.execute("SELECT (SELECT count(*) FROM seen_new) + "
                      "(SELECT coalesce(sum(length(keys)), 0) FROM seen_runs) / 16").fetchone()[0]


def run_levels(db: sqlite3.Connection) -> list[tuple[int, int, int]]:
    """The sorted runs as ``(run, level, n keys)``, oldest first, a run being filled by a merge with
    the keys it will hold (for tests and inspection)."""
    return db.execute("SELECT run, level, n FROM seen_levels WHERE into_run IS NULL ORDER BY run").fetchall()


def indexed_count(db: sqlite3.Connection) -> int:
    """How many keys the legacy table and the sorted runs hold (not the buffer)."""
    return db.execute("SELECT (SELECT count(*) FROM seen) + "
                      "(SELECT coalesce(sum(n), 0) FROM seen_levels WHERE into_run IS NULL)").fetchone()[0]


def indexed_keys(db: sqlite3.Connection, batch: int = 65_536):
    """The keys of the legacy table and of the sorted runs, in lists of up to ``batch``."""
    for table in ("seen", "seen_sorted"):
        cur = db.execute(f"SELECT h FROM {table}")
        while rows := cur.fetchmany(batch):
            yield [r[0] for r in rows]


def key_filter(db: sqlite3.Connection, buffer: set[bytes]) -> KeyFilter:
    """A Bloom filter of every key in the index (legacy table, sorted runs and ``buffer``), sized for
    twice as many (it keeps that size while the file is open; see :mod:`service.storage.keyfilter`)."""
    keys = KeyFilter.sized_for(indexed_count(db) + len(buffer))
    for batch in indexed_keys(db):
        keys.add(batch)
    keys.add(list(buffer))
    return keys


def last_position(db: sqlite3.Connection) -> int:
    """The highest journal position the index holds a key for (0 when it holds none)."""
    return db.execute("SELECT max(coalesce((SELECT max(seq) FROM seen), 0), "
                      "coalesce((SELECT max(last_seq) FROM seen_levels), 0), "
                      "coalesce((SELECT max(seq) FROM seen_new), 0), "
                      "coalesce((SELECT max(seq + length(keys) / 16 - 1) FROM seen_runs), 0))").fetchone()[0]


def index_pairs(db: sqlite3.Connection) -> list[tuple[bytes, int]]:
    """Every ``(key, position)`` of the index, in runs, legacy and buffered (for tests and inspection)."""
    joined, seqs = _runs(db)
    return db.execute("SELECT h, seq FROM seen UNION ALL SELECT h, seq FROM seen_new "
                      "UNION ALL SELECT h, seq FROM seen_sorted").fetchall() + list(zip(_split(joined), seqs.tolist()))


def _lookup_sql(count: int) -> str:
    """One statement that seeks ``count`` keys (parameters ``?1``...) by primary key in the legacy
    table and in every sorted run (``(run, h)``: no run is scanned)."""
    marks = ",".join(f"?{i}" for i in range(1, count + 1))
    return (f"SELECT h FROM seen WHERE h IN ({marks}) UNION ALL "
            f"SELECT h FROM seen_sorted WHERE run IN (SELECT run FROM seen_levels) AND h IN ({marks})")


def known_keys(db: sqlite3.Connection, buffer: set[bytes], keys: list[bytes]) -> set[bytes]:
    """The subset of ``keys`` already in the index: the buffer, then primary-key seeks in the legacy
    table and the sorted runs, in chunks of keys."""
    found = {k for k in keys if k in buffer}
    keys = [k for k in keys if k not in found]
    for i in range(0, len(keys), _LOOKUP_CHUNK):
        part = keys[i:i + _LOOKUP_CHUNK]
        found.update(r[0] for r in db.execute(_lookup_sql(len(part)), part))
    return found


def steps_owed(buffered: int, added: int) -> int:
    """The merge steps that ``added`` keys joining a buffer of ``buffered`` owe (one per :data:`STEP_EVERY`)."""
    return (buffered + added) // STEP_EVERY - buffered // STEP_EVERY


def insert_keys(db: sqlite3.Connection, buffer: set[bytes], pairs: list[tuple[bytes, int]],
                steps: int | None = None) -> bool:
    """Add ``(key, seq)`` pairs inside the caller's transaction; ``buffer`` is the mirror of the
    buffer *before* them, and is not changed (the caller updates it once the commit holds). Each
    merge under way moves ``steps`` slices here (``None``: the :func:`steps_owed` by these keys; the
    journal passes 0 and moves them while idle, see :data:`OWED_LIMIT`).

    Returns whether the buffer became a sorted run (the caller then empties its mirror and marks the
    file format 4 in the same transaction).
    """
    if pairs:
        _insert_runs(db, pairs)
    filled = len(buffer) + len(pairs)
    if steps is None:
        steps = steps_owed(len(buffer), len(pairs))
    if steps:
        advance_merges(db, steps)
    if filled < BUFFER_KEYS:
        return False
    _flush_buffer(db)
    _start_merges(db)
    return True


def _sorted_buffer(db: sqlite3.Connection) -> tuple[bytes, np.ndarray]:
    """The buffer's keys (``seen_new`` and ``seen_runs``), joined in key order, and their positions."""
    old = db.execute("SELECT h, seq FROM seen_new").fetchall()  # files before format 3
    joined, seqs = _runs(db)
    if old:
        joined = b"".join(h for h, _ in old) + joined
        seqs = np.concatenate([np.array([s for _, s in old], dtype=np.int64), seqs])
    # sorted as SQLite compares blobs (bytes, most significant first)
    halves = np.frombuffer(joined, dtype=">u8").reshape(-1, 2)
    order = np.lexsort((halves[:, 1], halves[:, 0]))
    return np.frombuffer(joined, dtype=np.dtype((np.void, _KEY_BYTES)))[order].tobytes(), seqs[order]


def _flush_buffer(db: sqlite3.Connection) -> None:
    """Write the buffer as a new sorted run, in key order under a run number above every other (the
    rows land at the right edge of ``seen_sorted``), and empty it."""
    keys, seqs = _sorted_buffer(db)
    if seqs.size:
        run = _new_run(db)
        db.execute("INSERT INTO seen_sorted (run, h, seq) "
                   "SELECT ?1, substr(?2, 16 * key + 1, 16), value FROM json_each(?3)",
                   (run, keys, orjson.dumps(seqs, option=orjson.OPT_SERIALIZE_NUMPY)))
        db.execute("INSERT INTO seen_levels (run, level, n, last_seq) VALUES (?, ?, ?, ?)",
                   (run, _level_for(seqs.size), seqs.size, int(seqs.max())))
    db.execute("DELETE FROM seen_new")
    db.execute("DELETE FROM seen_runs")


def _new_run(db: sqlite3.Connection) -> int:
    """A run number above every existing one."""
    return db.execute("SELECT coalesce(max(run), 0) + 1 FROM seen_levels").fetchone()[0]


def _level_for(n: int) -> int:
    """The level of a new run of ``n`` keys: 0, unless it is as large as a run of a higher level
    (a first run of a long history, indexed when a file of format 1 is opened)."""
    level = 0
    while level < TOP_LEVEL and n >= BUFFER_KEYS * FANOUT ** (level + 1):
        level += 1
    return level


# ---------------------------------------------------------------- merges, one slice of the key space at a time
#
# A merge of runs into a new run ``R`` of the next level is recorded in ``seen_levels``: its sources
# get ``into_run = R``; ``R`` gets ``n`` (the sum), ``slices`` (how many slices of the key space it
# is cut into) and ``slices_done``. A step moves the source rows of the next slice (in key order, to
# the end of ``R``) and deletes them; a key is in exactly one run at any time, so lookups, which
# probe every run of ``seen_levels``, answer the same during a merge. The last step removes the
# sources from ``seen_levels``.

def _start_merges(db: sqlite3.Connection) -> None:
    """For each level below the top holding :data:`FANOUT` complete runs, start merging its oldest
    :data:`FANOUT` into a new run of the next level (a merge into that level still under way is
    finished first)."""
    for level in range(TOP_LEVEL):
        runs = _complete_runs(db, level)
        if len(runs) < FANOUT:
            continue
        for target, in db.execute("SELECT run FROM seen_levels WHERE level = ? AND slices > slices_done",
                                  (level + 1,)).fetchall():
            _finish_merge(db, target)
        n, last = db.execute(f"SELECT sum(n), max(last_seq) FROM seen_levels WHERE run IN "
                             f"({','.join('?' * FANOUT)})", runs[:FANOUT]).fetchone()
        target = _new_run(db)
        db.execute("INSERT INTO seen_levels (run, level, n, last_seq, slices) VALUES (?, ?, ?, ?, ?)",
                   (target, level + 1, n, last, -(-n // SLICE_KEYS)))
        db.executemany("UPDATE seen_levels SET into_run = ? WHERE run = ?", [(target, r) for r in runs[:FANOUT]])


def _complete_runs(db: sqlite3.Connection, level: int) -> list[int]:
    """The runs of ``level`` not being merged away nor still being filled, oldest first."""
    return [r[0] for r in db.execute("SELECT run FROM seen_levels WHERE level = ? AND into_run IS NULL "
                                     "AND slices = slices_done ORDER BY run", (level,))]


def merges_under_way(db: sqlite3.Connection) -> int:
    """How many merges have slices left to move."""
    return db.execute("SELECT count(*) FROM seen_levels WHERE slices > slices_done").fetchone()[0]


def advance_merges(db: sqlite3.Connection, steps: int) -> bool:
    """Move up to ``steps`` slices of every merge under way (inside the caller's transaction); return
    whether a merge is still under way afterwards."""
    pending = db.execute("SELECT run, slices, slices_done FROM seen_levels WHERE slices > slices_done "
                         "ORDER BY run").fetchall()
    left = False
    for target, slices, done in pending:
        for part in range(done, min(slices, done + steps)):
            _move_slice(db, target, part, slices)
        left = left or done + steps < slices
    return left


def _finish_merge(db: sqlite3.Connection, target: int) -> None:
    """Move every slice left of the merge into ``target``."""
    slices, done = db.execute("SELECT slices, slices_done FROM seen_levels WHERE run = ?", (target,)).fetchone()
    for part in range(done, slices):
        _move_slice(db, target, part, slices)


def _slice_bounds(part: int, slices: int) -> tuple[bytes, bytes]:
    """Slice ``part`` of ``slices`` equal shares of the key space, as ``[low, high)`` (keys are
    uniform hashes, so each share holds about the same number); the last one ends above every key."""
    def edge(k: int) -> bytes:
        return (k * 2**64 // slices).to_bytes(8, "big") + bytes(8) if k < slices else b"\xff" * 17
    return edge(part), edge(part + 1)


def _move_slice(db: sqlite3.Connection, target: int, part: int, slices: int) -> None:
    """Move the source rows of one slice into ``target`` in key order; after the last slice, drop the
    sources from the manifest."""
    low, high = _slice_bounds(part, slices)
    where = "run IN (SELECT run FROM seen_levels WHERE into_run = ?1) AND h >= ?2 AND h < ?3"
    db.execute(f"INSERT INTO seen_sorted (run, h, seq) SELECT ?1, h, seq FROM seen_sorted WHERE {where} "
               "ORDER BY h", (target, low, high))
    db.execute(f"DELETE FROM seen_sorted WHERE {where}", (target, low, high))
    db.execute("UPDATE seen_levels SET slices_done = ? WHERE run = ?", (part + 1, target))
    if part + 1 == slices:
        db.execute("DELETE FROM seen_levels WHERE into_run = ?", (target,))


def _insert_runs(db: sqlite3.Connection, pairs: list[tuple[bytes, int]]) -> None:
    """One ``seen_runs`` row per run of consecutive positions among ``pairs`` (in their order)."""
    seqs = np.fromiter(map(itemgetter(1), pairs), dtype=np.int64, count=len(pairs))
    cuts = (np.flatnonzero(np.diff(seqs) != 1) + 1).tolist()
    for lo, hi in zip([0, *cuts], [*cuts, len(pairs)]):
        blob = b"".join(map(itemgetter(0), pairs[lo:hi]))
        if len(blob) != _KEY_BYTES * (hi - lo):
            raise ValueError("every key must be 16 bytes (id_key)")
        db.execute("INSERT INTO seen_runs (seq, keys) VALUES (?, ?)", (int(seqs[lo]), blob))


def number_events(keys: list[bytes | None], known: set[bytes], first_seq: int) -> tuple[list[int], list]:
    """Number one item's events: a duplicate (a key in ``known``, which grows with this item's new
    keys) gets no position, the others consecutive positions from ``first_seq`` in order. Events
    without an id (``None`` key) are never duplicates.

    Returns ``(dups, new_pairs)``: the positions in ``keys`` of the duplicates, ascending, and the
    ``(key, seq)`` pairs of the new events with an id. Event ``k`` then has position
    ``first_seq + k - (duplicates before k)``.

    The common item (every event has an id, none seen before, none repeated) is recognised with a
    few set operations and numbered as one range; any other item goes through the rule one event
    at a time (the same answer: ``tests/service/storage/test_numbering.py``).
    """
    n = len(keys)
    if known.isdisjoint(keys) and None not in keys:
        fresh = set(keys)
        if len(fresh) == n:
            known |= fresh
            return [], list(zip(keys, range(first_seq, first_seq + n)))
    dups: list[int] = []
    pairs: list[tuple[bytes, int]] = []
    seq = first_seq
    for k, key in enumerate(keys):
        if key is not None:
            if key in known:
                dups.append(k)
                continue
            known.add(key)
            pairs.append((key, seq))
        seq += 1
    return dups, pairs
