"""The held-out window's running sums: both window losses of the squared loss without scoring every event.

``G = sum x x'``, ``s = sum x``, ``g = sum y x`` and the sums of 1, y, y**2 over the kept events
follow the window as events come and go (``holdout._put``), over *local coordinates*: the numeric
features, then the categorical buckets the window's events use (at most ``SUMS_CATEGORICAL``,
through a small open-addressing table). A check reads both losses from them
(:func:`_sums_stats`) and rescores one by one only what needs single events. Rebuilt from the ring
now and then; given up (every check a full pass) while the window uses more coordinates than they
follow.
"""

from __future__ import annotations

import math

from models.kernels import margin_map

from service.monitor.window_scoring import (G_BMAX, G_DMAX, G_FORCE, G_HIGH, G_INSERTS, G_N, G_NSUSP, G_SINCE, G_SY, G_SYY,
                             G_TAU, G_VALID, G_XMAX, M_EVENT, M_Y, P_ABSURD, P_CODE, P_CUT, P_DELTA, P_LAST,
                             P_NEXT, P_RECENT, ST_MEDIAN, ST_REC_AVG, ST_REC_N, ST_REC_RAW, _figures, _inline, _jit,
                             _range_losses, _slot_losses, _window_stats)

SUMS_CATEGORICAL = 64   # categorical coordinates the running sums follow at most
SUMS_NUMERIC = 48       # numeric features beyond which the sums cost more than the pass
SUSPECTS = 256          # events rescored one by one at each check at most
REFERENCE_EVERY = 128   # checks between full passes at most (the bound forces one sooner when needed)
REBUILD_WINDOWS = 16    # events kept between rebuilds of valid sums, in windows (rounding stays ~1e-13)
TAU_SHARE = 0.7         # suspects: averaged residual above this share of the cut's (see _sums_stats)
_HT = 4 * SUMS_CATEGORICAL  # open-addressing table: bucket -> local coordinate
# the integer bookkeeping (the window's int64 block): bucket of each local categorical coordinate (-1:
# none), events using it, then the table's keys (-1: empty) and values
K_KEY, K_REF, K_HTK, K_HTV, N_GI = (0, SUMS_CATEGORICAL, 2 * SUMS_CATEGORICAL, 2 * SUMS_CATEGORICAL + _HT,
                                    2 * SUMS_CATEGORICAL + 2 * _HT)


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


@_jit
def _allocate(gi, gst, nnum, key, h):
    """Give bucket ``key`` (table position ``h``) a free local coordinate (no kept event uses it);
    -1 when all are in use."""
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
def _local(gi, gst, nnum, key):
    """The local coordinate (``nnum + c``) of categorical bucket ``key``, given one if it has none."""
    h = _ht_slot(gi, key)
    if gi[K_HTK + h] == key:
        return nnum + gi[K_HTV + h]
    return _allocate(gi, gst, nnum, key, h)


@_inline
def _entry(num, val, loc, slot, a, nnum):
    """Entry ``a`` of a kept event in local coordinates: ``(coordinate or -1, value)``."""
    if a < nnum:
        return a, num[a, slot]
    return loc[a - nnum, slot], val[a - nnum, slot]


@_inline
def _own(gm, la, xa, sx, y):
    """An entry's own terms in the running sums (``x``, ``y x``, ``x**2``; ``sx`` is the signed ``x``)."""
    big_l = gm.shape[1]
    gm[big_l, la] += sx
    gm[big_l + 1, la] += sx * y
    gm[la, la] += sx * xa


