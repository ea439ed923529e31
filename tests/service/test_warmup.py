"""The warm-up compiles everything a run uses: after it, a replay compiles nothing.

numba announces every compilation (and every load from its cache) as a ``numba:compile`` event
(numba documentation, "Event API", ``numba.core.event``). A process with an empty cache runs
:func:`service.warmup.warm`, then starts listening to those events and does the work of a replay
and of the service (a columnar replay of part of the demo feed with its monitor, reading the model
out, rollback and restart, both model representations): no event may fire. A compiled function
added later but left out of the warm-up's parts fails this test.
"""

from __future__ import annotations

import gzip
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

CHILD = r"""
import json, sys
import numpy as np
from service.warmup import PARTS, warm

warm(PARTS, ["lazy", "dense"])

import numba.core.event as ev

compiled = []


class Listener(ev.Listener):
    def on_start(self, event):
        compiled.append(event.data["dispatcher"].py_func.__qualname__ + str(event.data["args"]))

    def on_end(self, event):
        pass


ev.register("numba:compile", Listener())

from service.config import load_config
from service.replay.runner import run_replay

config = load_config(sys.argv[2])
result = run_replay([sys.argv[1]], config, keep_state=True)
from models import LinearModel, Outcome

for kernel in ("lazy", "dense"):
    model = LinearModel(numeric=["x"], categorical=["c"], kernel=kernel, scaling="warmup", warmup_events=2)
    rows = model.rows([{"x": float(i), "c": str(i % 3)} for i in range(6)])
    model.process(rows, np.arange(6.0), np.array([1, 1, 1, 2, 0, 1], np.int8), Outcome.empty(6))
    model.score_many([{"x": 1.0, "c": "z"}])
    model.coefficients("raw"), model.distance(), model.norm("averaged")
    model.rollback()
    model.restart()
print(json.dumps({"compiled": compiled, "events": result["summary"]["events"]}))
"""


@pytest.mark.slow
def test_nothing_compiles_after_the_warm_up(tmp_path):
    """Empty ``NUMBA_CACHE_DIR``; warm-up; then 3,000 demo events replayed and both representations
    exercised through their public methods without a single compile or cache load."""
    feed = tmp_path / "part.ndjson"
    with gzip.open(ROOT / "replay_data" / "coldchain-demo.ndjson.gz") as src:
        feed.write_bytes(b"".join(src.readline() for _ in range(3000)))
    cache = tmp_path / "numba-cache"
    cache.mkdir()
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
    proc = subprocess.run([sys.executable, "-c", CHILD, str(feed), str(ROOT / "replay_data" / "configs" / "guarded.toml")],
                          cwd=ROOT, env=env, capture_output=True, timeout=600)
    assert proc.returncode == 0, proc.stderr.decode(errors="replace")[-3000:]
    out = json.loads(proc.stdout.decode().strip().splitlines()[-1])
    assert out["events"] > 2500, out
    assert out["compiled"] == [], out["compiled"]
