"""The checkpoint format: named byte sections behind a magic line and a version, closed by a SHA-256.

Layout (integers little-endian; ``docs/checkpoint-format.md`` is the full description)::

    b"TRIMTAB-CHECKPOINT\\n"             19 bytes, the magic line
    u32 format version                    FORMAT_VERSION
    u32 number of sections
    per section: u16 name length, name (ASCII), u64 body length, body
    32 bytes: SHA-256 of everything above

Nothing in it is executed when read: the sections are plain bytes that their owners parse (JSON, the
model snapshot of :mod:`models.snapshot`, the monitor's own bytes). :func:`read_sections` refuses,
with a message that says which, a blob that is not a checkpoint (a pickle from an older trimtab
included), one of another format version, one whose checksum fails, and one with sections
missing, unknown, repeated or trailing bytes.

The version changes whenever the state a checkpoint holds changes: a field added to or removed
from a section, or a section's own encoding. A reader only accepts its own version; an older
checkpoint is then skipped with an incident and the state rebuilt from an older one or the journal.
"""

from __future__ import annotations

import hashlib
import struct

from models import SnapshotError

__all__ = ["CHECKS_SCHEMA", "FORMAT_VERSION", "MAGIC", "Checkpoint", "CheckpointFormatError", "insert_checkpoint",
           "load_checks", "read_sections", "store_checks", "write_sections"]

MAGIC = b"TRIMTAB-CHECKPOINT\n"
#: 1: sections meta, model, counters, baseline, trace and (with a monitor) monitor (the service's checkpoints
#: leave ``trace`` empty: their check records are rows of ``checks``, :func:`store_checks`);
#: 2: a ``metrics`` section (the running binary metrics) and the counter ``nonfinite_losses``
FORMAT_VERSION = 2

_HEAD = struct.Struct("<II")
_NAME = struct.Struct("<H")
_BODY = struct.Struct("<Q")
_CHECK = 32


class CheckpointFormatError(SnapshotError):
    """A blob that this version cannot read as a checkpoint (the message says why)."""


def write_sections(sections: dict[str, bytes]) -> bytes:
    """The checkpoint bytes of ``sections`` (name -> body), in the order given."""
    parts = [MAGIC, _HEAD.pack(FORMAT_VERSION, len(sections))]
    for name, body in sections.items():
        raw = name.encode("ascii")
        parts += [_NAME.pack(len(raw)), raw, _BODY.pack(len(body)), body]
    blob = b"".join(parts)
    return blob + hashlib.sha256(blob).digest()


def read_sections(blob: bytes, required: set[str], optional: frozenset[str] = frozenset()) -> dict[str, bytes]:
    """Sections of a checkpoint written by :func:`write_sections` in this format version.

    Raises
    ------
    CheckpointFormatError
        Not a checkpoint, another version, a failed checksum, or sections other than ``required``
        (all of them) plus any of ``optional``.
    """
    blob = bytes(blob)
    if not blob.startswith(MAGIC):
        hint = " (it looks like a pickle, which this version never reads)" if blob[:1] == b"\x80" else ""
        raise CheckpointFormatError(f"not a trimtab checkpoint: it does not start with {MAGIC!r}{hint}")
    if len(blob) < len(MAGIC) + _HEAD.size + _CHECK:
        raise CheckpointFormatError("checkpoint is truncated (shorter than its header and checksum)")
    body, check = blob[:-_CHECK], blob[-_CHECK:]
    version, count = _HEAD.unpack_from(body, len(MAGIC))
    if version != FORMAT_VERSION:
        raise CheckpointFormatError(f"checkpoint format version {version}; this trimtab reads version "
                                    f"{FORMAT_VERSION} only")
    if hashlib.sha256(body).digest() != check:
        raise CheckpointFormatError("checkpoint checksum (SHA-256) does not match: corrupt or truncated")
    pos = len(MAGIC) + _HEAD.size
    out: dict[str, bytes] = {}
    try:
        for _ in range(count):
            (nlen,) = _NAME.unpack_from(body, pos)
            name = body[pos + _NAME.size:pos + _NAME.size + nlen].decode("ascii")
            pos += _NAME.size + nlen
            (blen,) = _BODY.unpack_from(body, pos)
            pos += _BODY.size
            if name in out or pos + blen > len(body):
                raise CheckpointFormatError(f"section {name!r} is repeated or runs past the end")
            out[name] = body[pos:pos + blen]
            pos += blen
    except (struct.error, UnicodeDecodeError) as exc:
        raise CheckpointFormatError(f"checkpoint section table is unreadable: {exc}") from None
    if pos != len(body):
        raise CheckpointFormatError(f"checkpoint has {len(body) - pos} bytes after its last section")
    missing, unknown = required - set(out), set(out) - required - optional
    if missing or unknown:
        raise CheckpointFormatError(f"checkpoint sections do not match version {FORMAT_VERSION}: missing "
                                    f"{sorted(missing)}, unknown {sorted(unknown)}")
    return out


