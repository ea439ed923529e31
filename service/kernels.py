"""The service's compiled functions, and the build of every compiled function ahead of time.

``FEEDS`` holds the id hashes and the id set (:mod:`service.idhash_kernels`) and the byte scans of
the columnar NDJSON reader (:mod:`service.feeds.ndjson_scan`); ``models.native.MODEL`` holds the
learning kernels. Each is served by an extension module built ahead of time when there is a current
one, else by numba's JIT (:mod:`models.native` says how and why).

The build is automatic: a command that had to use the JIT because a module was missing (the first
run on a machine, or the first after an upgrade) starts :func:`build_later` when it is done, a
detached, low-priority ``python -m service.kernels build`` that compiles both sets (about 25 s of
CPU) into the cache folder. The next commands start without numba. A build that fails (no C
compiler, say) leaves ``<module>.failed`` with the reason beside where the module would be, and is
not started again by itself until the sources or versions change; ``python -m service.kernels build``
always tries. ``TRIMTAB_KERNELS`` chooses:
``auto`` (the default), ``prebuilt`` (use built modules, never start a build) or ``jit``.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import sys
import time
from pathlib import Path

from models.native import MODE_ENV, MODEL, KernelSet, cache_dir

__all__ = ["FEEDS", "build_all", "build_later", "main"]

#: The feed readers' and the id set's compiled functions.
FEEDS = KernelSet("feeds", ("service.idhash_kernels", "service.feeds.ndjson_scan", "service.feeds.ndjson_parse"),
                  extra=("models.jit", "service.feeds.scan_codes"))
_SETS = (MODEL, FEEDS)
_ROOT = Path(__file__).resolve().parents[1]
#: A build lock older than this is taken to be left by a build that died.
_LOCK_STALE_S = 900.0


def _exercise() -> None:
    """Every compiled function through its real callers (both model representations), so that the
    JIT holds the signatures of a real run."""
    import numpy as np

    from service.feeds.ndjson_columns import _split_by_kind
    from service.warmup import PARTS, warm

    warm(PARTS, ("lazy", "dense"))
    buf = b'{"f":{"c":"a"}}\n{"f":{"c":1}}\n'
    ends = np.flatnonzero(np.frombuffer(buf, dtype=np.uint8) == 10).astype(np.int64)
    starts = np.concatenate([[0], ends[:-1] + 1]).astype(np.int64)
    _split_by_kind(buf, starts, ends, np.arange(len(starts), dtype=np.int64), "c")


def build_all() -> list[Path]:
    """Build both sets into the cache folder (in this process, with the JIT); returns their files."""
    os.environ[MODE_ENV] = "jit"  # the exercise must go through numba's dispatchers
    return [s.build(_exercise) for s in _SETS]


def _lock() -> Path:
    return cache_dir() / "kernels" / "build.lock"


def build_later() -> bool:
    """Start a background build if this process missed a module and none is running; returns whether
    one was started. Never raises: a build that cannot start costs only the next start's speed."""
    mode = os.environ.get(MODE_ENV, "auto").strip().lower()
    if mode != "auto" or not any(s.missing for s in _SETS):
        return False
    if any(s.missing and s.failed() for s in _SETS):  # it failed for these sources: say so once, in the log
        return False
    try:
        lock = _lock()
        lock.parent.mkdir(parents=True, exist_ok=True)
        with contextlib.suppress(FileNotFoundError):
            if time.time() - lock.stat().st_mtime > _LOCK_STALE_S:
                lock.unlink()
        fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except OSError:
        return False
    try:
        import subprocess  # here: only a command that found a module missing starts a build

        env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(_ROOT), os.environ.get("PYTHONPATH")]))}
        log = open(lock.with_name("build.log"), "ab")
        with log:
            proc = subprocess.Popen([sys.executable, "-m", "service.kernels", "build", "--locked"], env=env,
                                    stdin=subprocess.DEVNULL, stdout=log, stderr=log, start_new_session=True)
        os.write(fd, str(proc.pid).encode())
        return True
    except OSError:
        with contextlib.suppress(OSError):
            lock.unlink()
        return False
    finally:
        os.close(fd)


def main(argv: list[str] | None = None) -> int:
    """``python -m service.kernels build [--locked]``: build the ahead-of-time modules now."""
    parser = argparse.ArgumentParser(prog="python -m service.kernels", description=__doc__.split("\n")[0])
    parser.add_argument("action", choices=("build",))
    parser.add_argument("--locked", action="store_true", help="started by build_later: lower priority, drop the lock")
    args = parser.parse_args(argv)
    if args.locked:
        with contextlib.suppress(OSError):
            os.nice(10)
    try:
        for path in build_all():
            print(f"built {path}")
    finally:
        if args.locked:
            with contextlib.suppress(OSError):
                _lock().unlink()
    return 0


if __name__ == "__main__":
    sys.exit(main())