@_inline
def _accumulate(num, val, loc, y, slot, gm, gst, sign):
    """Add (``sign`` 1) or take away (-1) the kept event in ``slot`` to the running sums: ``x x'``
    in ``gm[:L]`` (upper triangle: ``gm[a, b]`` for ``a <= b`` holds the sum over both orders of a
    pair, which is all the quadratic form reads), ``x`` in ``gm[L]``, ``y x`` in ``gm[L + 1]``; 1, y,
    y**2 in ``gst``. Entries in order (numeric features, then the categorical positions), zeros
    skipped, each pair once from its first entry. Returns ``||x||``."""
    nnum, width = num.shape[0], loc.shape[0]
    norm2 = 0.0
    for a in range(nnum):
        xa = num[a, slot]
        if xa == 0.0:
            continue
        norm2 += xa * xa
        sx = sign * xa
        _own(gm, a, xa, sx, y)
        for b in range(a + 1, nnum):
            xb = num[b, slot]
            if xb != 0.0:
                gm[a, b] += sx * xb
        for q in range(width):  # categorical coordinates come after the numeric ones
            lb, xb = loc[q, slot], val[q, slot]
            if lb >= 0 and xb != 0.0:
                gm[a, lb] += sx * xb
    for p in range(width):
        la, xa = loc[p, slot], val[p, slot]
        if la < 0 or xa == 0.0:
            continue
        norm2 += xa * xa
        sx = sign * xa
        _own(gm, la, xa, sx, y)
        for q in range(p + 1, width):
            lb, xb = loc[q, slot], val[q, slot]
            if lb < 0 or xb == 0.0:
                continue
            if lb == la:
                gm[la, la] += 2.0 * sx * xb
            elif lb > la:
                gm[la, lb] += sx * xb
            else:
                gm[lb, la] += sx * xb
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


@_jit
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


@_inline
def _claim_known(idx, val, loc, slot, nnum, gi):
    """:func:`_claim` when every categorical bucket of the event in ``slot`` has a local coordinate
    already (nearly always): True and claimed; else False and nothing changed (call :func:`_claim`).
    Kept apart, and :func:`_claim` compiled on its own, because the per-event loop that inlined
    its allocation path, even untaken, ran several times slower (a claim measured about 220
    cycles an event against 18). The caller writes ``_claim_known(...) or _claim(...)`` itself: the
    same two calls wrapped in one inlined function measured about 20% slower again."""
    width = loc.shape[0]
    for p in range(width):
        if val[p, slot] != 0.0:
            h = _ht_slot(gi, idx[p, slot])
            if gi[K_HTK + h] != idx[p, slot]:
                return False
    for p in range(width):
        loc[p, slot] = -1
        if val[p, slot] != 0.0:
            c = gi[K_HTV + _ht_slot(gi, idx[p, slot])]
            gi[K_REF + c] += 1
            loc[p, slot] = nnum + c
    return True


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
    wref[3, 0] = wref[3, 2]
    gst[G_TAU], gst[G_XMAX], gst[G_NSUSP] = tau, math.sqrt(xmax), ns
    gst[G_SINCE] = gst[G_DMAX] = gst[G_BMAX] = gst[G_FORCE] = 0.0


@_inline
def _newest(events, n, oldest, after):
    """How many of the newest kept events (walking back from the newest slot) came after ``after``."""
    size = events.shape[0]
    k = 0
    while k < n and events[(oldest + n - 1 - k) % size] > after:
        k += 1
    return k


@_inline
def _slots_losses(num, idx, val, y, n, oldest, count, lazy, state, sc, code, delta, work):
    """Both losses of the ``count`` newest kept events into ``work[0]`` / ``work[1]`` by slot."""
    size = work.shape[1]
    lo = (oldest + n - count) % size
    if lo + count <= size:
        _range_losses(num, idx, val, y, lo, lo + count, lazy, state, sc, code, delta, work[0], work[1])
    else:
        _range_losses(num, idx, val, y, lo, size, lazy, state, sc, code, delta, work[0], work[1])
        _range_losses(num, idx, val, y, 0, lo + count - size, lazy, state, sc, code, delta, work[0], work[1])


