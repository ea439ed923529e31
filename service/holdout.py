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
P_CODE, P_DELTA, P_LAST, P_RECENT, P_CUT, P_UNSCALED, P_NEXT, P_ABSURD, N_PRM = range(9)
M_Y, M_EVENT, M_SCALED, N_META = range(4)
N_WORK = 4  # work rows: raw losses, averaged losses, scratch, the sample's products
# the running sums' bookkeeping (``HoldoutWindow._gst``): sums valid, events kept since the last
# rebuild, residual bound of the non-suspects, largest ||x||, checks since the reference pass, the
# averaged iterate's largest move since (coefficients, intercept), suspects kept (-1: too many),
# reference pass due
# and the sums of 1, y and y**2 over the kept events
# and the sums of 1, y and y**2 over the kept events; local categorical coordinates handed out
# the ring's shape and place (slots, numeric features, categorical width, slots in use, next slot),
# whether the scaling is frozen (then stored in the float block) and the sums kept at all
(G_VALID, G_INSERTS, G_TAU, G_XMAX, G_SINCE, G_DMAX, G_BMAX, G_NSUSP, G_FORCE, G_N, G_SY, G_SYY, G_HIGH,
 G_SIZE, G_NNUM, G_WIDTH, G_COUNT, G_NEXT, G_FROZEN, G_SUMS, N_G) = range(21)
SUMS_CATEGORICAL = 64   # categorical coordinates the running sums follow at most
SUMS_NUMERIC = 48       # numeric features beyond which the sums cost more than the pass
SUSPECTS = 256          # events rescored one by one at each check at most
REFERENCE_EVERY = 128   # checks between full passes at most (the bound forces one sooner when needed)
REBUILD_WINDOWS = 16    # events kept between rebuilds of valid sums, in windows (rounding stays ~1e-13)
# the median's sample: every SAMPLE_EVERY-th slot. A new event exceeds the median of any sample of
# the older events with probability 1/2 (exchangeability), whatever its size; 250 events of the
# default window put the sample median's quantile within about 3% of 1/2, and Page-Hinkley's own
# running mean absorbs such an offset. Every 4th slot cost about 0.07 more of the learning loop.
SAMPLE_EVERY = 8
TAU_SHARE = 0.7         # suspects: averaged residual above this share of the cut's (see _sums_stats)
_HT = 4 * SUMS_CATEGORICAL  # open-addressing table: bucket -> local coordinate
# the integer bookkeeping ``HoldoutWindow._gi``: bucket of each local categorical coordinate (-1:
# none), events using it, then the table's keys (-1: empty) and values
K_KEY, K_REF, K_HTK, K_HTV, N_GI = (0, SUMS_CATEGORICAL, 2 * SUMS_CATEGORICAL, 2 * SUMS_CATEGORICAL + _HT,
                                    2 * SUMS_CATEGORICAL + 2 * _HT)

_jit = numba.njit(cache=True, nogil=True, error_model="numpy")
_loss = point_loss  # the kernels' own per-event loss, so window and progressive losses agree
_NO_EVENTS = np.zeros(0, dtype=np.int64)


_inline = numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")


@_inline
def _ht_slot(gi, key):
    """The table position of ``key``: where it is, or the empty one where it would go."""
    h = (key * 2654435761) & (_HT - 1)
    while gi[K_HTK + h] >= 0 and gi[K_HTK + h] != key:
        h = (h + 1) & (_HT - 1)
    return h


@_jit
def _ht_fill(gi):
    """Refill the table from the local coordinates' buckets (after one was given to another bucket)."""
    for h in range(_HT):
        gi[K_HTK + h] = -1
    for c in range(SUMS_CATEGORICAL):
        if gi[K_KEY + c] >= 0:
            h = _ht_slot(gi, gi[K_KEY + c])
            gi[K_HTK + h] = gi[K_KEY + c]
            gi[K_HTV + h] = c


