"""The held-out window: the newest held-out events, kept as padded rows in a ring of slots.

The engine keeps held-out events here (:meth:`HoldoutWindow.add`, or in the check's own call);
every ``check_every`` learned events a check scores them with both iterates in one compiled call:
the full pass over every event (``window_scoring.py``) or, for the squared loss, the running sums
(``window_sums.py``). ``Monitor`` (``monitor.py``) and its compiled rules (``rules.py``) read the
figures. The layouts live in ``window_scoring.py`` and are importable from here.
"""

from __future__ import annotations

import math

import numpy as np

from models import LinearModel, Rows

from service.monitor.window_scoring import *  # noqa: F401,F403  (the layouts, importable from here as before)
from service.monitor.window_scoring import (G_COUNT, G_FROZEN, G_INSERTS, G_NEXT, G_NNUM, G_SIZE, G_SUMS, G_VALID, G_WIDTH,
                             G_XMAX, M_EVENT, M_SCALED, M_Y, N_G, N_META, N_STATS, N_WORK, P_NEXT, P_UNSCALED,
                             SAMPLE_EVERY, _inline, _jit, _window_stats)
from service.monitor.window_sums import (N_GI, REBUILD_WINDOWS, SUMS_CATEGORICAL, SUMS_NUMERIC, SUSPECTS, _accumulate, _claim,
                          _claim_known, _rebuild, _release, _sums_stats)

__all__ = ["HoldoutWindow", "LOSS_CODES", "N_PRM", "N_STATS"]

_NO_EVENTS = np.zeros(0, dtype=np.int64)
_PARTS = ("num", "val", "meta", "work", "snum", "sval", "smeta", "scaling", "idx", "loc", "sidx")  # _views' first


