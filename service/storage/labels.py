"""The delayed-label store: features of scored events kept until their label arrives.

``POST /v1/score`` with an ``id`` and ``"remember": true`` keeps the validated features; a later
``POST /v1/labels`` entry ``{"id": ..., "target": ...}`` turns them into a learning event that goes
through the journal like any other. The store is

* bounded: at most ``service.remember_limit`` entries; past that the oldest expired entries go
  first, then the oldest live ones (counted as evicted);
* expiring: an entry older than ``service.remember_ttl_s`` is expired; a label for it is refused as
  expired (not learned: the features may no longer describe the world the label belongs to). The
  expired entry is kept as a tombstone for one more TTL so the refusal can say "expired" rather than
  "unknown", then dropped;
* persisted: in ``data_dir/labels.sqlite`` (its own file, so its writes never wait behind a large
  journal commit), written before ``/v1/score`` answers ``"remembered"``.
"""

from __future__ import annotations

import logging
import sqlite3
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from pathlib import Path
from typing import NamedTuple

import orjson

from service.errors import JournalUnavailable
from service.storage.health import storage_fault

__all__ = ["LabelStore", "Remembered"]

FILE_NAME = "labels.sqlite"

log = logging.getLogger("trimtab.service")


class Remembered(NamedTuple):
    """A remembered event: when it was scored, when it expires, its time stamp and features."""

    scored_at: float
    expires_at: float
    ts: float | None
    features: dict


class LabelStore:
    """Remembered features by event id.

    Parameters
    ----------
    data_dir
        Folder of ``labels.sqlite``.
    ttl
        Seconds an entry stays usable.
    limit
        Entries kept at most (live and expired together).
    sync
        SQLite ``synchronous`` (``"full"`` or ``"normal"``), as for the journal.
    clock
        Source of the current time (seconds); tests pass their own.
    """

    def __init__(self, data_dir: str | Path, *, ttl: float, limit: int, sync: str = "full",
                 clock: Callable[[], float] = time.time) -> None:
        self.ttl = float(ttl)
        self.limit = int(limit)
        self.clock = clock
        self.evicted = 0
        self._lock = threading.Lock()
        path = Path(data_dir) / FILE_NAME
        path.parent.mkdir(parents=True, exist_ok=True)
        self._db = sqlite3.connect(path, check_same_thread=False, isolation_level=None)
        # as for the journal: no mapped database pages, so a failing disk is an error, never a SIGBUS
        self._db.execute("PRAGMA mmap_size=0")
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute(f"PRAGMA synchronous={'FULL' if sync == 'full' else 'NORMAL'}")
        self._db.execute("CREATE TABLE IF NOT EXISTS remembered (id TEXT PRIMARY KEY, scored_at REAL NOT NULL, "
                         "expires_at REAL NOT NULL, ts REAL, features BLOB NOT NULL)")
        # insertion order = scoring order, so the dict's front holds the oldest entries
        self._items: dict[str, Remembered] = {}
        for ident, scored, expires, ts, feats in self._db.execute(
                "SELECT id, scored_at, expires_at, ts, features FROM remembered ORDER BY scored_at"):
            self._items[ident] = Remembered(scored, expires, ts, orjson.loads(feats))
        self.sweep()

    def __len__(self) -> int:
        return len(self._items)

    def remember(self, entries: list[tuple[str, float | None, dict]]) -> int:
        """Keep ``(id, ts, features)`` entries durably; returns how many older entries were evicted.

        Raises
        ------
        JournalUnavailable
            The write failed on a storage fault (disk full, read-only, ...): nothing was remembered
            and the entries in memory are as before.
        """
        now = self.clock()
        rows, prior = [], {}
        with self._lock:
            for ident, ts, feats in entries:
                item = Remembered(now, now + self.ttl, ts, feats)
                prior.setdefault(ident, self._items.pop(ident, None))
                self._items[ident] = item
                rows.append((ident, item.scored_at, item.expires_at, ts, orjson.dumps(feats)))
            evicted = self.evicted
            drop = self._overflow(now, prior)
            self._db.execute("BEGIN IMMEDIATE")
            try:
                self._db.executemany("INSERT OR REPLACE INTO remembered VALUES (?, ?, ?, ?, ?)", rows)
                self._db.executemany("DELETE FROM remembered WHERE id = ?", [(k,) for k in drop])
                self._db.execute("COMMIT")
            except Exception as exc:
                if self._db.in_transaction:
                    with suppress(sqlite3.Error):
                        self._db.execute("ROLLBACK")
                for ident, old in prior.items():  # memory as before the request (order aside)
                    self._items.pop(ident, None)
                    if old is not None:
                        self._items[ident] = old
                self.evicted = evicted
                reason = storage_fault(exc)
                if reason is None:
                    raise
                raise JournalUnavailable(f"the features were not remembered: {reason}; retry later",
                                         where="storage") from exc
        return len(drop)

    def _overflow(self, now: float, dropped: dict) -> list[str]:
        """Entries to drop so that at most ``limit`` stay: expired ones first, then the oldest (each
        dropped entry goes into ``dropped`` unless it is there already, to undo a failed write)."""
        excess = len(self._items) - self.limit
        if excess <= 0:
            return []
        drop = [k for k, v in self._items.items() if v.expires_at <= now][:excess]
        if len(drop) < excess:
            chosen = set(drop)
            live = (k for k in self._items if k not in chosen)
            evict = [k for _, k in zip(range(excess - len(drop)), live)]
            self.evicted += len(evict)
            drop += evict
        for k in drop:
            dropped.setdefault(k, self._items.pop(k))
        return drop

    def lookup(self, ident: str) -> tuple[str, Remembered | None]:
        """``("ok", entry)``, ``("expired", entry)`` or ``("unknown", None)``."""
        with self._lock:
            item = self._items.get(ident)
        if item is None:
            return "unknown", None
        if self.clock() >= item.expires_at:
            return "expired", item
        return "ok", item

    def forget(self, ids: list[str]) -> None:
        """Drop entries whose labels were learned."""
        with self._lock:
            for k in ids:
                self._items.pop(k, None)
            try:
                self._db.executemany("DELETE FROM remembered WHERE id = ?", [(k,) for k in ids])
            except sqlite3.Error as exc:  # the labels are learned already; a stale row is harmless
                if storage_fault(exc) is None:
                    raise
                log.warning("learned labels stay in %s until the storage recovers: %s", FILE_NAME, exc)

    def sweep(self) -> int:
        """Drop tombstones older than one more TTL; returns how many went."""
        cutoff = self.clock() - self.ttl
        with self._lock:
            gone = [k for k, v in self._items.items() if v.expires_at <= cutoff]
            for k in gone:
                del self._items[k]
            try:
                self._db.execute("DELETE FROM remembered WHERE expires_at <= ?", (cutoff,))
            except sqlite3.Error as exc:  # the next sweep deletes them
                if storage_fault(exc) is None:
                    raise
                log.warning("expired entries stay in %s until the storage recovers: %s", FILE_NAME, exc)
        return len(gone)

    def counts(self) -> dict:
        now = self.clock()
        with self._lock:
            expired = sum(1 for v in self._items.values() if v.expires_at <= now)
        return {"live": len(self._items) - expired, "expired": expired, "evicted": self.evicted}

    def close(self) -> None:
        with self._lock:
            self._db.close()