@_inline
def _local(gi, gst, nnum, key):
    """The local coordinate (``nnum + c``) of categorical bucket ``key``, given one if it has none
    (a free one: no kept event uses it); -1 when all are in use."""
    h = _ht_slot(gi, key)
    if gi[K_HTK + h] == key:
        return nnum + gi[K_HTV + h]
    for c in range(SUMS_CATEGORICAL):
        if gi[K_REF + c] == 0:
            stale = gi[K_KEY + c] >= 0
            gi[K_KEY + c] = key
            if stale:
                _ht_fill(gi)
            else:
                gi[K_HTK + h] = key
                gi[K_HTV + h] = c
            gst[G_FORCE] = 1.0  # a coordinate the reference pass did not follow
            gst[G_HIGH] = max(gst[G_HIGH], c + 1.0)
            return nnum + c
    return -1


@_inline
def _entry(num, val, loc, slot, a, nnum):
    """Entry ``a`` of a kept event in local coordinates: ``(coordinate or -1, value)``."""
    if a < nnum:
        return a, num[a, slot]
    return loc[a - nnum, slot], val[a - nnum, slot]


@_inline
def _accumulate(num, val, loc, y, slot, gm, gst, sign):
    """Add (``sign`` 1) or take away (-1) the kept event in ``slot`` to the running sums: ``x x'``
    in ``gm[:L]``, ``x`` in ``gm[L]``, ``y x`` in ``gm[L + 1]``; 1, y, y**2 in ``gst``. Returns ``||x||``."""
    nnum, width, big_l = num.shape[0], loc.shape[0], gm.shape[1]
    norm2 = 0.0
    for a in range(nnum + width):
        la, xa = _entry(num, val, loc, slot, a, nnum)
        if la < 0 or xa == 0.0:
            continue
        norm2 += xa * xa
        sx = sign * xa
        gm[big_l, la] += sx
        gm[big_l + 1, la] += sx * y
        for j in range(nnum):  # numeric coordinates are local coordinates 0..nnum-1
            gm[la, j] += sx * num[j, slot]
        for p in range(width):
            lb = loc[p, slot]
            if lb >= 0:
                gm[la, lb] += sx * val[p, slot]
    gst[G_N] += sign
    gst[G_SY] += sign * y
    gst[G_SYY] += sign * y * y
    return math.sqrt(norm2)


@_inline
def _release(loc, slot, nnum, gm, gi):
    """The event in ``slot`` leaves: a local coordinate no kept event uses any more is zeroed (the
    rounding left in its sums goes with it) and becomes free."""
    big_l = gm.shape[1]
    for p in range(loc.shape[0]):
        la = loc[p, slot]
        if la < 0:
            continue
        loc[p, slot] = -1
        c = la - nnum
        gi[K_REF + c] -= 1
        if gi[K_REF + c] == 0:
            for k in range(big_l):
                gm[la, k] = 0.0
                gm[k, la] = 0.0
            gm[big_l, la] = 0.0
            gm[big_l + 1, la] = 0.0


@_inline
def _claim(idx, val, loc, slot, nnum, gi, gst):
    """Give the categorical entries of the event in ``slot`` their local coordinates; False when the
    coordinates run out (the sums are given up until the next rebuild)."""
    for p in range(loc.shape[0]):
        loc[p, slot] = -1
        if val[p, slot] == 0.0:
            continue
        la = _local(gi, gst, nnum, idx[p, slot])
        if la < 0:
            return False
        gi[K_REF + la - nnum] += 1
        loc[p, slot] = la
    return True


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
            if _claim(idx, val, loc, nxt, nnum, gi, gst):
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


