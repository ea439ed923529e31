"""The durable journal of accepted events and the engine checkpoints, in one SQLite file (WAL mode).

Tables:

* ``journal(seq INTEGER PRIMARY KEY, id TEXT UNIQUE, kind INTEGER, payload BLOB)``: everything that
  changes the engine, in the order it is applied. ``kind`` 0 is an event (``payload`` is the
  validated event as orjson), 1 a note of input rejected at the boundary (``[rejected, total, ts]``,
  it feeds the monitor's rejected-burst rule), 2 an operator rollback (``{"reason": ...}``). Replaying
  the rows in ``seq`` order through :meth:`Engine.apply` rebuilds the engine bit for bit.
* ``checkpoints(id, seq, created, digest, state_digest, blob)``: ``blob`` is ``Engine.to_bytes()``
  after applying every row up to ``seq``; ``digest`` is the SHA-256 of the blob, checked on load so a
  corrupt or truncated checkpoint is detected and an older one used.
* ``incidents`` (service incidents that must outlive a restart, such as a corrupt checkpoint) and
  ``meta`` (the fingerprint of the learning config the journal belongs to).

Durability: with ``synchronous=FULL`` (the default, ``service.journal_sync``) SQLite fsyncs the WAL
on every commit, so an event acknowledged after :meth:`Journal.append` returns survives a process
crash, an OS crash and power loss. ``synchronous=NORMAL`` in WAL mode still survives a process crash
(SIGKILL): the commit is in the OS page cache; only an OS crash or power loss can lose it.

The class is synchronous; the service calls it from one dedicated thread so the event loop never
waits on SQLite. A lock makes it safe to call from tests as well.
"""

from __future__ import annotations

import hashlib
import sqlite3
import threading
import time
from pathlib import Path

import orjson

from service.config import ConfigError

__all__ = ["EVENT", "NOTE", "ROLLBACK", "Checkpoint", "Journal", "fingerprint"]

