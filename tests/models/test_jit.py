"""``models.jit``: numba's array library imported while ``scipy.linalg`` is hidden, and nothing lost.

Checked in a fresh interpreter (a test process has usually imported scipy already, and then nothing
is hidden): after ``models.jit`` the expensive ``scipy.linalg`` is not loaded, yet importing it later
works, and a compiled ``np.dot`` (which numba routes to scipy's BLAS) agrees with numpy's.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

PROBE = """
import json, sys
import numpy as np
import models.jit
from models.jit import numba
hidden = "scipy.linalg" not in sys.modules

@numba.njit
def inner(a, b):
    return np.dot(a, b)

import scipy.linalg
rng = np.random.default_rng(3)
a, b = rng.normal(size=50), rng.normal(size=50)
m = rng.normal(size=(4, 4)) + 4 * np.eye(4)
x = scipy.linalg.solve(m, b[:4])
print(json.dumps({"hidden": hidden, "compiled": inner(a, b), "numpy": float(np.dot(a, b)),
                  "solve_residual": float(np.abs(m @ x - b[:4]).max())}))
"""


def test_numba_loads_without_scipy_linalg_and_blas_still_works():
    out = subprocess.run([sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    got = json.loads(out.stdout.strip().splitlines()[-1])
    assert got["hidden"], "models.jit imported scipy.linalg"
    # numba's BLAS dot and numpy's may sum in a different order: equal to rounding
    assert abs(got["compiled"] - got["numpy"]) <= 1e-12 * max(1.0, abs(got["numpy"]))
    assert got["solve_residual"] < 1e-12