@_inline
def recent_figures(num, idx, val, meta, n, lazy, state, sc, prm, work, out):
    """The recent events' figures (``ST_REC_*``: held out since the check ``prm[P_RECENT]``, absurd
    ones left out), for a check that read the running sums and whose loss rule needs them."""
    code, delta, cut = int(prm[P_CODE]), prm[P_DELTA], prm[P_CUT]
    events = meta[M_EVENT]
    size = work.shape[1]
    oldest = (int(prm[P_NEXT]) - n) % size
    n_rec = _newest(events, n, oldest, prm[P_RECENT])
    _slots_losses(num, idx, val, meta[M_Y], n, oldest, n_rec, lazy, state, sc, code, delta, work)
    r_raw = r_avg = r_n = 0.0
    for k in range(n_rec):
        slot = (oldest + n - 1 - k) % size
        lr, la = work[0, slot], work[1, slot]
        if not (lr > cut and la > cut):
            r_raw += lr
            r_avg += la
            r_n += 1.0
    out[ST_REC_RAW], out[ST_REC_AVG], out[ST_REC_N] = r_raw, r_avg, r_n


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
    runs. ``wref`` rows: reference, raw and averaged coefficients, then their three intercepts."""
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
    wref[3, 1], wref[3, 2] = br, ba * ia  # the intercepts: reference, raw, averaged
    d2 = 0.0
    for la in range(used):
        d2 += (wa[la] - wref[0, la]) ** 2
    move, bmove = math.sqrt(d2), abs(wref[3, 2] - wref[3, 0])
    cut = prm[P_CUT]
    full = gst[G_FORCE] > 0.0 or gst[G_NSUSP] < 0.0 or gst[G_SINCE] >= REFERENCE_EVERY or gst[G_N] != n
    if not full and cut < math.inf:
        bound = gst[G_TAU] + gst[G_XMAX] * (move + gst[G_DMAX]) + bmove + gst[G_BMAX]
        full = not bound < math.sqrt(2.0 * cut)
    s_raw = s_avg = 0.0
    if not full:
        q_raw = q_avg = l_raw = l_avg = m_raw = m_avg = 0.0
        for a in range(used):  # the upper triangle holds the pairs (see _accumulate)
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
        b_raw, b_avg = wref[3, 1], wref[3, 2]
        s_raw = 0.5 * (q_raw + 2.0 * b_raw * l_raw + cnt * b_raw * b_raw - 2.0 * (m_raw + b_raw * sy) + syy)
        s_avg = 0.5 * (q_avg + 2.0 * b_avg * l_avg + cnt * b_avg * b_avg - 2.0 * (m_avg + b_avg * sy) + syy)
        # the sums are differences of large terms when the targets sit far from 0: keep 8 digits
        full = not (s_raw > 1e-8 * syy and s_avg > 1e-8 * syy)
    if full:
        _window_stats(num, idx, val, meta, n, lazy, state, sc, scaling, prm, work, out, snum, sidx, sval, smeta)
        _reference(num, val, loc, meta, n, work, out, prm, wref, susp, gst)
        return
    y, events = meta[M_Y], meta[M_EVENT]
    last_event = prm[P_LAST]
    scratch = work[2]
    size = work.shape[1]
    oldest = (int(prm[P_NEXT]) - n) % size
    tau2 = 0.5 * gst[G_TAU] ** 2
    ns = int(gst[G_NSUSP])
    # the new events (held out since the last check) are the newest: the slots just before the next
    # one (wrapping), scored stage by stage; the recent ones only when the loss rule asks
    # (:func:`recent_figures`; ``out[ST_REC_N]`` is -1 until then)
    k_new = _newest(events, n, oldest, last_event)
    _slots_losses(num, idx, val, y, n, oldest, k_new, lazy, state, sc, code, delta, work)
    for k in range(k_new):
        slot = (oldest + n - 1 - k) % size
        la = work[1, slot]
        scratch[n - 1 - k] = la
        if la > tau2 and ns >= 0:  # far from the average now: followed one by one from here on
            if ns == SUSPECTS:
                ns = -1
            else:
                susp[0, ns], susp[1, ns] = slot, int(events[slot])
                ns += 1
    r_raw = r_avg = 0.0
    r_n = -1.0
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
    _figures(snum, sidx, sval, smeta, n, lazy, state, sc, code, delta, last_event, work, k_new, s_raw, s_avg, kept,
             r_raw, r_avg, r_n, out)
    gst[G_NSUSP] = ns
    gst[G_SINCE] += 1.0
    gst[G_DMAX] = max(gst[G_DMAX], move)
    gst[G_BMAX] = max(gst[G_BMAX], bmove)


