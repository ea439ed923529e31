"""The deduplication index: every event id ever journaled, as a 128-bit hash in an indexed table.

An id that was accepted once is a duplicate forever, however long ago and whatever the journal kept:
the index lives in the journal database next to the rows (``seen``) and is never pruned with them.
It is keyed by ``id_key(id)``, the 16-byte BLAKE2b digest of the id's UTF-8 bytes, so

* ids are compared as bytes, never through SQLite's text or JSON functions (an id holding U+0000 is
  an id like any other);
* a row costs about the same whatever the id's length (measured in ``benchmarks/dedup.py``);
* memory stays bounded: lookups go through SQLite's page cache (a fixed size), a buffer of at
  most :data:`BUFFER_KEYS` recent keys and a Bloom filter of 8-32 MiB that rules out most new ids
  before any lookup (:mod:`service.storage.keyfilter`), not a dict of every id.

Two levels keep the writes small. New keys are appended to ``seen_runs``, a table in insertion
order without an index (a commit writes only its tail pages), and mirrored in memory for lookups:
one row per *run*, the keys of consecutive journal positions joined into one blob (``keys``, 16
bytes each) with the position of the first (``seq``). An item's new events are numbered in a row,
so a commit of a 500-event body writes one row of 8 KB instead of 500 rows (about 1 us of CPU
per key less in the commit, measured at 500 keys per commit; ``benchmarks/README.md``). When the
buffer holds :data:`BUFFER_KEYS` keys, the commit that filled it moves them into ``seen``, the
indexed table (``h`` is its primary key), in one sorted pass. Inserting random 128-bit keys one
commit at a time into a large B-tree instead dirties about one page (4 KiB) per new id in every
commit once the index outgrows the commit (measured in ``benchmarks/dedup.py``); the buffer turns
that into one pass over the touched pages per :data:`BUFFER_KEYS` ids.

Files of journal format 1 and 2 buffered keys one row each in ``seen_new (h, seq)``; such rows
are still read (they belong to the buffer) and move into ``seen`` with the runs. The first run
written marks the file format 3 (:mod:`service.storage.journal`), which the versions before refuse.

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

__all__ = ["BUFFER_KEYS", "SCHEMA", "buffered_count", "id_key", "index_pairs", "insert_keys", "known_keys",
           "last_position", "load_buffer", "number_events"]

SCHEMA = ("CREATE TABLE IF NOT EXISTS seen (h BLOB PRIMARY KEY, seq INTEGER NOT NULL) WITHOUT ROWID;\n"
          "CREATE TABLE IF NOT EXISTS seen_new (h BLOB NOT NULL, seq INTEGER NOT NULL);\n"
          "CREATE TABLE IF NOT EXISTS seen_runs (seq INTEGER NOT NULL, keys BLOB NOT NULL);")

#: keys buffered in ``seen_runs`` (and in memory, about 100 bytes each) before they move to ``seen``
BUFFER_KEYS = 65_536

#: bound parameters per lookup statement (SQLite allows 32,766 since 3.32)
_LOOKUP_CHUNK = 4000
_KEY_BYTES = 16


def id_key(ident: str) -> bytes:
    """The 16-byte index key of an event id (BLAKE2b-128 of its UTF-8 bytes)."""
    return hashlib.blake2b(ident.encode("utf-8", "surrogatepass"), digest_size=16).digest()


def _runs(db: sqlite3.Connection) -> tuple[bytes, np.ndarray]:
    """The keys of ``seen_runs``, joined in insertion order, and their positions."""
    blobs, seqs = [], []
    for seq, blob in db.execute("SELECT seq, keys FROM seen_runs ORDER BY rowid"):
        blobs.append(blob)
        seqs.append(np.arange(seq, seq + len(blob) // _KEY_BYTES, dtype=np.int64))
    return b"".join(blobs), np.concatenate(seqs) if seqs else np.zeros(0, dtype=np.int64)


def _split(joined: bytes) -> list[bytes]:
    return [joined[i:i + _KEY_BYTES] for i in range(0, len(joined), _KEY_BYTES)]


def load_buffer(db: sqlite3.Connection) -> set[bytes]:
    """The keys not yet in ``seen``: the rows of ``seen_new`` (files before format 3) and the runs
    (at open: the in-memory mirror of the buffer)."""
    return {r[0] for r in db.execute("SELECT h FROM seen_new")} | set(_split(_runs(db)[0]))


def buffered_count(db: sqlite3.Connection) -> int:
    """How many keys the buffer holds."""
    return db.execute("SELECT (SELECT count(*) FROM seen_new) + "
                      "(SELECT coalesce(sum(length(keys)), 0) FROM seen_runs) / 16").fetchone()[0]


def last_position(db: sqlite3.Connection) -> int:
    """The highest journal position the index holds a key for (0 when it holds none)."""
    return db.execute("SELECT max(coalesce((SELECT max(seq) FROM seen), 0), "
                      "coalesce((SELECT max(seq) FROM seen_new), 0), "
                      "coalesce((SELECT max(seq + length(keys) / 16 - 1) FROM seen_runs), 0))").fetchone()[0]


def index_pairs(db: sqlite3.Connection) -> list[tuple[bytes, int]]:
    """Every ``(key, position)`` of the index, indexed and buffered (for tests and inspection)."""
    joined, seqs = _runs(db)
    return db.execute("SELECT h, seq FROM seen UNION ALL SELECT h, seq FROM seen_new").fetchall() + \
        list(zip(_split(joined), seqs.tolist()))


def known_keys(db: sqlite3.Connection, buffer: set[bytes], keys: list[bytes]) -> set[bytes]:
    """The subset of ``keys`` already in the index: the buffer, then primary-key lookups in chunks."""
    found = {k for k in keys if k in buffer}
    keys = [k for k in keys if k not in found]
    for i in range(0, len(keys), _LOOKUP_CHUNK):
        part = keys[i:i + _LOOKUP_CHUNK]
        marks = ",".join("?" * len(part))
        found.update(r[0] for r in db.execute(f"SELECT h FROM seen WHERE h IN ({marks})", part))
    return found


def insert_keys(db: sqlite3.Connection, buffer: set[bytes], pairs: list[tuple[bytes, int]]) -> bool:
    """Add ``(key, seq)`` pairs inside the caller's transaction; ``buffer`` is the mirror of the
    buffer *before* them, and is not changed (the caller updates it once the commit holds).

    Returns whether the buffer was moved into ``seen`` (the caller then empties its mirror).
    """
    if pairs:
        _insert_runs(db, pairs)
    if len(buffer) + len(pairs) < BUFFER_KEYS:
        return False
    db.execute("INSERT INTO seen (h, seq) SELECT h, seq FROM seen_new ORDER BY h")  # files before format 3
    db.execute("DELETE FROM seen_new")
    joined, seqs = _runs(db)
    if joined:
        # sorted as SQLite compares blobs (bytes, most significant first): one pass over the B-tree
        halves = np.frombuffer(joined, dtype=">u8").reshape(-1, 2)
        order = np.lexsort((halves[:, 1], halves[:, 0]))
        sorted_keys = np.frombuffer(joined, dtype=np.dtype((np.void, _KEY_BYTES)))[order].tobytes()
        db.execute("INSERT INTO seen (h, seq) SELECT substr(?1, 16 * key + 1, 16), value FROM json_each(?2)",
                   (sorted_keys, orjson.dumps(seqs[order], option=orjson.OPT_SERIALIZE_NUMPY)))
    db.execute("DELETE FROM seen_runs")
    return True


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