@_jit
def _rebuild(num, idx, val, meta, loc, n, gm, gi, gst):
    """Running sums from scratch over the ``n`` kept events (all scaled); they are valid after, unless
    the events use more categorical coordinates than the sums follow."""
    nnum = num.shape[0]
    gm[:] = 0.0
    for k in range(N_GI):
        gi[k] = 0 if K_REF <= k < K_HTK else -1
    for k in (G_N, G_SY, G_SYY, G_XMAX, G_INSERTS, G_HIGH):
        gst[k] = 0.0
    gst[G_VALID], gst[G_FORCE], gst[G_NSUSP] = 1.0, 1.0, 0.0
    for slot in range(n):
        if not _claim(idx, val, loc, slot, nnum, gi, gst):
            gst[G_VALID] = 0.0
            return
        norm = _accumulate(num, val, loc, meta[M_Y, slot], slot, gm, gst, 1.0)
        gst[G_XMAX] = max(gst[G_XMAX], norm)


@_jit
def _window_stats(num, idx, val, meta, n, lazy, state, sc, scaling, prm, work, out, snum, sidx, sval, smeta):
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
                    if i % SAMPLE_EVERY == 0:  # and its copy in the sample block
                        snum[j, i // SAMPLE_EVERY] = num[j, i]
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
    # the same; every SAMPLE_EVERY-th slot (the sample block) costs a fraction of the work
    k_old = _sample_losses(snum, sidx, sval, smeta, (n + SAMPLE_EVERY - 1) // SAMPLE_EVERY, lazy, state, sc,
                           code, delta, last_event, work[3], scratch)
    med = np.median(scratch[:k_old]) if k_old > 0 else math.nan
    above = 0.0
    for k in range(n - k_new, n):
        if scratch[k] > med:
            above += 1.0
    out[ST_MEDIAN], out[ST_RAW], out[ST_AVG], out[ST_KEPT] = med, s_raw, s_avg, kept
    out[ST_NEW], out[ST_NEW_ABOVE], out[ST_REC_RAW], out[ST_REC_AVG], out[ST_REC_N] = k_new, above, r_raw, r_avg, r_n
    out[ST_DIST] = iterate_distance(lazy, state, sc)


@_inline
def _slot_losses(num, idx, val, y, slot, lazy, state, sc, code, delta):
    """Both iterates' losses on the kept event in ``slot``, as the full pass computes them (same
    order of additions, so the same bits)."""
    dv = da = 0.0
    for j in range(num.shape[0]):
        x = num[j, slot]
        dv += x * state[j, 0]
        da += x * state[j, 1]
    for p in range(idx.shape[0]):
        j, x = idx[p, slot], val[p, slot]
        dv += state[j, 0] * x
        da += state[j, 1] * x
    ar, br, ua, aa, ba, ia = margin_map(lazy, sc)
    if code == 0:
        r = ar * dv + br - y
        a = (ua * da + aa * dv + ba) * ia - y
        return 0.5 * r * r, 0.5 * a * a
    return _loss(code, delta, ar * dv + br, y), _loss(code, delta, (ua * da + aa * dv + ba) * ia, y)


@_inline
def _range_losses(num, idx, val, y, lo, hi, lazy, state, sc, code, delta, lr, la):
    """Both iterates' losses on the kept events in slots ``lo..hi`` into ``lr`` / ``la``, stage by
    stage as the full pass computes them (the same bits)."""
    for i in range(lo, hi):
        lr[i] = 0.0
        la[i] = 0.0
    for j in range(num.shape[0]):
        wv, wu, x = state[j, 0], state[j, 1], num[j]
        for i in range(lo, hi):
            lr[i] += x[i] * wv
            la[i] += x[i] * wu
    for p in range(idx.shape[0]):
        ip, vp = idx[p], val[p]
        for i in range(lo, hi):
            j, x = ip[i], vp[i]
            lr[i] += state[j, 0] * x
            la[i] += state[j, 1] * x
    ar, br, ua, aa, ba, ia = margin_map(lazy, sc)
    for i in range(lo, hi):
        dv, da = lr[i], la[i]
        if code == 0:
            r = ar * dv + br - y[i]
            a = (ua * da + aa * dv + ba) * ia - y[i]
            lr[i], la[i] = 0.5 * r * r, 0.5 * a * a
        else:
            lr[i] = _loss(code, delta, ar * dv + br, y[i])
            la[i] = _loss(code, delta, (ua * da + aa * dv + ba) * ia, y[i])


@_jit
def _sample_losses(snum, sidx, sval, smeta, ks, lazy, state, sc, code, delta, last_event, acc, scratch):
    """The averaged losses of the sample block's first ``ks`` events held out by ``last_event`` into
    ``scratch``; their count. One product per event with the averaged coefficients
    ``(ua * state[:, 1] + aa * state[:, 0]) * ia`` (``kernels.margin_map``), stage by stage over the
    block; both the full pass and the running sums take the median from here."""
    ar, br, ua, aa, ba, ia = margin_map(lazy, sc)
    for i in range(ks):
        acc[i] = 0.0
    for j in range(snum.shape[0]):
        w, x = (ua * state[j, 1] + aa * state[j, 0]) * ia, snum[j]
        for i in range(ks):
            acc[i] += x[i] * w
    for p in range(sidx.shape[0]):
        ip, vp = sidx[p], sval[p]
        for i in range(ks):
            j = ip[i]
            acc[i] += (ua * state[j, 1] + aa * state[j, 0]) * ia * vp[i]
    y, events = smeta[M_Y], smeta[M_EVENT]
    b = ba * ia
    k_old = 0
    for i in range(ks):
        if events[i] <= last_event:
            if code == 0:
                a = acc[i] + b - y[i]
                scratch[k_old] = 0.5 * a * a
            else:
                scratch[k_old] = _loss(code, delta, acc[i] + b, y[i])
            k_old += 1
    return k_old


@_jit
def _reference(num, val, loc, meta, n, work, out, prm, wref, susp, gst):
    """After a full pass: the reference the following checks bound the averaged iterate's moves
    from (``wref[0]``, filled from ``wref[2]`` by the caller), and the *suspects*, the events whose
    averaged residual exceeds ``TAU_SHARE`` of the next cut's residual, rescored one by one until the next
    full pass; every other event is provably kept as long as the bound holds (see
    :func:`_sums_stats`)."""
    cut_next = prm[P_ABSURD] * out[ST_MEDIAN]
    tau = TAU_SHARE * math.sqrt(2.0 * cut_next) if cut_next > 0.0 and cut_next < math.inf else math.inf
    half = 0.5 * tau * tau
    ns = 0
    events = meta[M_EVENT]
    da = work[1]
    for slot in range(n):
        if da[slot] > half:
            if ns == SUSPECTS:
                ns = -1
                break
            susp[0, ns], susp[1, ns] = slot, int(events[slot])
            ns += 1
    xmax = 0.0
    nnum = num.shape[0]
    for slot in range(n):
        norm2 = 0.0
        for a in range(nnum + loc.shape[0]):
            la, x = _entry(num, val, loc, slot, a, nnum)
            if la >= 0:
                norm2 += x * x
        xmax = max(xmax, norm2)
    wref[0, :] = wref[2, :]
    gst[G_TAU], gst[G_XMAX], gst[G_NSUSP] = tau, math.sqrt(xmax), ns
    gst[G_SINCE] = gst[G_DMAX] = gst[G_BMAX] = gst[G_FORCE] = 0.0


@_jit
def _sums_stats(num, idx, val, meta, loc, n, lazy, state, sc, scaling, prm, work, out, gm, gi, gst, wref, susp,
                snum, sidx, sval, smeta):
    """:func:`_window_stats` for the squared loss from the running sums, without scoring every event.

    The window's loss of an iterate ``(w, b)`` is ``(w'Gw + 2b w's + n b**2 - 2(w'g + b Sy) + Syy) / 2``
    from ``G = sum x x'``, ``s = sum x``, ``g = sum y x`` (kept up to date as events come and go,
    over the window's few coordinates): O(coordinates**2) instead of O(events x entries). What
    needs single events is scored one by one: the newest events (the drift statistic), the recent
    ones (the rollback rule's "following" test), the sample block's older ones (the median), and the
    *suspects* (events far from the average at the last full pass). An event is left out as absurd
    only when its averaged loss exceeds the cut; for a non-suspect, whose averaged residual was at
    most ``tau`` when last scored, Cauchy-Schwarz bounds it now by ``tau + ||x||max (D + Dmax) +
    (B + Bmax)`` (``D``, ``B``: the averaged iterate's move since the reference pass, coefficients
    and intercept; ``Dmax``, ``Bmax``: the largest at any check since). While that bound is below
    the cut's residual, the absurd events are among the suspects and the figures are the full
    pass's (sums up to rounding); otherwise, and every ``REFERENCE_EVERY`` checks, a full pass
    runs. ``wref`` rows: reference, raw and averaged coefficients (intercept last)."""
    nnum, big_l = num.shape[0], gm.shape[1]
    used = nnum + int(gst[G_HIGH])  # coordinates beyond were never handed out: zero sums, zero weights
    code, delta = int(prm[P_CODE]), prm[P_DELTA]
    ar, br, ua, aa, ba, ia = margin_map(lazy, sc)
    wr, wa = wref[1], wref[2]
    for la in range(used):
        if la < nnum:
            j = la
        elif gi[K_REF + la - nnum] > 0:
            j = gi[K_KEY + la - nnum]
        else:
            wr[la] = wa[la] = 0.0
            continue
        wr[la] = ar * state[j, 0]
        wa[la] = (ua * state[j, 1] + aa * state[j, 0]) * ia
    wr[big_l], wa[big_l] = br, ba * ia
    d2 = 0.0
    for la in range(used):
        d2 += (wa[la] - wref[0, la]) ** 2
    move, bmove = math.sqrt(d2), abs(wa[big_l] - wref[0, big_l])
    cut = prm[P_CUT]
    full = gst[G_FORCE] > 0.0 or gst[G_NSUSP] < 0.0 or gst[G_SINCE] >= REFERENCE_EVERY or gst[G_N] != n
    if not full and cut < math.inf:
        bound = gst[G_TAU] + gst[G_XMAX] * (move + gst[G_DMAX]) + bmove + gst[G_BMAX]
        full = not bound < math.sqrt(2.0 * cut)
    s_raw = s_avg = 0.0
    if not full:
        q_raw = q_avg = l_raw = l_avg = m_raw = m_avg = 0.0
        for a in range(used):  # G is exactly symmetric (both halves get the same products)
            g_raw = 0.5 * gm[a, a] * wr[a]
            g_avg = 0.5 * gm[a, a] * wa[a]
            for b in range(a + 1, used):
                g_raw += gm[a, b] * wr[b]
                g_avg += gm[a, b] * wa[b]
            q_raw += 2.0 * wr[a] * g_raw
            q_avg += 2.0 * wa[a] * g_avg
            l_raw += wr[a] * gm[big_l, a]
            l_avg += wa[a] * gm[big_l, a]
            m_raw += wr[a] * gm[big_l + 1, a]
            m_avg += wa[a] * gm[big_l + 1, a]
        cnt, sy, syy = gst[G_N], gst[G_SY], gst[G_SYY]
        b_raw, b_avg = wr[big_l], wa[big_l]
        s_raw = 0.5 * (q_raw + 2.0 * b_raw * l_raw + cnt * b_raw * b_raw - 2.0 * (m_raw + b_raw * sy) + syy)
        s_avg = 0.5 * (q_avg + 2.0 * b_avg * l_avg + cnt * b_avg * b_avg - 2.0 * (m_avg + b_avg * sy) + syy)
        # the sums are differences of large terms when the targets sit far from 0: keep 8 digits
        full = not (s_raw > 1e-8 * syy and s_avg > 1e-8 * syy)
    if full:
        _window_stats(num, idx, val, meta, n, lazy, state, sc, scaling, prm, work, out, snum, sidx, sval, smeta)
        _reference(num, val, loc, meta, n, work, out, prm, wref, susp, gst)
        return
    y, events = meta[M_Y], meta[M_EVENT]
    last_event, recent_from = prm[P_LAST], prm[P_RECENT]
    scratch = work[2]
    size = work.shape[1]
    oldest = (int(prm[P_NEXT]) - n) % size
    tau2 = 0.5 * gst[G_TAU] ** 2
    ns = int(gst[G_NSUSP])
    # the recent events (held out during the last checks) are the newest: the slots just before the
    # next one (wrapping), scored stage by stage; the new ones (since the last check) come first
    n_rec = 0
    while n_rec < n and events[(oldest + n - 1 - n_rec) % size] > recent_from:
        n_rec += 1
    lo_rec = (oldest + n - n_rec) % size
    if lo_rec + n_rec <= size:
        _range_losses(num, idx, val, y, lo_rec, lo_rec + n_rec, lazy, state, sc, code, delta, work[0], work[1])
    else:
        _range_losses(num, idx, val, y, lo_rec, size, lazy, state, sc, code, delta, work[0], work[1])
        _range_losses(num, idx, val, y, 0, lo_rec + n_rec - size, lazy, state, sc, code, delta, work[0], work[1])
    k_new = 0
    r_raw = r_avg = r_n = 0.0
    for k in range(n_rec):
        slot = (oldest + n - 1 - k) % size
        lr, la = work[0, slot], work[1, slot]
        if not (lr > cut and la > cut):
            r_raw += lr
            r_avg += la
            r_n += 1.0
        if k == k_new and events[slot] > last_event:
            scratch[n - 1 - k_new] = la
            if la > tau2 and ns >= 0:  # far from the average now: followed one by one from here on
                if ns == SUSPECTS:
                    ns = -1
                else:
                    susp[0, ns], susp[1, ns] = slot, int(events[slot])
                    ns += 1
            k_new += 1
    kept = n
    if ns < 0:  # too many to follow: this check still needs them all
        _window_stats(num, idx, val, meta, n, lazy, state, sc, scaling, prm, work, out, snum, sidx, sval, smeta)
        _reference(num, val, loc, meta, n, work, out, prm, wref, susp, gst)
        return
    k = 0
    while k < ns:
        slot = susp[0, k]
        if events[slot] != susp[1, k]:  # gone from the window
            ns -= 1
            susp[0, k], susp[1, k] = susp[0, ns], susp[1, ns]
            continue
        lr, la = _slot_losses(num, idx, val, y[slot], slot, lazy, state, sc, code, delta)
        if lr > cut and la > cut:
            s_raw -= lr
            s_avg -= la
            kept -= 1
        k += 1
    k_old = _sample_losses(snum, sidx, sval, smeta, (n + SAMPLE_EVERY - 1) // SAMPLE_EVERY, lazy, state, sc,
                           code, delta, last_event, work[3], scratch)
    med = np.median(scratch[:k_old]) if k_old > 0 else math.nan
    above = 0.0
    for k in range(n - k_new, n):
        if scratch[k] > med:
            above += 1.0
    out[ST_MEDIAN], out[ST_RAW], out[ST_AVG], out[ST_KEPT] = med, s_raw, s_avg, kept
    out[ST_NEW], out[ST_NEW_ABOVE], out[ST_REC_RAW], out[ST_REC_AVG], out[ST_REC_N] = k_new, above, r_raw, r_avg, r_n
    out[ST_DIST] = iterate_distance(lazy, state, sc)
    gst[G_NSUSP] = ns
    gst[G_SINCE] += 1.0
    gst[G_DMAX] = max(gst[G_DMAX], move)
    gst[G_BMAX] = max(gst[G_BMAX], bmove)


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
    big_l = g.shape[1] - 1
    gst = g[big_l + 5]
    size, nnum, width = int(gst[G_SIZE]), int(gst[G_NNUM]), int(gst[G_WIDTH])
    part = (size + SAMPLE_EVERY - 1) // SAMPLE_EVERY
    o = nnum + width
    num, val, meta, work = f[:nnum], f[nnum:o], f[o:o + 3], f[o + 3:o + 3 + N_WORK]
    sample = _block(f, o + 3 + N_WORK, o + 2, part)
    scaling = _block(f, o + 3 + N_WORK + -(-((o + 2) * part) // size), 2, nnum)
    idx, loc = i[:width], i[width:2 * width]
    sidx = _block(i, 2 * width, width, part)
    return (num, val, meta, work, sample[:nnum], sample[nnum:o], sample[o:o + 2], scaling, idx, loc, sidx,
            g[:big_l + 2, :big_l], g[big_l + 2:big_l + 5], gst, k[:N_GI], k[N_GI:].reshape((2, SUSPECTS)))


@_jit
def _keep(f, i, g, k, indptr, indices, values, mode, y, events, lo, hi, first):
    """:func:`_put` on the window's blocks; ``(next slot, kept)`` as it returns (the ring's place is
    updated in the bookkeeping unless a row was too wide)."""
    num, val, meta, work, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = _views(f, i, g, k)
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


@_jit
def _check_pass(f, i, g, k, lazy, state, sc, prm, out):
    """A check's figures into ``out``: scale rows kept before the scaling froze (a full pass), rebuild
    the running sums when due, then read them (:func:`_sums_stats`) or score every event."""
    num, val, meta, work, snum, sval, smeta, scaling, idx, loc, sidx, gm, wref, gst, gi, susp = _views(f, i, g, k)
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
    array handed to a compiled function costs a fixed time per call, and a check makes two.

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
        self._g = np.zeros((big_l + 6, big_l + 1))
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
        self._f = np.zeros((o + 3 + N_WORK + _block_rows(o + 2, part, size) + _block_rows(2, nnum, size), size))
        self._i = np.zeros((2 * width + _block_rows(width, part, size), size), dtype=np.int32)
        self._gst[G_WIDTH] = width
        new = self._parts()
        new["loc"][:] = -1
        if old is not None:
            for name, a in old.items():
                new[name][tuple(slice(0, d) for d in a.shape)] = a

    def _parts(self) -> dict:
        """The blocks' views by name (the layout :func:`_views` reads)."""
        size, nnum, width = self.size, int(self._gst[G_NNUM]), int(self._gst[G_WIDTH])
        part, o = -(-size // SAMPLE_EVERY), nnum + width
        f, i = self._f, self._i

        def block(a, first, rows, cols):
            return a[first:first + _block_rows(rows, cols, size)].reshape(-1)[:rows * cols].reshape(rows, cols)

        sample = block(f, o + 3 + N_WORK, o + 2, part)
        return {"num": f[:nnum], "val": f[nnum:o], "meta": f[o:o + 3], "work": f[o + 3:o + 3 + N_WORK],
                "snum": sample[:nnum], "sval": sample[nnum:o], "smeta": sample[o:o + 2],
                "scaling": block(f, o + 3 + N_WORK + _block_rows(o + 2, part, size), 2, nnum),
                "idx": i[:width], "loc": i[width:2 * width], "sidx": block(i, 2 * width, width, part)}

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

    def stats(self, model: LinearModel, prm: np.ndarray, out: np.ndarray, work: np.ndarray | None = None) -> None:
        """Score the kept events with both iterates of ``model`` and fill ``out`` (see
        :func:`_window_stats`; a check of a window with running sums reads them, see
        :func:`_sums_stats`, and then only the per-slot losses of events it scored are current).

        With ``work`` given (a reader outside the check, perhaps on another thread) the ring is left
        untouched and every event is scored: it must hold no unscaled rows then.
        """
        prm[P_UNSCALED] = 0.0
        lazy, state, sc = model.kernel_state()
        if work is not None:
            _score_every(self._f, self._i, self._g, self._k, lazy, state, sc, prm, out, work)
            return
        self.prepare_check(model, prm)
        _check_pass(self._f, self._i, self._g, self._k, lazy, state, sc, prm, out)

    def prepare_check(self, model: LinearModel, prm: np.ndarray) -> None:
        """What a check settles before its compiled pass (:func:`_check_pass`): take the model's
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
