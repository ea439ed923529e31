"""The durable journal of accepted events and the engine checkpoints, in one SQLite file (WAL mode).

Tables:

* ``journal(seq INTEGER PRIMARY KEY, id TEXT, kind INTEGER, payload BLOB)``: everything that
  changes the engine, in the order it is applied. ``kind`` 0 is an event (``payload`` is the
  validated event as orjson, ``id`` its id for readers of the file), 1 a note of input rejected at
  the boundary (``[rejected, total, ts]``, it feeds the monitor's rejected-burst rule), 2 an operator
  rollback (``{"reason": ...}``), 3 the accepted lines of one NDJSON body (``payload``: the lines,
  each followed by a newline; ``id`` null): the row stands for as many consecutive positions as it
  has lines and ``seq`` is the *last* of them (:func:`first_position`). Replaying the rows in
  ``seq`` order through :meth:`Engine.apply` rebuilds the engine bit for bit.
* ``seen_runs(seq, keys)``, ``seen_sorted(run, h, seq)`` and ``seen_levels(run, level, n, last_seq)``
  (and, in files of earlier formats, ``seen(h, seq)`` and ``seen_new(h, seq)``): the deduplication
  index over the whole history, its buffer and its sorted runs (:mod:`service.storage.seen`); never
  pruned. A Bloom filter of its keys (:mod:`service.storage.keyfilter`), built at open and kept up
  to date by every commit, lets most new ids skip the index lookup.
* ``checkpoints(id, seq, created, digest, state_digest, blob)``: ``blob`` is a checkpoint in the
  format of :mod:`service.storage.checkpoint` after applying every row up to ``seq``; ``digest`` is
  the SHA-256 of the blob, checked on load so a corrupt or truncated checkpoint is detected and an
  older one used.
* ``checks(event, record)``: the check records of the service's engine (the live page's series),
  each stored once beside the checkpoints (:func:`service.storage.checkpoint.store_checks`).
* ``incidents`` (service incidents that must outlive a restart, such as a corrupt checkpoint) and
  ``meta`` (the fingerprint of the learning config the journal belongs to, ``pruned_to``: the
  last position deleted from ``journal``, absent while it holds the whole history, and
  ``journal_format``).

Format versions (``meta.journal_format``): 1 (the key absent) has event, note and rollback rows
only; 2 adds the rows of lines (kind 3); 3 buffers new id keys as runs of positions in ``seen_runs``
instead of one row each in ``seen_new`` (rows left in ``seen_new`` are still read); 4 keeps the
index in sorted runs (``seen_sorted``, ``seen_levels``) instead of moving the buffer into ``seen``,
which is read but no longer written (:mod:`service.storage.seen`). A new file is marked 4 when it
is created; an older file is marked 3 at its first row of lines or id key and 4 in the transaction
that writes its first sorted run, so until then the versions before read it. A file of a format
above :data:`JOURNAL_FORMAT` is refused at open with a message saying so.

Durability: with ``synchronous=FULL`` (the default, ``service.journal_sync``) SQLite fsyncs the WAL
on every commit, so an event acknowledged after :meth:`Journal.append` returns survives a process
crash, an OS crash and power loss. ``synchronous=NORMAL`` in WAL mode still survives a process crash
(SIGKILL): the commit is in the OS page cache; only an OS crash or power loss can lose it.

The connection sets ``mmap_size=0``: database pages are read with ``read()``, never through a memory
map, so a file that shrinks or a disk that fails mid-run gives an error (an answer), not a SIGBUS.
(SQLite still maps the small ``-shm`` index of the WAL, but it allocates each of its pages with a
real write before mapping it, so a full disk is an error there too.) The data-dir lock
(:mod:`service.storage.dirlock`) is taken first, so a second process fails with a message naming
the holder instead of writing alongside.

The class is synchronous; the service calls it from one dedicated thread so the event loop never
waits on SQLite. A lock makes it safe to call from tests as well.
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
import threading
import time
from contextlib import suppress
from operator import itemgetter
from pathlib import Path

import numpy as np
import orjson

from models import TrimtabError

from service.config_common import ConfigError, fingerprint
from service.storage import seen
from service.storage.dirlock import DataDirLock
from service.storage.health import scan_wal, storage_fault
from service.storage.checkpoint import CHECKS_SCHEMA, Checkpoint, insert_checkpoint, load_checks, store_checks
from service.storage.keyfilter import KeyFilter

__all__ = ["EVENT", "JOURNAL_FORMAT", "LINES", "NOTE", "ROLLBACK", "Checkpoint", "Journal", "StorageUnavailable",
           "fingerprint", "first_position", "positions"]

EVENT, NOTE, ROLLBACK, LINES = 0, 1, 2, 3
#: the journal format this version writes and the newest it reads (see the module docstring)
JOURNAL_FORMAT = 4
#: the format of a file whose index has a buffer (``seen_runs``) but no sorted run yet
_BUFFERED_FORMAT = 3
FILE_NAME = "trimtab.sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS journal (seq INTEGER PRIMARY KEY, id TEXT, kind INTEGER NOT NULL, payload BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS checkpoints (id INTEGER PRIMARY KEY AUTOINCREMENT, seq INTEGER NOT NULL,
                                        created REAL NOT NULL, digest TEXT NOT NULL,
                                        state_digest TEXT NOT NULL, blob BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS incidents (n INTEGER PRIMARY KEY AUTOINCREMENT, ts REAL NOT NULL,
                                      kind TEXT NOT NULL, reason TEXT NOT NULL, evidence BLOB NOT NULL);
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
""" + CHECKS_SCHEMA + seen.SCHEMA


