"""The held-out window: the newest held-out events, kept as padded rows and scored by a compiled pass.

A check scores every kept event with the raw and the averaged iterate in one pass over the window
(no per-check Python loop over events): mean losses of both iterates (events whose loss under both
exceeds a cut are left out: garbage targets), the median averaged-iterate loss, the same figures on
the newest events, and the distance between the iterates. ``Monitor`` (``monitor.py``) reads them.

The window reads the model's learned arrays directly (``LinearModel.kernel_state``): neither
iterate is built as a vector, and numeric features sit in a dense block (one row per feature) whose
product with the coefficients is a plain vector loop; only categorical buckets are gathered.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from models import LinearModel, Rows
from models.kernels import iterate_distance, margin_map, point_loss

__all__ = ["HoldoutWindow", "LOSS_CODES", "N_PRM", "N_STATS"]

LOSS_CODES = {"squared": 0, "huber": 1, "logistic": 2}
# layouts of the arrays the compiled passes share: statistics out, scalars in, per-slot metadata
(ST_MEDIAN, ST_RAW, ST_AVG, ST_KEPT, ST_NEW, ST_NEW_ABOVE, ST_REC_RAW, ST_REC_AVG, ST_REC_N, ST_DIST,
 N_STATS) = range(11)
P_CODE, P_DELTA, P_LAST, P_RECENT, P_CUT, P_UNSCALED, P_NEXT, N_PRM = range(8)
M_Y, M_EVENT, M_SCALED, N_META = range(4)

_jit = numba.njit(cache=True, nogil=True, error_model="numpy")
_loss = point_loss  # the kernels' own per-event loss, so window and progressive losses agree
_NO_EVENTS = np.zeros(0, dtype=np.int64)


@_jit
def _put(num, idx, val, meta, nxt, indptr, indices, values, mode, y, events, lo, hi, first, scaling):
    """Keep the rows ``r`` in ``lo..hi`` with ``mode[r] == 2`` in the ring from slot ``nxt`` on
    (event index ``events[r]``, or ``first + r`` when ``events`` is empty). Numeric features go to
    ``num[j, slot]`` (scaled when ``scaling`` is known; a missing one is 0 then, NaN until then),
    the others to the padded ``idx`` / ``val`` positions. Return ``(next slot, rows kept)``, or
    ``(-width, 0)`` when a row has more categorical entries than the ring is wide (nothing is
    kept then)."""
    width, size = idx.shape
    nnum = num.shape[0]
    scaled = scaling.shape[0] == 2
    for r in range(lo, hi):
        if mode[r] == 2:
            wide = 0
            for k in range(indptr[r], indptr[r + 1]):
                if indices[k] >= nnum:
                    wide += 1
            if wide > width:
                return -wide, 0
    kept = 0
    missing = 0.0 if scaled else math.nan
    for r in range(lo, hi):
        if mode[r] != 2:
            continue
        for j in range(nnum):
            num[j, nxt] = missing
        p = 0
        for k in range(indptr[r], indptr[r + 1]):
            j = indices[k]
            x = values[k]
            if j < nnum:
                num[j, nxt] = (x - scaling[0, j]) / scaling[1, j] if scaled else x
            else:
                idx[p, nxt] = j
                val[p, nxt] = x
                p += 1
        for q in range(p, width):
            idx[q, nxt] = 0
            val[q, nxt] = 0.0
        meta[M_Y, nxt] = y[r]
        meta[M_EVENT, nxt] = events[r] if events.shape[0] else first + r
        meta[M_SCALED, nxt] = 1.0 if scaled else 0.0
        nxt = (nxt + 1) % size
        kept += 1
    return nxt, kept


@_jit
def _window_stats(num, idx, val, meta, n, lazy, state, sc, scaling, prm, work, out):
    """Score the ``n`` kept events with both iterates of the model whose learned arrays are
    ``state`` / ``sc`` (``lazy`` representation or not) and fill ``out`` (layout ``ST_*``).

    ``scaling`` holds the frozen numeric means and standard deviations (or is empty before they
    are frozen); ``prm`` the scalars (layout ``P_*``; the absurd-loss cut comes from the previous
    check's median, one pass fewer); ``work`` rows: raw loss, averaged loss, scratch. Each stage
    is a loop over the window on its own (the dense block and the loss loop vectorize).
    """
    code, delta = int(prm[P_CODE]), prm[P_DELTA]
    last_event, recent_from, cut = prm[P_LAST], prm[P_RECENT], prm[P_CUT]
    y, events = meta[M_Y], meta[M_EVENT]
    nnum = num.shape[0]
    dv, da, scratch = work[0], work[1], work[2]
    frozen = scaling.shape[0] == 2
    if prm[P_UNSCALED] > 0.0 and frozen:  # rows kept before the scaling froze, once
        for i in range(n):
            if meta[M_SCALED, i] == 0.0:
                for j in range(nnum):
                    x = num[j, i]
                    num[j, i] = 0.0 if math.isnan(x) else (x - scaling[0, j]) / scaling[1, j]
                meta[M_SCALED, i] = 1.0
    # <state[:, 0], x> and <state[:, 1], x> of every event: the dense numeric block first
    for i in range(n):
        dv[i] = 0.0
        da[i] = 0.0
    for j in range(nnum):
        wv, wu, x = state[j, 0], state[j, 1], num[j]
        if frozen:
            for i in range(n):
                dv[i] += x[i] * wv
                da[i] += x[i] * wu
        else:  # before the scaling froze (nothing learned yet): a missing value is NaN
            for i in range(n):
                if not math.isnan(x[i]):
                    dv[i] += x[i] * wv
                    da[i] += x[i] * wu
    for p in range(idx.shape[0]):  # then the categorical buckets, gathered (padding adds 0)
        ip, vp = idx[p], val[p]
        for i in range(n):
            j, x = ip[i], vp[i]
            dv[i] += state[j, 0] * x
            da[i] += state[j, 1] * x
    # margins, then losses
    ar, br, ua, aa, ba, ia = margin_map(lazy, sc)
    if code == 0:
        for i in range(n):
            r = ar * dv[i] + br - y[i]
            a = (ua * da[i] + aa * dv[i] + ba) * ia - y[i]
            dv[i] = 0.5 * r * r  # the rows become the per-event losses
            da[i] = 0.5 * a * a
    else:
        for i in range(n):
            m_raw = ar * dv[i] + br
            m_avg = (ua * da[i] + aa * dv[i] + ba) * ia
            dv[i] = _loss(code, delta, m_raw, y[i])
            da[i] = _loss(code, delta, m_avg, y[i])
    # sums over the events not left out as absurd (selects, no branches: one pass)
    s_raw = s_avg = 0.0
    kept = 0
    for i in range(n):
        keep = not (dv[i] > cut and da[i] > cut)
        s_raw += dv[i] if keep else 0.0
        s_avg += da[i] if keep else 0.0
        kept += keep
    # slots in arrival order start at ``oldest``; the newest events (held out since the last check,
    # and since the check ``recent_from``) are a suffix of that order: walk back from the newest
    size = dv.shape[0]
    oldest = (int(prm[P_NEXT]) - n) % size
    k_new = 0
    while k_new < n and events[(oldest + n - 1 - k_new) % size] > last_event:
        slot = (oldest + n - 1 - k_new) % size
        scratch[n - 1 - k_new] = da[slot]  # new events from the top, a sample of the older ones from the bottom
        k_new += 1
    r_raw = r_avg = r_n = 0.0
    k = 0
    while k < n and events[(oldest + n - 1 - k) % size] > recent_from:
        slot = (oldest + n - 1 - k) % size
        if not (dv[slot] > cut and da[slot] > cut):
            r_raw += dv[slot]
            r_avg += da[slot]
            r_n += 1.0
        k += 1
    # a new event exceeds the median of any sample of the older events with probability 1/2 just
    # the same; every 4th slot costs a quarter of the work
    k_old = 0
    for i in range(0, n, 4):
        if events[i] <= last_event:
            scratch[k_old] = da[i]
            k_old += 1
    med = np.median(scratch[:k_old]) if k_old > 0 else math.nan
    above = 0.0
    for k in range(n - k_new, n):
        if scratch[k] > med:
            above += 1.0
    out[ST_MEDIAN], out[ST_RAW], out[ST_AVG], out[ST_KEPT] = med, s_raw, s_avg, kept
    out[ST_NEW], out[ST_NEW_ABOVE], out[ST_REC_RAW], out[ST_REC_AVG], out[ST_REC_N] = k_new, above, r_raw, r_avg, r_n
    out[ST_DIST] = iterate_distance(lazy, state, sc)


class HoldoutWindow:
    """The newest ``size`` held-out events as a ring of slots, scored by a compiled pass.

    A slot holds an event's numeric features in a dense block (``num[j, slot]``) and its other
    coordinates position-major (``idx[p, slot]``), numeric values scaled once the model's warm-up
    scaling is frozen, so that scoring is a plain product.

    Parameters
    ----------
    size
        Events kept (the newest).
    n_numeric
        Coordinates ``0 .. n_numeric - 1`` are numeric features (the model's layout).
    """

    def __init__(self, size: int, n_numeric: int = 0, width: int = 1) -> None:
        self.size = size
        self._num = np.zeros((n_numeric, size))
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
        args = (rows.indptr, rows.indices, rows.values, mode, y, events, start, stop, first, self._scaling)
        nxt, kept = _put(self._num, self._idx, self._val, self._meta, self._next, *args)
        if nxt < 0:  # a wider row than any before: widen the ring (rare) and copy again
            grow = ((0, -nxt - self._idx.shape[0]), (0, 0))
            self._idx, self._val = np.pad(self._idx, grow), np.pad(self._val, grow)
            nxt, kept = _put(self._num, self._idx, self._val, self._meta, self._next, *args)
        if kept and self._scaling.shape[0] == 0:
            self._unscaled = True
        self._next = nxt
        self._count = min(self._count + kept, self.size)

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change), keeping their order."""
        order = np.arange(self._count) if self._count < self.size else (np.arange(self.size) + self._next) % self.size
        keep = order[self._meta[M_EVENT, order] >= event]
        k = len(keep)
        for name in ("_num", "_idx", "_val", "_meta", "_work"):
            old = getattr(self, name)
            new = np.zeros_like(old)
            new[:, :k] = old[:, keep]
            setattr(self, name, new)
        self._count, self._next = k, k % self.size

    def stats(self, model: LinearModel, prm: np.ndarray, out: np.ndarray, work: np.ndarray | None = None) -> None:
        """Score every kept event with both iterates of ``model`` (see :func:`_window_stats`).

        With ``work`` given (a reader outside the check, perhaps on another thread) the ring is left
        untouched: it must hold no unscaled rows then.
        """
        prm[P_UNSCALED] = 0.0
        prm[P_NEXT] = self._next
        if work is None:
            work = self._work
            if self._scaling.shape[0] == 0 and model.scaling_frozen:  # frozen once, for good
                self._scaling = np.stack(model.scaling)
            if self._unscaled and self._scaling.shape[0]:
                prm[P_UNSCALED], self._unscaled = 1.0, False
        lazy, state, sc = model.kernel_state()
        _window_stats(self._num, self._idx, self._val, self._meta, self._count, lazy, state, sc, self._scaling,
                      prm, work, out)
