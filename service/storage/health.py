"""Storage health: what a failed write means, and damage found before the journal is used.

* :func:`storage_fault` names the fault behind an exception from a write (disk full, read-only, I/O
  error, damaged file) in words an operator can act on, or ``None`` when the exception is not a
  storage fault (a bug, which is reported as one).
* :func:`scan_wal` reads the frame headers of ``trimtab.sqlite-wal`` *before* SQLite opens the
  database. SQLite replays a write-ahead log only up to the first frame whose checksum fails and
  silently drops the rest (sqlite.org, "Write-Ahead Logging", file format section "Checksum
  algorithm"). A commit frame of the current generation (same salts as the header) beyond what
  SQLite accepted therefore means committed, acknowledged transactions that SQLite would lose.
  A frame torn by a crash in the middle of the last transaction leaves no later commit frame, so it
  is not reported: that transaction was never acknowledged.

A WAL cut short (its tail gone) cannot be told apart from one that ended there; only a copy
elsewhere would protect against that, and the module does not pretend otherwise.
"""

from __future__ import annotations

import errno
import os
import resource
import shutil
import sqlite3
import struct
from dataclasses import dataclass
from pathlib import Path

__all__ = ["MIN_FREE_BYTES", "WalFrames", "has_room", "scan_wal", "storage_fault"]

#: free space a full disk must regain before writes are taken again: a tiny probe write can succeed
#: in pages SQLite already owns while the next real commit would fail again
MIN_FREE_BYTES = 32 * 1024 * 1024

_WAL_HEADER = 32
_FRAME_HEADER = 24
_WAL_MAGIC = (0x377F0682, 0x377F0683)

_FAULTS = {
    "SQLITE_FULL": "the disk holding the data dir is full",
    "SQLITE_READONLY": "the data dir or the journal file is read-only",
    "SQLITE_CANTOPEN": "the journal file cannot be opened (missing, or the data dir is not writable)",
    "SQLITE_CORRUPT": "the journal file is damaged",
    "SQLITE_NOTADB": "the journal file is not a SQLite database (damaged)",
    "SQLITE_PERM": "the data dir denies access",
}
_ERRNO = {errno.ENOSPC: "the disk holding the data dir is full",
          errno.EDQUOT: "the disk quota of the data dir is exhausted",
          errno.EFBIG: "the file size limit was reached (RLIMIT_FSIZE)",
          errno.EROFS: "the data dir is on a read-only file system",
          errno.EACCES: "the data dir denies access",
          errno.EIO: "the disk reported an I/O error"}


def storage_fault(exc: BaseException, folder: Path | None = None) -> str | None:
    """A sentence naming the storage fault behind ``exc``, or ``None`` if it is not one.

    SQLite reports a write refused for lack of space as ``SQLITE_FULL`` only for ``ENOSPC``; other
    refusals (a file-size limit's ``EFBIG``, a quota) arrive as ``SQLITE_IOERR_WRITE`` without the
    errno, so the cause is then looked for in the process's file-size limit and the free space of
    ``folder``.
    """
    if isinstance(exc, sqlite3.Error):
        name = getattr(exc, "sqlite_errorname", "") or ""
        for prefix, text in _FAULTS.items():
            if name.startswith(prefix):
                return f"{text} ({name}: {exc})"
        if name.startswith("SQLITE_IOERR"):
            return f"{_io_cause(folder)} ({name}: {exc})"
        return None
    if isinstance(exc, OSError) and exc.errno in _ERRNO:
        return f"{_ERRNO[exc.errno]} ({exc})"
    return None


def has_room(folder: Path) -> bool:
    """Whether the file system of ``folder`` has at least :data:`MIN_FREE_BYTES` free."""
    try:
        return shutil.disk_usage(folder).free >= MIN_FREE_BYTES
    except OSError:
        return False


def _io_cause(folder: Path | None) -> str:
    limit = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
    if limit != resource.RLIM_INFINITY:
        return f"a write failed, probably at the file-size limit of this process (RLIMIT_FSIZE {limit} bytes)"
    if folder is not None and not has_room(folder):
        return "a write failed and the disk holding the data dir is (nearly) full"
    return "the disk reported an I/O error writing the journal"


@dataclass(frozen=True)
class WalFrames:
    """What the frame headers of a WAL file say (frames counted from 1)."""

    frames: int          # whole frames in the file
    current: int         # frames carrying the header's salts (this generation)
    last_commit: int     # the last commit frame of this generation (0: none)
    header_ok: bool = True  # False: the file has content but no readable WAL header

    def lost_frames(self, accepted: int) -> int:
        """Committed frames of this generation beyond the ``accepted`` frames SQLite replayed."""
        if not self.header_ok:
            return max(1, self.frames)
        return max(0, self.last_commit - accepted)


def scan_wal(path: Path) -> WalFrames | None:
    """Frame headers of the WAL at ``path``; ``None`` if it is missing or shorter than a header."""
    try:
        size = os.path.getsize(path)
    except FileNotFoundError:
        return None
    if size < _WAL_HEADER:
        return None
    with open(path, "rb") as f:
        head = f.read(_WAL_HEADER)
        magic, _version, page_size, _ckpt, salt1, salt2 = struct.unpack(">IIIIII", head[:24])
        if magic not in _WAL_MAGIC or not 512 <= page_size <= 65536:
            return WalFrames(max(1, (size - _WAL_HEADER) // 4120), 0, 0, header_ok=False)
        frame = _FRAME_HEADER + page_size
        frames = (size - _WAL_HEADER) // frame
        current = last_commit = 0
        for k in range(frames):
            f.seek(_WAL_HEADER + k * frame)
            _page, commit_size, s1, s2 = struct.unpack(">IIII", f.read(16))
            if (s1, s2) != (salt1, salt2):
                continue
            current += 1
            if commit_size:
                last_commit = k + 1
    return WalFrames(frames, current, last_commit)