class StorageUnavailable(TrimtabError):
    """The journal file cannot be opened for writing (read-only, full, missing permission)."""


def _as_text(ids: list) -> list:
    """Ids for the informational ``id`` column: SQLite text must be UTF-8, so an id holding a lone
    surrogate is stored with it replaced (the payload and the index keep the exact id)."""
    try:
        "".join(i for i in ids if i is not None).encode("utf-8")
        return ids
    except UnicodeEncodeError:
        return [None if i is None else i.encode("utf-8", "surrogatepass").decode("utf-8", "replace") for i in ids]


def positions(row: tuple) -> int:
    """How many journal positions a row ``(seq, id, kind, payload)`` stands for."""
    return row[3].count(b"\n") if row[2] == LINES else 1


def first_position(row: tuple) -> int:
    """The first journal position of a row (its ``seq`` but for a row of lines, which ends there)."""
    return row[0] - positions(row) + 1


class Journal:
    """The SQLite file ``data_dir/trimtab.sqlite``.

    Parameters
    ----------
    data_dir
        Folder for the file (created if missing); locked for this object's lifetime.
    sync
        ``"full"`` or ``"normal"``: SQLite's ``synchronous`` setting (see the module docstring).

    Attributes
    ----------
    wal_damage
        ``None``, or why the write-ahead log found at open holds committed transactions that SQLite
        could not replay (a copy of it is kept next to the file; see :mod:`service.storage.health`).
    open_damage
        ``None``, or why SQLite could not read the file at all; the object then works on an empty
        in-memory database so the service can stay up, not ready, and say why.
    """

    def __init__(self, data_dir: str | Path, *, sync: str = "full") -> None:
        if sync not in ("full", "normal"):
            raise ConfigError(f"invalid value {sync!r}; valid values are 'full', 'normal'",
                              where="service.journal_sync")
        self.path = Path(data_dir) / FILE_NAME
        self.dir_lock = DataDirLock(data_dir)
        self._lock = threading.Lock()
        self.wal_damage: str | None = None
        self.open_damage: str | None = None
        #: merge slices of the index owed and not yet moved (:meth:`merge_step`; seen.OWED_LIMIT)
        self.owed_steps = 0
        self.merging = False  #: whether a merge of the index is under way (merge_step has work)
        try:
            self._open(sync)
        except sqlite3.DatabaseError as exc:
            name = getattr(exc, "sqlite_errorname", "")
            if not name.startswith(("SQLITE_CORRUPT", "SQLITE_NOTADB")):
                self.dir_lock.release()
                reason = storage_fault(exc, self.path.parent)
                if reason is None:
                    raise
                raise StorageUnavailable(f"cannot open {self.path}: {reason}", where="service.data_dir") from exc
            # keep the process up (not ready, with the reason and an incident) without touching the file
            self.open_damage = f"SQLite cannot read the journal file {FILE_NAME}: {exc} ({name})"
            self._db = sqlite3.connect(":memory:", check_same_thread=False, isolation_level=None)
            self._db.executescript(_SCHEMA)
            self._buffer = set()
            self._filter = KeyFilter()
            self._format = JOURNAL_FORMAT
        except BaseException:
            self.dir_lock.release()
            raise

    def _open(self, sync: str) -> None:
        wal = Path(f"{self.path}-wal")
        frames = scan_wal(wal)  # before SQLite opens the file and replays (or drops) the WAL
        self._db = sqlite3.connect(self.path, check_same_thread=False, isolation_level=None)
        self._db.execute("PRAGMA mmap_size=0")
        # the dedup index takes random keys: a bounded page cache of 32 MiB keeps its inner pages and a
        # share of its leaves in memory (the default 2 MiB re-read pages on almost every insert)
        self._db.execute("PRAGMA cache_size=-32768")
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute(f"PRAGMA synchronous={sync.upper()}")
        if frames is not None:
            accepted = self._db.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchone()[1]
            lost = frames.lost_frames(max(accepted, 0))
            if lost:
                copy = wal.with_name(f"{wal.name}.damaged-{int(time.time())}")
                shutil.copyfile(wal, copy)
                self.wal_damage = (f"the write-ahead log {wal.name} holds {lost} committed frame(s) that fail "
                                   f"SQLite's checksum (SQLite replayed {accepted} of {frames.frames}); "
                                   f"acknowledged events may be missing. A copy is in {copy.name}")
        tables = {r[0] for r in self._db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        self._format = 1
        if "meta" in tables:
            row = self._db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()
            self._format = int(row[0]) if row is not None else 1
            if self._format > JOURNAL_FORMAT:
                self._db.close()
                raise StorageUnavailable(f"{self.path} is a journal of format {self._format}, written by a newer "
                                         f"trimtab; this version reads formats 1 to {JOURNAL_FORMAT}",
                                         where="service.data_dir")
        self._db.executescript(_SCHEMA)
        if "journal" not in tables:  # a new file: it holds the whole history from the start
            self._db.execute("INSERT OR IGNORE INTO meta VALUES ('pruned_to', '0')")
            self._db.execute("INSERT OR REPLACE INTO meta VALUES ('journal_format', ?)", (str(JOURNAL_FORMAT),))
            self._format = JOURNAL_FORMAT
        self._buffer = seen.load_buffer(self._db)  # the unindexed tail of the index, mirrored in memory
        if "journal" in tables and "seen" not in tables:
            self._index_retained_ids()
        self.merging = seen.merges_under_way(self._db) > 0
        self._filter = seen.key_filter(self._db, self._buffer)

    def _index_retained_ids(self) -> None:
        """A journal written before the ``seen`` table existed: index the ids it still holds."""
        rows = self._db.execute("SELECT seq, id FROM journal WHERE kind = 0 AND id IS NOT NULL").fetchall()
        if rows:
            self._db.execute("BEGIN IMMEDIATE")
            moved = seen.insert_keys(self._db, self._buffer, [(seen.id_key(i), s) for s, i in rows])
            fmt = self._mark_format(self._db, JOURNAL_FORMAT if moved else _BUFFERED_FORMAT)
            self._db.execute("COMMIT")
            self._format = fmt
            self._buffer = seen.load_buffer(self._db)

    def _mark_format(self, db: sqlite3.Connection, needed: int) -> int:
        """Inside a write transaction: raise the file's format to ``needed`` if it is below (never lower
        it). Returns the format the file has once the transaction commits."""
        if needed <= self._format:
            return self._format
        db.execute("INSERT OR REPLACE INTO meta VALUES ('journal_format', ?)", (str(needed),))
        return needed

    # ---------------------------------------------------------------- setup and health
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

    def mark_started_from(self, source: str) -> None:
        """Record that this file's history starts from a state brought in from elsewhere (a replay's
        final state, :mod:`service.storage.promote`): the journal alone cannot rebuild it."""
        self._transaction(lambda db: db.execute("INSERT OR REPLACE INTO meta VALUES ('started_from', ?)", (source,)))

    def started_from(self) -> str | None:
        """What :meth:`mark_started_from` recorded (``None``: the history starts from an empty model)."""
        with self._lock:
            row = self._db.execute("SELECT value FROM meta WHERE key = 'started_from'").fetchone()
        return None if row is None else row[0]

    def quick_check(self) -> list[str]:
        """``PRAGMA quick_check``: an empty list when the file is sound, else SQLite's findings."""
        with self._lock:
            rows = [r[0] for r in self._db.execute("PRAGMA quick_check(20)").fetchall()]
        return [] if rows == ["ok"] else rows

    def pruned_to(self) -> int:
        """The last journal position deleted by pruning (0: the journal holds the whole history)."""
        with self._lock:
            row = self._db.execute("SELECT value FROM meta WHERE key = 'pruned_to'").fetchone()
            if row is not None:
                return int(row[0])
            # a file from before ``pruned_to`` was recorded: a first row above 1 says rows were deleted
            first = self._db.execute("SELECT min(seq) FROM journal").fetchone()[0]
            cps = self._db.execute("SELECT count(*) FROM checkpoints").fetchone()[0]
        if first is not None:
            return first - 1
        return -1 if cps else 0  # checkpoints but no rows: pruned up to an unknown position

    def probe(self) -> None:
        """A small durable write: raises the storage error while the disk is full or read-only."""
        self._transaction(lambda db: db.execute("INSERT OR REPLACE INTO meta VALUES ('probe', ?)",
                                                (repr(time.time()),)))

    def _transaction(self, body):
        """Run ``body(db)`` in one write transaction; on any error roll back and re-raise *that* error."""
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                out = body(self._db)
                self._db.execute("COMMIT")
                return out
            except BaseException:
                # a failed COMMIT may have rolled back already; a second error must not hide the first
                if self._db.in_transaction:
                    with suppress(sqlite3.Error):
                        self._db.execute("ROLLBACK")
                raise

    # ---------------------------------------------------------------- deduplication
    def known(self, keys: list[bytes]) -> set[bytes]:
        """Which id keys (:func:`service.storage.seen.id_key`) were ever journaled. Keys the Bloom
        filter rules out are new without a lookup; the others are looked up in the index."""
        with self._lock:
            maybe = np.flatnonzero(self._filter.maybe(keys)).tolist()
            return seen.known_keys(self._db, self._buffer, [keys[i] for i in maybe])

    def last_seq(self) -> int:
        with self._lock:
            row = self._db.execute("SELECT max(seq) FROM journal").fetchone()
            cps = self._db.execute("SELECT max(seq) FROM checkpoints").fetchone()
            ids = seen.last_position(self._db)
            pruned = self._db.execute("SELECT value FROM meta WHERE key = 'pruned_to'").fetchone()
        return max(row[0] or 0, cps[0] or 0, ids, int(pruned[0]) if pruned else 0)

    # ---------------------------------------------------------------- the journal
    def append(self, parts: list[tuple], keys: list[tuple[bytes, int]] = ()) -> None:
        """Commit rows and their id keys in one transaction (all or none).

        Each part is a row ``(seq, id, kind, payload)`` or a run of events ``(first_seq, ids, payloads)``
        numbered from ``first_seq``; ``keys`` are the ``(id key, seq)`` pairs of the new events. Ids
        and payloads are bound as parameters, never parsed by SQLite. The first row of lines or id
        key written to a file of format 1 or 2 marks it 3, and the first sorted run of the index
        marks it 4 (:data:`JOURNAL_FORMAT`), in the same transaction.
        """
        if not parts:
            return
        buffered = bool(keys) or any(len(p) == 4 and p[2] == LINES for p in parts)

        def body(db):
            fmt = self._mark_format(db, _BUFFERED_FORMAT) if buffered else self._format
            for part in parts:
                if len(part) == 3:
                    first, ids, payloads = part
                    ids = _as_text(ids)
                    db.executemany("INSERT INTO journal VALUES (?, ?, 0, ?)",
                                   zip(range(first, first + len(payloads)), ids, payloads))
                else:
                    db.execute("INSERT INTO journal VALUES (?, ?, ?, ?)", part)
            owed = self.owed_steps + (seen.steps_owed(len(self._buffer), len(keys)) if self.merging else 0)
            steps = max(0, owed - seen.OWED_LIMIT)  # the rest is moved while the thread is idle
            moved = seen.insert_keys(db, self._buffer, keys, steps)
            if moved:  # the first sorted run: the versions before could not read the file any more
                fmt = max(fmt, self._mark_format(db, JOURNAL_FORMAT))
            return moved, fmt, owed - steps

        moved, fmt, owed = self._transaction(body)
        with self._lock:  # only once the keys are committed: the filter must never hold back a key
            self._format, self.owed_steps = fmt, owed
            self.merging = self.merging or moved  # a new run may have started a merge
            added = list(map(itemgetter(0), keys))
            if moved:
                self._buffer = set()
            else:
                self._buffer.update(added)
            self._filter.add(added)

    def merge_step(self) -> None:
        """Move the next slice of every merge of the index under way, in a transaction of its own: the
        journal's thread calls it while no commit waits, so commits do not carry the merges (owed
        slices first, then ahead of time: idle time finishes merges early)."""
        left = self._transaction(lambda db: seen.advance_merges(db, 1))
        with self._lock:
            self.owed_steps = max(0, self.owed_steps - 1) if left else 0
            self.merging = left

    def rows_after(self, seq: int, limit: int = 5000) -> list[tuple]:
        """The rows with a position above ``seq``, in order, until they stand for ``limit`` positions
        (a row of lines counts its lines; the last row may take the count past ``limit``)."""
        out: list[tuple] = []
        held = 0
        with self._lock:
            cur = self._db.execute("SELECT seq, id, kind, payload FROM journal WHERE seq > ? ORDER BY seq", (seq,))
            while held < limit:
                rows = cur.fetchmany(limit - held)
                if not rows:
                    break
                out += rows
                held += sum(positions(r) for r in rows)
            cur.close()
        return out

    @property
    def format(self) -> int:
        """The file's journal format (see the module docstring)."""
        return self._format

    def count(self) -> int:
        with self._lock:
            return self._db.execute("SELECT count(*) FROM journal").fetchone()[0]

    # ---------------------------------------------------------------- checkpoints
    def write_checkpoint(self, seq: int, blob: bytes, state_digest: str, keep: int, prune: bool = True,
                         checks: tuple = ((), 0)) -> tuple[Checkpoint, int]:
        """Store a checkpoint, keep the newest ``keep``, (``prune``) delete the journal rows up to the
        oldest kept one and store ``checks`` (the new check records, how many to keep:
        :func:`store_checks`), in one transaction. Returns the checkpoint and the position pruned to."""
        digest = hashlib.sha256(blob).hexdigest()
        created = time.time()

        def body(db):
            store_checks(db, *checks)
            return insert_checkpoint(db, (seq, created, digest, state_digest, blob), keep, prune)

        ck_id, oldest = self._transaction(body)
        return Checkpoint((ck_id, seq, created, digest, state_digest, len(blob))), oldest

    def checkpoints(self) -> list[Checkpoint]:
        """Stored checkpoints, newest first (without their blobs)."""
        with self._lock:
            cur = self._db.execute("SELECT id, seq, created, digest, state_digest, length(blob) FROM checkpoints "
                                   "ORDER BY id DESC")
            return [Checkpoint(r) for r in cur.fetchall()]

    def checks(self, upto: int, limit: int | None) -> list[bytes]:
        """Stored check records up to event ``upto`` (:func:`load_checks`)."""
        with self._lock:
            return load_checks(self._db, upto, limit)

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
        """Close the file and release the data dir (idempotent)."""
        with self._lock:
            self._db.close()
        self.dir_lock.release()

    def __del__(self) -> None:
        # the connection sits in a reference cycle (its statement cache) and would hold SQLite's
        # exclusive lock until a garbage collection; a dropped journal lets go of both locks at once
        if hasattr(self, "_db"):
            self.close()
