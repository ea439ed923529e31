"""A real ``redis-server`` for the tests, on a loopback port chosen free, in a folder of the test's own.

``RedisServer(tmp_path, appendonly=True)`` runs it with the append-only file on and ``appendfsync
always`` (every acknowledged write is on disk before the answer), so :meth:`RedisServer.kill` (SIGKILL)
followed by :meth:`RedisServer.start` restarts it on the same port with the same data, as a machine
restart would. Without ``redis-server`` on the PATH the tests that use it are skipped locally and
fail under CI (``CI=true``), where ``.ci/run`` installs it.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from pathlib import Path

import pytest

from tests.service.servicekit import free_port

__all__ = ["REDIS_MISSING", "RedisServer"]

#: mark for modules that need a redis-server binary
REDIS_MISSING = pytest.mark.skipif(shutil.which("redis-server") is None and not os.environ.get("CI"),
                                   reason="redis-server is not installed (.ci/run installs it)")


class RedisServer:
    """One ``redis-server`` process; ``url`` is its ``redis://`` address (database 0)."""

    def __init__(self, folder: Path, *, appendonly: bool = False) -> None:
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.appendonly = appendonly
        self.url = f"redis://127.0.0.1:{self.port}/0"
        self.proc: subprocess.Popen | None = None
        self.start()

    def start(self) -> None:
        """Start (or restart after :meth:`kill`) on the same port and folder; waits for PING."""
        import redis

        aof = ["--appendonly", "yes", "--appendfsync", "always"] if self.appendonly else ["--appendonly", "no"]
        self.proc = subprocess.Popen(["redis-server", "--port", str(self.port), "--bind", "127.0.0.1", "--save", "",
                                      "--dir", str(self.folder), *aof],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        client = redis.Redis(host="127.0.0.1", port=self.port)
        deadline = time.monotonic() + 20
        try:
            while True:
                try:
                    client.ping()
                    return
                except (redis.ConnectionError, redis.BusyLoadingError):
                    if time.monotonic() > deadline or self.proc.poll() is not None:
                        self.proc.kill()
                        raise AssertionError(f"redis-server did not start on port {self.port}") from None
                    time.sleep(0.05)
        finally:
            client.close()

    def kill(self) -> None:
        """SIGKILL: no shutdown save, what a power cut leaves (the append-only file as synced)."""
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(30)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
