"""The deduplication index: every event id ever journaled, as a 128-bit hash in an indexed table.

An id that was accepted once is a duplicate forever, however long ago and whatever the journal kept:
the index lives in the journal database next to the rows (``seen``) and is never pruned with them.
It is keyed by ``id_key(id)``, the 16-byte BLAKE2b digest of the id's UTF-8 bytes, so

* ids are compared as bytes, never through SQLite's text or JSON functions (an id holding U+0000 is
  an id like any other);
* a row costs about the same whatever the id's length (measured in ``benchmarks/dedup.py``);
* memory stays bounded: lookups go through SQLite's page cache (a fixed size), not a Python dict.

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

__all__ = ["SCHEMA", "id_key", "insert_keys", "known_keys", "number_events"]

SCHEMA = "CREATE TABLE IF NOT EXISTS seen (h BLOB PRIMARY KEY, seq INTEGER NOT NULL) WITHOUT ROWID;"

#: bound parameters per lookup statement (SQLite allows 32,766 since 3.32)
_LOOKUP_CHUNK = 4000


def id_key(ident: str) -> bytes:
    """The 16-byte index key of an event id (BLAKE2b-128 of its UTF-8 bytes)."""
    return hashlib.blake2b(ident.encode("utf-8", "surrogatepass"), digest_size=16).digest()


def known_keys(db: sqlite3.Connection, keys: list[bytes]) -> set[bytes]:
    """The subset of ``keys`` already in the index (primary-key lookups in chunks)."""
    found: set[bytes] = set()
    for i in range(0, len(keys), _LOOKUP_CHUNK):
        part = keys[i:i + _LOOKUP_CHUNK]
        marks = ",".join("?" * len(part))
        found.update(r[0] for r in db.execute(f"SELECT h FROM seen WHERE h IN ({marks})", part))
    return found


def insert_keys(db: sqlite3.Connection, pairs: Iterable[tuple[bytes, int]]) -> None:
    """Add ``(key, seq)`` pairs (inside the caller's transaction)."""
    db.executemany("INSERT INTO seen (h, seq) VALUES (?, ?)", pairs)


def number_events(keys: list[bytes | None], known: set[bytes], first_seq: int) -> tuple[list, list]:
    """Journal positions for one item's events: ``None`` for a duplicate (a key in ``known``, which
    grows with this item's new keys) and consecutive positions from ``first_seq`` for the others.

    Returns ``(seqs, new_pairs)``; events without an id (``None`` key) are never duplicates.
    """
    seqs: list = []
    pairs: list[tuple[bytes, int]] = []
    seq = first_seq
    for key in keys:
        if key is not None:
            if key in known:
                seqs.append(None)
                continue
            known.add(key)
            pairs.append((key, seq))
        seqs.append(seq)
        seq += 1
    return seqs, pairs
