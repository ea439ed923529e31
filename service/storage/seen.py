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

Two levels keep the writes small. New keys are appended to ``seen_new``, a table in insertion
order without an index (a commit writes only its tail pages), and mirrored in memory for lookups.
When it holds :data:`BUFFER_KEYS` keys, the commit that filled it moves them into ``seen``, the
indexed table (``h`` is its primary key), in one sorted pass. Inserting random 128-bit keys one
commit at a time into a large B-tree instead dirties about one page (4 KiB) per new id in every
commit once the index outgrows the commit (measured in ``benchmarks/dedup.py``); the buffer turns
that into one pass over the touched pages per :data:`BUFFER_KEYS` ids.

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
from collections.abc import Iterable
from itertools import chain

__all__ = ["BUFFER_KEYS", "SCHEMA", "id_key", "insert_keys", "known_keys", "load_buffer", "number_events"]

SCHEMA = ("CREATE TABLE IF NOT EXISTS seen (h BLOB PRIMARY KEY, seq INTEGER NOT NULL) WITHOUT ROWID;\n"
          "CREATE TABLE IF NOT EXISTS seen_new (h BLOB NOT NULL, seq INTEGER NOT NULL);")

#: keys buffered in ``seen_new`` (and in memory, about 100 bytes each) before they move to ``seen``
BUFFER_KEYS = 65_536

#: bound parameters per lookup statement (SQLite allows 32,766 since 3.32)
_LOOKUP_CHUNK = 4000


def id_key(ident: str) -> bytes:
    """The 16-byte index key of an event id (BLAKE2b-128 of its UTF-8 bytes)."""
    return hashlib.blake2b(ident.encode("utf-8", "surrogatepass"), digest_size=16).digest()


def load_buffer(db: sqlite3.Connection) -> set[bytes]:
    """The keys in ``seen_new`` (at open: the in-memory mirror of the buffer)."""
    return {r[0] for r in db.execute("SELECT h FROM seen_new")}


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
    """Add ``(key, seq)`` pairs inside the caller's transaction; ``buffer`` is the mirror of
    ``seen_new`` *before* them, and is not changed (the caller updates it once the commit holds).

    Returns whether the buffer was moved into ``seen`` (the caller then empties its mirror).
    """
    _insert_pairs(db, pairs)
    if len(buffer) + len(pairs) < BUFFER_KEYS:
        return False
    db.execute("INSERT INTO seen (h, seq) SELECT h, seq FROM seen_new ORDER BY h")
    db.execute("DELETE FROM seen_new")
    return True


def _insert_pairs(db: sqlite3.Connection, pairs: list[tuple[bytes, int]]) -> None:
    """``INSERT INTO seen_new`` of ``pairs``, in their order, in statements of many rows each.

    A row per statement (``executemany``) costs about 3 us of CPU per key with the commit; a
    statement of 256 rows about half of that (measured, 500 keys per commit). The statement sizes are
    powers of two, so that a few prepared statements (the sqlite3 module caches them) cover any count.
    """
    flat = list(chain.from_iterable(pairs))  # key, seq, key, seq, ...: each statement binds a slice
    at = 0
    for size in _ROW_RUNS:
        while len(pairs) - at >= size:
            db.execute(_INSERT_SQL[size], flat[2 * at:2 * (at + size)])
            at += size


#: rows per insert statement, largest first (256 rows bind 512 parameters, far below SQLite's limit)
_ROW_RUNS = (256, 64, 16, 4, 1)
_INSERT_SQL = {n: "INSERT INTO seen_new (h, seq) VALUES " + ",".join(("(?, ?)",) * n) for n in _ROW_RUNS}


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
