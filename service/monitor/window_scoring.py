"""The held-out window's layouts and its per-event scoring: the full pass and its pieces.

Every compiled pass of the window (``holdout.py``, ``window_sums.py``) shares these layouts:
statistics out (``ST_*``), scalars in (``P_*``), per-slot metadata rows (``M_*``), the window's
bookkeeping (``G_*``). The full pass (:func:`_window_stats`) scores every kept event with the raw
and the averaged iterate: mean losses of both (events whose loss under both exceeds a cut are left
out: garbage targets), the median averaged-iterate loss of a fixed sample of the older events, the
same figures on the newest events, and the distance between the iterates. It reads the model's
learned arrays directly (``LinearModel.kernel_state``): neither iterate is built as a vector, and
numeric features sit in a dense block (one row per feature) whose product with the coefficients is
a plain vector loop; only categorical buckets are gathered.
"""

from __future__ import annotations

import math

import numba

from models.kernels import iterate_distance, margin_map, point_loss

LOSS_CODES = {"squared": 0, "huber": 1, "logistic": 2}
# layouts of the arrays the compiled passes share: statistics out, scalars in, per-slot metadata
(ST_MEDIAN, ST_RAW, ST_AVG, ST_KEPT, ST_NEW, ST_NEW_ABOVE, ST_REC_RAW, ST_REC_AVG, ST_REC_N, ST_DIST,
 ST_BAND_LO, ST_BAND_HI, N_STATS) = range(13)
P_CODE, P_DELTA, P_LAST, P_RECENT, P_CUT, P_UNSCALED, P_NEXT, P_ABSURD, N_PRM = range(9)
M_Y, M_EVENT, M_SCALED, N_META = range(4)
N_WORK = 4  # work rows: raw losses, averaged losses, scratch, the sample's products
# the window's bookkeeping (the last row of its sums block): running sums valid, events kept since
# their last rebuild, residual bound of the non-suspects, largest ||x||, checks since the reference
# pass, the averaged iterate's largest move since (coefficients, intercept), suspects kept (-1: too
# many), reference pass due; the sums of 1, y and y**2 over the kept events; local categorical
# coordinates handed out; the ring's shape and place (slots, numeric features, categorical width,
# slots in use, next slot); whether the scaling is frozen (then stored in the float block) and
# whether running sums are kept at all (see window_sums.py)
(G_VALID, G_INSERTS, G_TAU, G_XMAX, G_SINCE, G_DMAX, G_BMAX, G_NSUSP, G_FORCE, G_N, G_SY, G_SYY, G_HIGH,
 G_SIZE, G_NNUM, G_WIDTH, G_COUNT, G_NEXT, G_FROZEN, G_SUMS, N_G) = range(21)
# the median's sample: every SAMPLE_EVERY-th slot. A new event exceeds the median of any sample of
# the older events with probability 1/2 (exchangeability), whatever its size; 250 events of the
# default window put the sample median's quantile within about 3% of 1/2, and Page-Hinkley's own
# running mean absorbs such an offset (every 4th slot cost about 0.07 more of the learning loop,
# and the tests' 1,000,000 clean events raise as few alarms either way).
SAMPLE_EVERY = 8

_jit = numba.njit(cache=True, nogil=True, error_model="numpy")
_inline = numba.njit(cache=True, nogil=True, error_model="numpy", inline="always")
_loss = point_loss  # the kernels' own per-event loss, so window and progressive losses agree


BAND_RANKS = 8  # the median's band holds about this many values either side of the middle


@_inline
def _median(x, k, out):
    """``np.median(x[:k])`` (the same bits; ``x[:k]`` is reordered), NaN for ``k == 0`` or a NaN in ``x[:k]``.

    A quickselect on fresh losses mispredicts about every other comparison, which on this work
    costs more than scoring the sample. The median moves little from one check to the next, so
    ``out[ST_BAND_LO]`` .. ``out[ST_BAND_HI]`` carries a band around the last one: one pass counts
    the values below and within it and moves those within to the front (no branches), and only
    the few within are sorted. The band's half-width follows the values' spread near the middle
    (about ``BAND_RANKS`` values either side). When the middle ranks fall outside the band (the
    first check, a jump) the whole sample is sorted instead. Either way the order statistics are
    exact, so the result does not depend on the band."""
    if k == 0:
        return math.nan
    lo, hi = out[ST_BAND_LO], out[ST_BAND_HI]
    below = within = 0
    nan = False
    for i in range(k):
        v = x[i]
        below += v < lo
        within += (v >= lo) & (v <= hi)
        nan |= v != v
    if nan:
        return math.nan
    r2 = k >> 1
    r1 = r2 - 1 if k % 2 == 0 else r2  # the middle ranks (0-based)
    if below <= r1 and r2 < below + within:
        m = 0
        for i in range(k):  # the band's values to the front, in place (m <= i)
            v = x[i]
            x[m] = v
            m += (v >= lo) & (v <= hi)
        for i in range(1, m):  # insertion sort of the few
            v = x[i]
            j = i - 1
            while j >= 0 and x[j] > v:
                x[j + 1] = x[j]
                j -= 1
            x[j + 1] = v
        a, b = x[r1 - below], x[r2 - below]
        half = 0.5 * (hi - lo) * min(max((2.0 * BAND_RANKS + 2.0) / m, 0.5), 2.0)
    else:
        x[:k].sort()
        a, b = x[r1], x[r2]
        half = max(a - x[max(r1 - BAND_RANKS, 0)], x[min(r2 + BAND_RANKS, k - 1)] - b)
    med = (a + b) / 2 if k % 2 == 0 else b
    out[ST_BAND_LO], out[ST_BAND_HI] = med - half, med + half
    return med


@_inline
def _figures(snum, sidx, sval, smeta, n, lazy, state, sc, code, delta, last_event, work, k_new, s_raw, s_avg, kept,
             r_raw, r_avg, r_n, out):
    """A pass's last stage, the same for the full pass and the running sums: the median averaged
    loss of the older events in the sample block, how many of the ``k_new`` new events (their losses
    at the top of the scratch row) exceed it, and ``out`` filled (layout ``ST_*``). A new event
    exceeds the median of any sample of the older events with probability 1/2 just the same; every
    SAMPLE_EVERY-th slot (the sample block) costs a fraction of the work."""
    scratch = work[2]
    k_old = _sample_losses(snum, sidx, sval, smeta, (n + SAMPLE_EVERY - 1) // SAMPLE_EVERY, lazy, state, sc,
                           code, delta, last_event, work[3], scratch)
    med = _median(scratch, k_old, out)
    above = 0.0
    for k in range(n - k_new, n):
        if scratch[k] > med:
            above += 1.0
    out[ST_MEDIAN], out[ST_RAW], out[ST_AVG], out[ST_KEPT] = med, s_raw, s_avg, kept
    out[ST_NEW], out[ST_NEW_ABOVE], out[ST_REC_RAW], out[ST_REC_AVG], out[ST_REC_N] = k_new, above, r_raw, r_avg, r_n
    out[ST_DIST] = iterate_distance(lazy, state, sc)


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
    _figures(snum, sidx, sval, smeta, n, lazy, state, sc, code, delta, last_event, work, k_new, s_raw, s_avg, kept,
             r_raw, r_avg, r_n, out)


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