EVENT, NOTE, ROLLBACK = 0, 1, 2
FILE_NAME = "trimtab.sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS journal (seq INTEGER PRIMARY KEY, id TEXT UNIQUE, kind INTEGER NOT NULL,
                                    payload BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS checkpoints (id INTEGER PRIMARY KEY AUTOINCREMENT, seq INTEGER NOT NULL,
                                        created REAL NOT NULL, digest TEXT NOT NULL,
                                        state_digest TEXT NOT NULL, blob BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS incidents (n INTEGER PRIMARY KEY AUTOINCREMENT, ts REAL NOT NULL,
                                      kind TEXT NOT NULL, reason TEXT NOT NULL, evidence BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
"""

# an event payload is [id, ts, features, target]; its id goes to the UNIQUE column
_INSERT_RUN = ("INSERT INTO journal (seq, id, kind, payload) SELECT ?1 + key, json_extract(value, '$[0]'), 0, "
               "CAST(value AS BLOB) FROM json_each(?2)")


def fingerprint(config) -> str:
    """SHA-256 of the settings that decide learned state; a journal only continues under the same."""
    d = config.resolved()
    keep = {k: d[k] for k in ("features", "model", "constraint", "steps", "averaging", "monitor")}
    return hashlib.sha256(orjson.dumps(keep, option=orjson.OPT_SORT_KEYS)).hexdigest()


class Checkpoint(tuple):
    """``(id, seq, created, digest, state_digest, size)`` of a stored checkpoint."""

    __slots__ = ()

    def as_dict(self) -> dict:
        return dict(zip(("id", "seq", "created", "digest", "state_digest", "bytes"), self))


class Journal:
    """The SQLite file ``data_dir/trimtab.sqlite``.

    Parameters
    ----------
    data_dir
        Folder for the file (created if missing).
    sync
        ``"full"`` or ``"normal"``: SQLite's ``synchronous`` setting (see the module docstring).
    """

    def __init__(self, data_dir: str | Path, *, sync: str = "full") -> None:
        if sync not in ("full", "normal"):
            raise ConfigError(f"invalid value {sync!r}; valid values are 'full', 'normal'",
                              where="service.journal_sync")
        self.path = Path(data_dir) / FILE_NAME
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.Lock()
        self._db = sqlite3.connect(self.path, check_same_thread=False, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute(f"PRAGMA synchronous={sync.upper()}")
        self._db.executescript(_SCHEMA)

    # ---------------------------------------------------------------- setup
    def claim(self, config_fingerprint: str) -> None:
        """Bind the file to a learning config; refuse a file written under another one."""
        with self._lock:
            row = self._db.execute("SELECT value FROM meta WHERE key = 'fingerprint'").fetchone()
            if row is None:
                self._db.execute("INSERT INTO meta VALUES ('fingerprint', ?)", (config_fingerprint,))
            elif row[0] != config_fingerprint:
                raise ConfigError(f"{self.path} holds the journal of another learning config (its [features], "
                                  "[model], [constraint], [steps], [averaging] or [monitor] differ); use a "
                                  "new data_dir", where="service.data_dir")

    def ids(self) -> dict[str, int]:
        """Event id -> seq for every journaled event (the deduplication index), in seq order."""
        with self._lock:
            cur = self._db.execute("SELECT id, seq FROM journal WHERE id IS NOT NULL ORDER BY seq")
            return dict(cur.fetchall())

    def last_seq(self) -> int:
        with self._lock:
            row = self._db.execute("SELECT max(seq) FROM journal").fetchone()
            cps = self._db.execute("SELECT max(seq) FROM checkpoints").fetchone()
        return max(row[0] or 0, cps[0] or 0)

    # ---------------------------------------------------------------- the journal
    def append(self, parts: list[tuple]) -> None:
        """Commit rows in one transaction (all or none).

        Each part is a row ``(seq, id, kind, payload)`` or a run of events ``(first_seq, [payload, ...])``
        numbered from ``first_seq``. A run is inserted by one statement that unpacks a JSON array
        inside SQLite (``json_each``): the GIL stays released for the whole insert, instead of being
        taken back for every row as ``executemany`` does, so parsing and learning go on meanwhile.
        """
        if not parts:
            return
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                for part in parts:
                    if len(part) == 2:
                        run = b"[" + b",".join(part[1]) + b"]"
                        self._db.execute(_INSERT_RUN, (part[0], run.decode()))
                    else:
                        self._db.execute("INSERT INTO journal VALUES (?, ?, ?, ?)", part)
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise

    def rows_after(self, seq: int, limit: int = 5000) -> list[tuple]:
        """Up to ``limit`` rows with a position above ``seq``, in order."""
        with self._lock:
            return self._db.execute("SELECT seq, id, kind, payload FROM journal WHERE seq > ? ORDER BY seq LIMIT ?",
                                    (seq, limit)).fetchall()

    def count(self) -> int:
        with self._lock:
            return self._db.execute("SELECT count(*) FROM journal").fetchone()[0]

    # ---------------------------------------------------------------- checkpoints
    def write_checkpoint(self, seq: int, blob: bytes, state_digest: str, keep: int,
                         prune: bool = True) -> tuple[Checkpoint, int]:
        """Store a checkpoint, keep the newest ``keep`` and (``prune``) delete the journal rows up to the
        oldest kept one, in one transaction. Returns the checkpoint and the position pruned to."""
        digest = hashlib.sha256(blob).hexdigest()
        created = time.time()
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                cur = self._db.execute("INSERT INTO checkpoints (seq, created, digest, state_digest, blob) "
                                       "VALUES (?, ?, ?, ?, ?)", (seq, created, digest, state_digest, blob))
                ck_id = cur.lastrowid
                self._db.execute("DELETE FROM checkpoints WHERE id NOT IN "
                                 "(SELECT id FROM checkpoints ORDER BY id DESC LIMIT ?)", (keep,))
                oldest = self._db.execute("SELECT min(seq) FROM checkpoints").fetchone()[0] if prune else 0
                self._db.execute("DELETE FROM journal WHERE seq <= ?", (oldest,))
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
        return Checkpoint((ck_id, seq, created, digest, state_digest, len(blob))), oldest

    def checkpoints(self) -> list[Checkpoint]:
        """Stored checkpoints, newest first (without their blobs)."""
        with self._lock:
            cur = self._db.execute("SELECT id, seq, created, digest, state_digest, length(blob) FROM checkpoints "
                                   "ORDER BY id DESC")
            return [Checkpoint(r) for r in cur.fetchall()]

    def load_checkpoint(self, ck_id: int) -> tuple[int, bytes, bool]:
        """``(seq, blob, digest_ok)`` of one checkpoint."""
        with self._lock:
            seq, digest, blob = self._db.execute("SELECT seq, digest, CAST(blob AS BLOB) FROM checkpoints "
                                                 "WHERE id = ?", (ck_id,)).fetchone()
        blob = bytes(blob)
        return seq, blob, hashlib.sha256(blob).hexdigest() == digest

    # ---------------------------------------------------------------- incidents
    def add_incident(self, kind: str, reason: str, evidence: dict) -> dict:
        ts = time.time()
        with self._lock:
            self._db.execute("INSERT INTO incidents (ts, kind, reason, evidence) VALUES (?, ?, ?, ?)",
                             (ts, kind, reason, orjson.dumps(evidence)))
        return {"kind": kind, "ts": ts, "reason": reason, "evidence": evidence}

    def incidents(self, limit: int = 1000) -> list[dict]:
        with self._lock:
            cur = self._db.execute("SELECT ts, kind, reason, evidence FROM incidents ORDER BY n DESC LIMIT ?",
                                   (limit,))
            rows = cur.fetchall()
        return [{"kind": k, "ts": ts, "reason": r, "evidence": orjson.loads(e)} for ts, k, r, e in reversed(rows)]

    def close(self) -> None:
        with self._lock:
            self._db.close()
