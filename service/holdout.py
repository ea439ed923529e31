"""The held-out window: the newest held-out events, kept as padded rows and scored by a compiled pass.

A check scores every kept event with the raw and the averaged iterate in one pass over the window
(no per-check Python loop over events): mean losses of both iterates (events whose loss under both
exceeds a cut are left out: garbage targets), the median averaged-iterate loss, the same figures on
the newest events, and the distance between the iterates. ``Monitor`` (``monitor.py``) reads them.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from models import LinearModel, Rows
from models.kernels import point_loss

__all__ = ["HoldoutWindow", "LOSS_CODES", "N_PRM", "N_STATS"]

LOSS_CODES = {"squared": 0, "huber": 1, "logistic": 2}
# layouts of the arrays the compiled passes share: statistics out, scalars in, per-slot metadata
(ST_MEDIAN, ST_RAW, ST_AVG, ST_KEPT, ST_NEW, ST_NEW_ABOVE, ST_REC_RAW, ST_REC_AVG, ST_REC_N, ST_DIST,
 N_STATS) = range(11)
P_BRAW, P_BAVG, P_CODE, P_DELTA, P_LAST, P_RECENT, P_CUT, P_UNSCALED, N_PRM = range(9)
M_LEN, M_Y, M_EVENT, M_SCALED, N_META = range(5)

_jit = numba.njit(cache=True, nogil=True)
_loss = point_loss  # the kernels' own per-event loss, so window and progressive losses agree
_NO_EVENTS = np.zeros(0, dtype=np.int64)


@_jit
def _put(idx, val, meta, nxt, indptr, indices, values, mode, y, events, lo, hi, first, scaling):
    """Keep the rows ``r`` in ``lo..hi`` with ``mode[r] == 2`` in the ring from slot ``nxt`` on
    (event index ``events[r]``, or ``first + r`` when ``events`` is empty), scaled when ``scaling``
    is known. Return ``(next slot, rows kept)``, or ``(-width, 0)`` when a row is wider than the
    ring (nothing is kept then)."""
    width, size = idx.shape
    nnum = scaling.shape[1] if scaling.shape[0] == 2 else -1
    for r in range(lo, hi):
        if mode[r] == 2 and indptr[r + 1] - indptr[r] > width:
            return -(indptr[r + 1] - indptr[r]), 0
    kept = 0
    for r in range(lo, hi):
        if mode[r] != 2:
            continue
        a, b = indptr[r], indptr[r + 1]
        for p in range(width):
            j = indices[a + p] if p < b - a else 0
            x = values[a + p] if p < b - a else 0.0
            if p < b - a and j < nnum:
                x = (x - scaling[0, j]) / scaling[1, j]
            idx[p, nxt] = j
            val[p, nxt] = x
        meta[M_LEN, nxt] = b - a
        meta[M_Y, nxt] = y[r]
        meta[M_EVENT, nxt] = events[r] if events.shape[0] else first + r
        meta[M_SCALED, nxt] = 1.0 if nnum >= 0 else 0.0
        nxt = (nxt + 1) % size
        kept += 1
    return nxt, kept


@_jit
def _window_stats(idx, val, meta, n, w_raw, w_avg, scaling, prm, work, out):
    """Score the ``n`` kept events with both iterates and fill ``out`` (layout ``ST_*``).

    ``scaling`` holds the frozen numeric means and standard deviations (or is empty before they
    are frozen); ``prm`` the scalars (layout ``P_*``; the absurd-loss cut comes from the previous
    check's median, one pass fewer); ``work`` rows: raw loss, averaged loss, scratch.
    """
    b_raw, b_avg, code, delta = prm[P_BRAW], prm[P_BAVG], int(prm[P_CODE]), prm[P_DELTA]
    last_event, recent_from, cut = prm[P_LAST], prm[P_RECENT], prm[P_CUT]
    nnum = scaling.shape[1]
    loss_raw, loss_avg, scratch = work[0], work[1], work[2]
    if prm[P_UNSCALED] > 0.0 and scaling.shape[0] == 2:  # rows kept before the scaling froze, once
        for i in range(n):
            if meta[M_SCALED, i] == 0.0:
                for p in range(int(meta[M_LEN, i])):
                    j = idx[p, i]
                    if j < nnum:
                        val[p, i] = (val[p, i] - scaling[0, j]) / scaling[1, j]
                meta[M_SCALED, i] = 1.0
    width = idx.shape[0]
    i = 0
    while i + 4 <= n:  # four rows at a time: independent sums keep the pipeline full (padding adds 0)
        r0 = r1 = r2 = r3 = b_raw
        a0 = a1 = a2 = a3 = b_avg
        for p in range(width):
            j0, j1, j2, j3 = idx[p, i], idx[p, i + 1], idx[p, i + 2], idx[p, i + 3]
            x0, x1, x2, x3 = val[p, i], val[p, i + 1], val[p, i + 2], val[p, i + 3]
            r0 += w_raw[j0] * x0
            r1 += w_raw[j1] * x1
            r2 += w_raw[j2] * x2
            r3 += w_raw[j3] * x3
            a0 += w_avg[j0] * x0
            a1 += w_avg[j1] * x1
            a2 += w_avg[j2] * x2
            a3 += w_avg[j3] * x3
        loss_raw[i], loss_raw[i + 1], loss_raw[i + 2], loss_raw[i + 3] = r0, r1, r2, r3
        loss_avg[i], loss_avg[i + 1], loss_avg[i + 2], loss_avg[i + 3] = a0, a1, a2, a3
        i += 4
    for i in range(i, n):
        r0, a0 = b_raw, b_avg
        for p in range(width):
            r0 += w_raw[idx[p, i]] * val[p, i]
            a0 += w_avg[idx[p, i]] * val[p, i]
        loss_raw[i], loss_avg[i] = r0, a0
    for s in range(N_STATS):
        out[s] = 0.0
    k_old = k_new = 0
    for i in range(n):
        lr = _loss(code, delta, loss_raw[i], meta[M_Y, i])
        la = _loss(code, delta, loss_avg[i], meta[M_Y, i])
        loss_raw[i] = lr
        loss_avg[i] = la
        ev = meta[M_EVENT, i]
        if ev > last_event:
            scratch[n - 1 - k_new] = la  # new events from the top, a sample of the older ones from the bottom
            k_new += 1
        elif i % 4 == 0:
            # a new event exceeds the median of any sample of the older events with probability 1/2
            # just the same; every 4th costs a quarter of the work
            scratch[k_old] = la
            k_old += 1
        if lr > cut and la > cut:
            continue
        out[ST_RAW] += lr
        out[ST_AVG] += la
        out[ST_KEPT] += 1.0
        if ev > recent_from:
            out[ST_REC_RAW] += lr
            out[ST_REC_AVG] += la
            out[ST_REC_N] += 1.0
    med = np.median(scratch[:k_old]) if k_old > 0 else math.nan
    out[ST_MEDIAN] = med
    out[ST_NEW] = k_new
    for k in range(n - k_new, n):
        if scratch[k] > med:
            out[ST_NEW_ABOVE] += 1.0
    d2 = (b_raw - b_avg) ** 2
    for j in range(w_raw.shape[0]):
        d2 += (w_raw[j] - w_avg[j]) ** 2
    out[ST_DIST] = math.sqrt(d2)


class HoldoutWindow:
    """The newest ``size`` held-out events as a ring of padded rows, scored by a compiled pass.

    Rows are stored position-major (``idx[p, slot]``) with their numeric values scaled once the
    model's warm-up scaling is frozen, so that scoring is a plain sparse product.
    """

    def __init__(self, size: int, width: int = 1) -> None:
        self.size = size
        self._idx = np.zeros((width, size), dtype=np.int32)
        self._val = np.zeros((width, size))
        self._meta = np.zeros((N_META, size))
        self._next = 0
        self._count = 0
        self._work = np.zeros((3, size))
        self._scaling = np.zeros((0, 0))
        self._unscaled = False

    def __len__(self) -> int:
        return self._count

    @property
    def unscaled(self) -> bool:
        """Whether rows kept before the scaling froze still wait to be scaled (at the next check)."""
        return self._unscaled or (self._count > 0 and self._scaling.shape[0] == 0)

    @property
    def loss_raw(self) -> np.ndarray:
        """Per-slot losses of the raw iterate at the last scoring (slots ``0..len-1``)."""
        return self._work[0, : self._count]

    @property
    def loss_avg(self) -> np.ndarray:
        return self._work[1, : self._count]

    def new_above(self, n_new: int, median: float) -> list:
        """1.0 / 0.0 per newly kept event of the last scoring: its averaged loss exceeds ``median``."""
        return (self._work[2, self._count - n_new: self._count] > median).astype(np.float64).tolist()

    def events(self) -> np.ndarray:
        """Event indices of the kept events, slot order (matching ``loss_raw`` / ``loss_avg``)."""
        return self._meta[M_EVENT, : self._count].astype(np.int64)

    def add(self, rows: Rows, y: np.ndarray, mode: np.ndarray, start: int, stop: int, first: int,
            events: np.ndarray | None = None) -> None:
        """Keep the rows ``start..stop`` of ``rows`` whose ``mode`` is 2 (held out), with targets ``y``
        and event indices ``events`` (or ``first`` + row), all indexed by row."""
        events = _NO_EVENTS if events is None else events
        args = (rows.indptr, rows.indices, rows.values, mode, y, events, start, stop, first)
        nxt, kept = _put(self._idx, self._val, self._meta, self._next, *args, self._scaling)
        if nxt < 0:  # a wider row than any before: widen the ring (rare) and copy again
            grow = ((0, -nxt - self._idx.shape[0]), (0, 0))
            self._idx, self._val = np.pad(self._idx, grow), np.pad(self._val, grow)
            nxt, kept = _put(self._idx, self._val, self._meta, self._next, *args, self._scaling)
        if kept and self._scaling.shape[0] == 0:
            self._unscaled = True
        self._next = nxt
        self._count = min(self._count + kept, self.size)

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change), keeping their order."""
        order = np.arange(self._count) if self._count < self.size else (np.arange(self.size) + self._next) % self.size
        keep = order[self._meta[M_EVENT, order] >= event]
        k = len(keep)
        for name in ("_idx", "_val", "_meta", "_work"):
            old = getattr(self, name)
            new = np.zeros_like(old)
            new[:, :k] = old[:, keep]
            setattr(self, name, new)
        self._count, self._next = k, k % self.size

    def stats(self, model: LinearModel, prm: np.ndarray, out: np.ndarray, work: np.ndarray | None = None) -> None:
        """Score every kept event with both iterates (see :func:`_window_stats`; fills ``prm``'s weights).

        With ``work`` given (a reader outside the check, perhaps on another thread) the ring is left
        untouched: it must hold no unscaled rows then.
        """
        w_raw, prm[P_BRAW] = model.weights("raw")
        w_avg, prm[P_BAVG] = model.weights("averaged")
        prm[P_UNSCALED] = 0.0
        if work is None:
            work = self._work
            if self._scaling.shape[0] == 0 and model.scaling_frozen:  # frozen once, for good
                self._scaling = np.stack(model.scaling)
            if self._unscaled and self._scaling.shape[0]:
                prm[P_UNSCALED], self._unscaled = 1.0, False
        _window_stats(self._idx, self._val, self._meta, self._count, w_raw, w_avg, self._scaling, prm, work, out)


