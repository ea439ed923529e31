"""The report's series, thinned to a fixed number of points whatever the feed's length.

A run records one point per monitor check (every ``check_every`` learned events), so a feed of
months has hundreds of thousands of them; drawing them all makes the report's time grow with the
feed. :func:`envelope` keeps, for each of at most ``buckets`` equal stretches of the series, its
lowest and its highest value at their own positions (the min/max envelope that oscilloscopes and
trace viewers draw): a spike, however short, keeps its height, and a rollback's or a restart's drop
stays where it happened. Rollbacks and restarts themselves are drawn from the run's incident list,
not from the thinned series, so none is lost.
"""

from __future__ import annotations

import numpy as np

__all__ = ["MAX_BUCKETS", "envelope", "thin_trace"]

#: Stretches per series: at most twice as many points are drawn (a 10-inch figure at 110 dpi is
#: 1,100 pixels wide, so every pixel column still gets its own low and high)
MAX_BUCKETS = 500

#: Trace columns that are numbers (the others, ``serving`` and ``action``, are words per check)
NUMERIC_KEYS = ("holdout_raw", "holdout_avg", "progressive_loss", "baseline_progressive", "baseline_holdout",
                "step", "step_scale", "distance")


def envelope(x: np.ndarray, values: np.ndarray, buckets: int = MAX_BUCKETS) -> tuple[np.ndarray, np.ndarray]:
    """``(x, values)`` with at most ``2 * buckets`` points: each stretch's minimum and maximum, in order.

    Missing values (NaN) are skipped; a stretch with none left gives one NaN point (a gap in the line).

    >>> x = np.arange(10.0)
    >>> v = np.array([1, 2, 9, 2, 1, 1, 1, 0, 1, 1.0])
    >>> envelope(x, v, buckets=2)
    (array([0., 2., 5., 7.]), array([1., 9., 1., 0.]))
    """
    x = np.asarray(x, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    n = len(values)
    if n <= 2 * buckets:
        return x, values
    size = -(-n // buckets)
    buckets = -(-n // size)  # every stretch starts before n (only the last one is padded)
    grid = np.concatenate([values, np.full(size * buckets - n, np.nan)]).reshape(buckets, size)
    missing = np.isnan(grid)
    low = np.argmin(np.where(missing, np.inf, grid), axis=1)
    high = np.argmax(np.where(missing, -np.inf, grid), axis=1)
    # a stretch of NaN only gives its first position (a NaN, so a gap); both picks lie before n
    keep = (np.arange(buckets)[:, None] * size + np.sort(np.stack([low, high], axis=1), axis=1)).ravel()
    return x[keep], values[keep]


def thin_trace(trace: dict, buckets: int = MAX_BUCKETS) -> dict:
    """A run's trace ready to draw: ``{key: (x, values)}``, each numeric column as its own envelope.

    ``holdout_serving`` is the held-out loss of whichever iterate served at each check. Columns a
    trace lacks come back empty, so an older run's trace still draws.
    """
    ev = np.asarray(trace.get("event", []), dtype=np.float64)
    columns = {key: np.asarray(trace.get(key, []), dtype=np.float64) for key in NUMERIC_KEYS}
    raw = np.asarray([s == "raw" for s in trace.get("serving") or []], dtype=bool)
    if len(raw) == len(ev) == len(columns["holdout_raw"]) == len(columns["holdout_avg"]):
        columns["holdout_serving"] = np.where(raw, columns["holdout_raw"], columns["holdout_avg"])
    return {key: envelope(ev, v, buckets) if len(v) == len(ev) else (ev[:0], ev[:0])
            for key, v in columns.items()}
