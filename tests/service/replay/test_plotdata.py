"""The report's thinned series: a bounded number of points that keeps every stretch's extremes.

The reference is numpy's own reductions over the same stretches (``np.nanmin`` and ``np.nanmax`` on
each bucket of ``ceil(n / buckets)`` consecutive values), so a spike, a dip after a rollback or a
gap of missing values must come out exactly as numpy finds them.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.replay.plotdata import MAX_BUCKETS, envelope, thin_trace


@pytest.mark.parametrize("n", [10, 2 * MAX_BUCKETS, 2 * MAX_BUCKETS + 1, 12_345, 400_000])
def test_envelope_keeps_each_stretch_min_and_max_in_order(n):
    rng = np.random.default_rng(n)
    x = np.arange(n, dtype=np.float64) * 250.0
    v = rng.lognormal(0.0, 1.0, n)
    v[rng.integers(0, n, 3)] = 1e6  # spikes one check long
    v[n // 3:n // 3 + min(40, n // 10)] = np.nan  # a stretch without held-out loss
    ex, ev = envelope(x, v)
    assert len(ex) <= 2 * MAX_BUCKETS
    assert np.all(np.diff(ex) >= 0)  # still in event order
    if n <= 2 * MAX_BUCKETS:
        assert np.array_equal(ev, v, equal_nan=True)
        return
    size = -(-n // MAX_BUCKETS)
    for start in range(0, n, size):
        part = v[start:start + size]
        got = ev[(ex >= x[start]) & (ex <= x[min(start + size, n) - 1])]
        if np.isnan(part).all():
            assert np.isnan(got).all()
            continue
        with np.errstate(invalid="ignore"):
            assert np.nanmin(got) == np.nanmin(part) and np.nanmax(got) == np.nanmax(part)
    assert np.nanmax(ev) == 1e6


def test_thin_trace_bounds_every_series_and_follows_the_serving_iterate():
    n = 50_000
    trace = {"event": list(range(0, 250 * n, 250)), "holdout_raw": [1.0] * n, "holdout_avg": [2.0] * n,
             "serving": ["raw"] * (n // 2) + ["averaged"] * (n - n // 2), "progressive_loss": [3.0] * n}
    plot = thin_trace(trace)
    assert all(len(x) == len(v) <= 2 * MAX_BUCKETS for x, v in plot.values())
    x, v = plot["holdout_serving"]
    assert set(v[x < 250 * (n // 2)]) == {1.0} and set(v[x >= 250 * (n // 2)]) == {2.0}
    assert len(plot["baseline_holdout"][0]) == 0  # a trace from before the baseline still draws
