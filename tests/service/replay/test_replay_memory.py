"""Bounded memory: replaying a million-event feed (must-show 5 of the replay issue).

Peak resident memory is read from the kernel for the ``trimtab replay`` child process
(``getrusage(RUSAGE_CHILDREN).ru_maxrss``, in KiB on Linux, see getrusage(2)); each measurement
runs in a fresh interpreter started from this test, so only that replay counts.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from service.replay.scenario import write_ndjson

ROOT = Path(__file__).resolve().parents[3]
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"
LIMIT_MB = 300  # the bound


def _peak_mb(feed: Path, out: Path) -> float:
    code = (
        "import resource, subprocess, sys\n"
        f"p = subprocess.run([sys.executable, '-m', 'service.cli', 'replay', {str(feed)!r}, '-c', {str(GUARDED)!r},"
        f" '--out', {str(out)!r}, '--no-progress'], capture_output=True)\n"
        "assert p.returncode == 0, p.stderr.decode()[-2000:]\n"
        "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=280,
                          env=dict(os.environ))
    assert proc.returncode == 0, proc.stderr[-3000:]
    return int(proc.stdout.split()[-1]) / 1024


@pytest.mark.slow
def test_million_event_replay_keeps_memory_bounded(tmp_path):
    """The run's own memory (over a 2,000-event replay in the same configuration) stays small, and
    the absolute peak is compared with the issue's 300 MB bound."""
    small, big = tmp_path / "small.ndjson", tmp_path / "big.ndjson"
    write_ndjson(small, 2_000, seed=9)
    write_ndjson(big, 1_000_000, seed=9, gzip=False)
    base = _peak_mb(small, tmp_path / "o1")
    peak = _peak_mb(big, tmp_path / "o2")
    print(f"peak RSS: 2,000 events {base:.0f} MB, 1,000,000 events {peak:.0f} MB (growth {peak - base:.0f} MB)")
    assert peak - base < 80, "replay memory grows with the feed"
    assert peak < LIMIT_MB, f"peak {peak:.0f} MB (a 2,000-event replay: {base:.0f} MB)"
