"""The data-dir lock: one process at a time owns a data dir.

``data_dir/trimtab.lock`` is locked with ``flock(LOCK_EX | LOCK_NB)`` and holds the owner's PID. The
kernel drops the lock when the process dies (SIGKILL included), so a stale file never blocks a
restart; the PID inside is only there to name the holder in the refusal. Two journals writing one
SQLite file would each number events from their own counter and break exactly-once.
"""

from __future__ import annotations

import fcntl
import os
from contextlib import suppress
from pathlib import Path

from models import InvalidSettings

__all__ = ["DataDirLock", "DataDirLocked"]

LOCK_NAME = "trimtab.lock"


class DataDirLocked(InvalidSettings):
    """Another process holds the data dir (``trimtab serve`` exits 2 with this message)."""


class DataDirLock:
    """Hold the lock on ``data_dir`` from construction until :meth:`release` (or process exit).

    Raises
    ------
    DataDirLocked
        When another process (or another open handle in this one) holds it; the message names the
        holder's PID as written in the lock file.
    """

    def __init__(self, data_dir: str | Path) -> None:
        self._fd: int | None = None
        self.path = Path(data_dir) / LOCK_NAME
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise DataDirLocked(f"data dir {self.path.parent} is in use by another trimtab process "
                                f"(PID {holder}, lock file {self.path}); stop it or use another data_dir",
                                where="service.data_dir") from None
        with suppress(OSError):  # the PID only names the holder; a full disk must not stop the start
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        self._fd = fd

    def release(self) -> None:
        """Unlock (the file stays; its content is stale once unlocked and is rewritten by the next owner)."""
        if self._fd is not None:
            fcntl.flock(self._fd, fcntl.LOCK_UN)
            os.close(self._fd)
            self._fd = None

    def __del__(self) -> None:
        self.release()
