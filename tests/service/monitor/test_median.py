"""The change rule's median (``rules.median``) against numpy's ``np.median``, bit for bit."""

from __future__ import annotations

import math

import numpy as np

from service.monitor.rules import median


def test_median_equals_numpys():
    """Odd and even lengths from 1 to 3,000, ties, zeros of both signs, infinities and NaN: the value
    ``np.median`` gives (the same float, NaN where it gives NaN)."""
    rng = np.random.default_rng(23)
    for t in range(3000):
        n = int(rng.integers(1, 40)) if t % 3 else int(rng.integers(40, 3000))
        a = np.abs(rng.standard_cauchy(n)) * (10.0 ** rng.integers(-3, 4))
        if t % 4 == 0:
            a = np.round(a)  # ties
        if t % 7 == 0:
            a[rng.integers(0, n)] = np.inf
        if t % 11 == 0:
            a[rng.integers(0, n, size=2)] = [0.0, -0.0]
        if t % 13 == 0:
            a[rng.integers(0, n)] = np.nan
        with np.errstate(invalid="ignore"):
            want = float(np.median(a))
        got = median(a.copy())
        same = got == want and math.copysign(1.0, got) == math.copysign(1.0, want)
        assert same or (math.isnan(want) and math.isnan(got)), (t, n)
