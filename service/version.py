"""The installed trimtab's version, read without :mod:`importlib.metadata` (25 ms of a start)."""

from __future__ import annotations

import functools
import glob
import os
import sys

__all__ = ["trimtab_version"]


@functools.cache
def trimtab_version() -> str:
    """The installed trimtab's version, from the first ``trimtab-*.dist-info`` on ``sys.path`` (the
    one :func:`importlib.metadata.version` reads, without importing that module: 25 ms of a start)."""
    for entry in sys.path:
        for meta in glob.glob(os.path.join(glob.escape(entry or "."), "trimtab-*.dist-info", "METADATA")):
            try:
                with open(meta, encoding="utf-8") as f:
                    for line in f:
                        if line.startswith("Version:"):
                            return line.split(":", 1)[1].strip()
                        if not line.strip():
                            break
            except OSError:
                continue
    return "unknown (not installed as a package)"