@_jit
def _put(num, idx, val, meta, loc, nxt, count, indptr, indices, values, mode, y, events, lo, hi, first,
         scaling, gm, gi, gst, snum, sidx, sval, smeta):
    """Keep the rows ``r`` in ``lo..hi`` with ``mode[r] == 2`` in the ring from slot ``nxt`` on
    (event index ``events[r]``, or ``first + r`` when ``events`` is empty; ``count`` slots are in
    use). Numeric features go to ``num[j, slot]`` (scaled when ``scaling`` is known; a missing one
    is 0 then, NaN until then), the others to the padded ``idx`` / ``val`` positions. While the
    running sums are valid (``gst[G_VALID]``) the event overwritten leaves them and the new one
    enters. Every ``SAMPLE_EVERY``-th slot is copied to the sample block (``snum`` ...: the median's sample, side
    by side). Return ``(next slot, rows kept)``, or ``(-width, 0)`` when a row has more categorical
    entries than the ring is wide (nothing is kept then)."""
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
        sums = gst[G_VALID] > 0.0
        if sums and count == size:  # the oldest event leaves the sums
            _accumulate(num, val, loc, meta[M_Y, nxt], nxt, gm, gst, -1.0)
            _release(loc, nxt, nnum, gm, gi)
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
        if nxt % SAMPLE_EVERY == 0:
            _copy_slot(num, idx, val, meta, nxt, snum, sidx, sval, smeta, nxt // SAMPLE_EVERY)
        if sums:
            if _claim_known(idx, val, loc, nxt, nnum, gi) or _claim(idx, val, loc, nxt, nnum, gi, gst):
                norm = _accumulate(num, val, loc, y[r], nxt, gm, gst, 1.0)
                gst[G_XMAX] = max(gst[G_XMAX], norm)
            else:
                gst[G_VALID] = 0.0
        gst[G_INSERTS] += 1.0
        nxt = (nxt + 1) % size
        count = min(count + 1, size)
        kept += 1
    return nxt, kept


@_inline
def _copy_slot(num, idx, val, meta, slot, snum, sidx, sval, smeta, k):
    for j in range(num.shape[0]):
        snum[j, k] = num[j, slot]
    for p in range(idx.shape[0]):
        sidx[p, k] = idx[p, slot]
        sval[p, k] = val[p, slot]
    smeta[M_Y, k] = meta[M_Y, slot]
    smeta[M_EVENT, k] = meta[M_EVENT, slot]


def _block_rows(rows: int, cols: int, size: int) -> int:
    """Rows of ``size`` columns that hold a ``rows x cols`` block (flattened)."""
    return -(-(rows * cols) // size)


@_inline
def _block(a, first, rows, cols):
    """The ``rows x cols`` block stored flattened from row ``first`` of ``a`` (a C-contiguous view)."""
    size = a.shape[1]
    return a[first:first + -(-(rows * cols) // size)].reshape(-1)[:rows * cols].reshape((rows, cols))


@_inline
def _views(f, i, g, k):
    """The window's arrays as views of its four blocks (see :class:`HoldoutWindow`)."""
    big_l = g.shape[1]
    gst = g[big_l + 6]
    size, nnum, width = int(gst[G_SIZE]), int(gst[G_NNUM]), int(gst[G_WIDTH])
    part = (size + SAMPLE_EVERY - 1) // SAMPLE_EVERY
    o = nnum + width
    w = o + N_META  # the work rows, then the sample block (its numeric, categorical, y and event rows)
    num, val, meta, work = f[:nnum], f[nnum:o], f[o:w], f[w:w + N_WORK]
    sample = _block(f, w + N_WORK, o + 2, part)
    scaling = _block(f, w + N_WORK + -(-((o + 2) * part) // size), 2, nnum)
    idx, loc = i[:width], i[width:2 * width]
    sidx = _block(i, 2 * width, width, part)
    return (num, val, meta, work, sample[:nnum], sample[nnum:o], sample[o:o + 2], scaling, idx, loc, sidx,
            g[:big_l + 2], g[big_l + 2:big_l + 6], gst, k[:N_GI], k[N_GI:].reshape((2, SUSPECTS)))


@_jit
def _keep(f, i, g, k, indptr, indices, values, mode, y, events, lo, hi, first):
    """:func:`_put` on the window's blocks; ``(next slot, kept)`` as it returns (the ring's place is
    updated in the bookkeeping unless a row was too wide)."""
    return _keep_in(_views(f, i, g, k), indptr, indices, values, mode, y, events, lo, hi, first)


@_inline
def _keep_in(v, indptr, indices, values, mode, y, events, lo, hi, first):
    """:func:`_keep` on the blocks' views ``v`` (:func:`_views`; a check makes them once)."""
    num, val, meta, work, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = v
    scal = scaling if gst[G_FROZEN] > 0.0 else scaling[:0]
    nxt, kept = _put(num, idx, val, meta, loc, int(gst[G_NEXT]), int(gst[G_COUNT]), indptr, indices, values, mode,
                     y, events, lo, hi, first, scal, gm, gi, gst, snum, sidx, sval, smeta)
    if nxt >= 0:
        gst[G_NEXT] = nxt
        gst[G_COUNT] = min(gst[G_COUNT] + kept, gst[G_SIZE])
    return nxt, kept


@_jit
def _resample(f, i, g, k):
    """Refill the sample block from the ring (after rows were scaled in place or moved)."""
    num, val, meta, work, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = _views(f, i, g, k)
    for q in range(snum.shape[1]):
        if SAMPLE_EVERY * q < num.shape[1]:
            _copy_slot(num, idx, val, meta, SAMPLE_EVERY * q, snum, sidx, sval, smeta, q)


@_inline
def _check_in(v, lazy, state, sc, prm, out):
    """A check's figures into ``out`` from the blocks' views ``v`` (:func:`_views`): scale rows kept
    before the scaling froze (a full pass), rebuild the running sums when due, then read them
    (:func:`_sums_stats`) or score every event. ``rules.decide`` runs it within the check's call."""
    num, val, meta, work, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = v
    n = int(gst[G_COUNT])
    prm[P_NEXT] = gst[G_NEXT]
    scal = scaling if gst[G_FROZEN] > 0.0 else scaling[:0]
    if prm[P_UNSCALED] > 0.0:
        _window_stats(num, idx, val, meta, n, lazy, state, sc, scal, prm, work, out, snum, sidx, sval, smeta)
        prm[P_UNSCALED] = 0.0  # done, once
        gst[G_VALID], gst[G_INSERTS] = 0.0, gst[G_SIZE]  # rebuilt at the next check, every row scaled
        return
    due = gst[G_SIZE] * (REBUILD_WINDOWS if gst[G_VALID] > 0.0 else 1.0)
    if gst[G_SUMS] > 0.0 and gst[G_FROZEN] > 0.0 and gst[G_INSERTS] >= due:
        # from scratch now and then (no rounding builds up), and a window after they were given up
        _rebuild(num, idx, val, meta, loc, n, gm, gi, gst)
    if gst[G_SUMS] > 0.0 and gst[G_VALID] > 0.0:
        _sums_stats(num, idx, val, meta, loc, n, lazy, state, sc, scal, prm, work, out, gm, gi, gst, wref, susp,
                    snum, sidx, sval, smeta)
    else:
        _window_stats(num, idx, val, meta, n, lazy, state, sc, scal, prm, work, out, snum, sidx, sval, smeta)


@_jit
def _score_every(f, i, g, k, lazy, state, sc, prm, out, work):
    """Every kept event scored into ``work`` (the window's own rows, or a reader's), figures into ``out``."""
    num, val, meta, _, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = _views(f, i, g, k)
    prm[P_NEXT] = gst[G_NEXT]
    scal = scaling if gst[G_FROZEN] > 0.0 else scaling[:0]
    _window_stats(num, idx, val, meta, int(gst[G_COUNT]), lazy, state, sc, scal, prm, work, out, snum, sidx, sval,
                  smeta)


class HoldoutWindow:
    """The newest ``size`` held-out events as a ring of slots, scored by a compiled pass.

    A slot holds an event's numeric features in a dense block (``num[j, slot]``) and its other
    coordinates position-major (``idx[p, slot]``), numeric values scaled once the model's warm-up
    scaling is frozen, so that scoring is a plain product. With ``sums`` (squared loss) the window
    also keeps running sums from which a check reads both losses (:func:`_sums_stats`).

    Everything lives in four arrays (a float block of rows by slot: numeric features, categorical
    values, metadata, work rows, the sample block and the scaling; an int32 block: buckets and their
    local coordinates; the sums with their bookkeeping; the sums' integer tables), because each
    array handed to a compiled function costs a fixed time per call.

    Parameters
    ----------
    size
        Events kept (the newest).
    n_numeric
        Coordinates ``0 .. n_numeric - 1`` are numeric features (the model's layout).
    width
        Categorical entries per event the ring holds to begin with (it widens when needed).
    sums
        Keep the running sums (only for the squared loss; not with more than ``SUMS_NUMERIC``
        numeric features).
    """

    def __init__(self, size: int, n_numeric: int = 0, width: int = 1, sums: bool = False) -> None:
        self.size = size
        self._sums = sums and n_numeric <= SUMS_NUMERIC
        big_l = (n_numeric + SUMS_CATEGORICAL) if self._sums else N_G
        self._g = np.zeros((big_l + 7, big_l))
        self._k = np.full(N_GI + 2 * SUSPECTS, -1, dtype=np.int64)
        gst = self._gst
        gst[G_SIZE], gst[G_NNUM], gst[G_SUMS] = size, n_numeric, float(self._sums)
        gst[G_INSERTS] = size  # a rebuild is due (at the first check with every row scaled)
        self._layout(width)
        self._unscaled = False
        #: the scaling is frozen and every kept row scaled (or being scaled by the check under way):
        #: checks need no :meth:`prepare_check` any more
        self.ready = False

    def _layout(self, width: int) -> None:
        """(Re)allocate the float and int blocks for ``width`` categorical entries, keeping the contents."""
        old = self._parts() if hasattr(self, "_f") else None
        size, nnum = self.size, int(self._gst[G_NNUM])
        part, o = -(-size // SAMPLE_EVERY), nnum + width
        self._f = np.zeros((o + N_META + N_WORK + _block_rows(o + 2, part, size) + _block_rows(2, nnum, size),
                            size))
        self._i = np.zeros((2 * width + _block_rows(width, part, size), size), dtype=np.int32)
        self._gst[G_WIDTH] = width
        new = self._parts()
        new["loc"][:] = -1
        if old is not None:
            for name, a in old.items():
                new[name][tuple(slice(0, d) for d in a.shape)] = a

    def _parts(self) -> dict:
        """The float and int blocks' views by name (:func:`_views`, the one definition of the layout)."""
        return dict(zip(_PARTS, _views(self._f, self._i, self._g, self._k)))

    @property
    def _gst(self) -> np.ndarray:
        return self._g[-1]

    @property
    def _count(self) -> int:
        return int(self._gst[G_COUNT])

    @property
    def _next(self) -> int:
        return int(self._gst[G_NEXT])

    def __len__(self) -> int:
        return int(self._g[-1, G_COUNT])

    @property
    def unscaled(self) -> bool:
        """Whether rows kept before the scaling froze still wait to be scaled (at the next check)."""
        return self._unscaled or (self._count > 0 and self._gst[G_FROZEN] == 0.0)

    @property
    def loss_raw(self) -> np.ndarray:
        """Per-slot losses of the raw iterate at the last full scoring (slots ``0..len-1``)."""
        return self._parts()["work"][0, : self._count]

    @property
    def loss_avg(self) -> np.ndarray:
        return self._parts()["work"][1, : self._count]

    def new_above(self, n_new: int, median: float) -> list:
        """1.0 / 0.0 per newly kept event of the last scoring: its averaged loss exceeds ``median``."""
        work = self._parts()["work"]
        return (work[2, self._count - n_new: self._count] > median).astype(np.float64).tolist()

    def events(self) -> np.ndarray:
        """Event indices of the kept events, slot order (matching ``loss_raw`` / ``loss_avg``)."""
        return self._parts()["meta"][M_EVENT, : self._count].astype(np.int64)

    def add(self, rows: Rows, y: np.ndarray, mode: np.ndarray, start: int, stop: int, first: int,
            events: np.ndarray | None = None) -> None:
        """Keep the rows ``start..stop`` of ``rows`` whose ``mode`` is 2 (held out), with targets ``y``
        and event indices ``events`` (or ``first`` + row), all indexed by row."""
        events = _NO_EVENTS if events is None else events
        nxt, kept = _keep(self._f, self._i, self._g, self._k, rows.indptr, rows.indices, rows.values, mode, y, events,
                          start, stop, first)
        if nxt < 0:  # a wider row than any before: widen the ring (rare) and copy again
            self.widen(-nxt)
            nxt, kept = _keep(self._f, self._i, self._g, self._k, rows.indptr, rows.indices, rows.values, mode, y,
                              events, start, stop, first)
        if kept:
            self.note_kept()

    def widen(self, width: int) -> None:
        """Make room for ``width`` categorical entries per event."""
        self._layout(width)

    def note_kept(self) -> None:
        """Rows were just kept: before the scaling froze they wait to be scaled."""
        if self._g[-1, G_FROZEN] == 0.0:
            self._unscaled = True

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change), keeping their order."""
        count, size = self._count, self.size
        parts = self._parts()
        order = np.arange(count) if count < size else (np.arange(size) + self._next) % size
        keep = order[parts["meta"][M_EVENT, order] >= event]
        k = len(keep)
        for name in ("num", "idx", "val", "meta", "work", "loc"):
            a = parts[name]
            a[:, :k] = a[:, keep]
            a[:, k:] = -1 if name == "loc" else 0
        gst = self._gst
        gst[G_COUNT], gst[G_NEXT] = k, k % size
        gst[G_VALID], gst[G_INSERTS] = 0.0, size  # rebuilt at the next check
        _resample(self._f, self._i, self._g, self._k)

    def stats(self, model: LinearModel, prm: np.ndarray, out: np.ndarray, work: np.ndarray) -> None:
        """Score every kept event with both iterates of ``model`` into ``work`` and fill ``out`` (see
        :func:`_window_stats`), for a reader outside the checks, perhaps on another thread: the ring
        is left untouched, so it must hold no unscaled rows. (A check runs ``rules.decide``.)"""
        prm[P_UNSCALED] = 0.0
        lazy, state, sc = model.kernel_state()
        _score_every(self._f, self._i, self._g, self._k, lazy, state, sc, prm, out, work)

    def prepare_check(self, model: LinearModel, prm: np.ndarray) -> None:
        """What a check settles before its compiled call (``rules.decide``): take the model's
        scaling once it is frozen, and have rows kept before then scaled by this check."""
        prm[P_UNSCALED] = 0.0
        gst = self._g[-1]
        if gst[G_FROZEN] == 0.0:
            if model.scaling_frozen:  # frozen once, for good
                self._parts()["scaling"][:] = np.stack(model.scaling)
                gst[G_FROZEN] = 1.0
        if self._unscaled and gst[G_FROZEN] > 0.0:
            prm[P_UNSCALED], self._unscaled = 1.0, False
        self.ready = gst[G_FROZEN] > 0.0

    def score_all(self, model: LinearModel, prm: np.ndarray) -> None:
        """Score every kept event now, so that ``loss_raw`` / ``loss_avg`` are all current (a check
        that read the running sums scored only some; called within a check, rows scaled)."""
        prm[P_UNSCALED] = 0.0
        lazy, state, sc = model.kernel_state()
        _score_every(self._f, self._i, self._g, self._k, lazy, state, sc, prm, np.zeros(N_STATS),
                     self._parts()["work"])