class Checkpoint(tuple):
    """``(id, seq, created, digest, state_digest, size)`` of a checkpoint stored in the journal file."""

    __slots__ = ()

    def as_dict(self) -> dict:
        return dict(zip(("id", "seq", "created", "digest", "state_digest", "bytes"), self))


def insert_checkpoint(db, row: tuple, keep: int, prune: bool) -> tuple[int, int]:
    """Insert ``row`` ``(seq, created, digest, state_digest, blob)`` into ``checkpoints``, keep the newest
    ``keep`` and (``prune``) delete the journal rows up to the oldest kept one (recorded as ``pruned_to``).
    Returns the new row's id and the position pruned to (0: none)."""
    cur = db.execute("INSERT INTO checkpoints (seq, created, digest, state_digest, blob) VALUES (?, ?, ?, ?, ?)", row)
    db.execute("DELETE FROM checkpoints WHERE id NOT IN (SELECT id FROM checkpoints ORDER BY id DESC LIMIT ?)",
               (keep,))
    oldest = db.execute("SELECT min(seq) FROM checkpoints").fetchone()[0] if prune else 0
    if oldest > 0 and db.execute("SELECT 1 FROM journal WHERE seq <= ? LIMIT 1", (oldest,)).fetchone():
        db.execute("DELETE FROM journal WHERE seq <= ?", (oldest,))
        db.execute("INSERT INTO meta VALUES ('pruned_to', ?) ON CONFLICT (key) DO UPDATE SET "
                   "value = max(CAST(value AS INTEGER), CAST(excluded.value AS INTEGER))", (str(oldest),))
    return cur.lastrowid, oldest


# --------------------------------------------------------------------------- check records beside checkpoints
#: The service's check records (one per monitor check: the live page's series), each stored once, by
#: the transaction of the first checkpoint after it: a checkpoint that carried them all would rewrite
#: the same 4 MB every time once 10,000 are kept. ``record`` is the record's exact JSON
#: (:func:`service.state_json.tagged`), ``event`` the index of the event it was made at.
CHECKS_SCHEMA = "CREATE TABLE IF NOT EXISTS checks (event INTEGER PRIMARY KEY, record BLOB NOT NULL);\n"


def store_checks(db, rows: list[tuple[int, bytes]], kept: int | None) -> None:
    """Insert ``(event, record JSON)`` rows (a replayed journal makes the same records again: they
    replace their twins) and keep the newest ``kept`` (``None``: all)."""
    if not rows:
        return
    db.executemany("INSERT OR REPLACE INTO checks (event, record) VALUES (?, ?)", rows)
    if kept:
        db.execute("DELETE FROM checks WHERE event < (SELECT event FROM checks ORDER BY event DESC LIMIT 1 "
                   "OFFSET ?)", (kept - 1,))


def load_checks(db, upto: int, limit: int | None) -> list[bytes]:
    """The record JSON of the newest ``limit`` rows (``None``: all) made at events up to ``upto``, oldest first."""
    rows = db.execute("SELECT record FROM checks WHERE event <= ? ORDER BY event DESC LIMIT ?",
                      (upto, -1 if limit is None else limit)).fetchall()
    return [r[0] for r in reversed(rows)]
