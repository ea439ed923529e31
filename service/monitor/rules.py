"""The monitor's per-check rules, compiled: one call scores the window and decides.

``Monitor.check`` (``monitor.py``, where the rules are documented) calls :func:`decide` once per
check. It scores the held-out window (``holdout._check_in``), applies the rollback rule, keeps
the healthy-check count, runs the Page-Hinkley test on the exceedance share and picks the serving
iterate, all on one array of settings and state (layout ``C_*``, ``S_*``, ``PH_*``, ``B_*``), and
writes what happened to ``res`` (layout ``R_*``). Python runs afterwards only to build the check's
record and, when ``res`` asks for it, to act: roll back (restore a copy, record an incident), take a
trusted copy, confirm an alarm, feed ADWIN. A check costs a fixed time per Python statement and per
array handed to a compiled function, which on a fast model is most of its price; hence one call.

Page-Hinkley here is :class:`service.monitor.drift.PageHinkley` operation for operation (the tests check
both against river's documented detections and against each other on random streams).
"""

from __future__ import annotations

import math

from models.kernels import S_GN, S_GSQ, S_LASTETA

from service.monitor.holdout import (G_COUNT, G_FROZEN, N_PRM, N_STATS, P_CUT, P_LAST, P_RECENT, ST_AVG, ST_DIST, ST_KEPT,
                      ST_MEDIAN, ST_NEW, ST_NEW_ABOVE, ST_RAW, ST_REC_AVG, ST_REC_N, ST_REC_RAW, _check_in, _keep_in,
                      _views)
from service.monitor.window_scoring import _inline, _jit  # the window's compile settings, one definition
from service.monitor.window_sums import recent_figures

__all__ = ["BOUNDS", "F_DRIFT", "F_RULES", "F_WIDEN", "N_MONITOR", "N_RES", "N_STATE", "decide", "ph_feed", "ph_load",
           "ph_reset"]

# settings (fixed at start)
(C_MARGIN, C_PATIENCE, C_MIN_HOLDOUT, C_LIMIT, C_NOISE, C_SNAPSHOT, C_ROLLBACK, C_ABSURD, C_BETTER, C_DRIFT,
 C_CONFIRM, C_GFIX, C_BOUNDS, C_RECENT,
 # state
 S_STREAK, S_HEALTHY, S_ALERT, S_REFUSED, S_G2, S_ALARM, S_ALARM_CHECKS, S_RAW_SERVED, S_IGNORED,
 # Page-Hinkley: settings, then state
 PH_MIN, PH_DELTA, PH_THRESHOLD, PH_ALPHA, PH_MODE,
 PH_DETECTED, PH_N, PH_MEAN, PH_INC, PH_DEC, PH_MIN_INC, PH_MAX_DEC,
 # event indices of the last checks: how many, where the next goes, then the ring
 B_LEN, B_POS, B_RING) = range(38)
BOUNDS = 65  # ring slots (the bounds kept: min(max(patience, confirm_recent), 64) + 1)
N_STATE = B_RING + BOUNDS
DRIFT_CODES = {"off": 0, "page_hinkley": 1, "adwin": 2}
PH_MODES = {"up": 0, "down": 1, "both": 2}
# what a check found and asks for
(R_RAW, R_AVG, R_HELD, R_KEPT, R_DIST, R_ALLOWANCE, R_LIMIT, R_FOLLOWING, R_REASON, R_STREAK, R_REFUSED,
 R_IGNORED, R_ROLLBACK, R_SNAPSHOT, R_EXCEEDANCE, R_ALARM, R_CONFIRM, R_ADWIN, R_LAST, R_CONFIRM_FROM,
 R_WIDEN, R_KEPT_NOW, R_RAW_SERVED, N_RES) = range(24)
# the monitor's one float array: window scalars (holdout.P_*), window figures (ST_*), results, state
O_PRM, O_OUT, O_RES = 0, N_PRM, N_PRM + N_STATS
O_STATE = O_RES + N_RES
N_MONITOR = O_STATE + N_STATE
REASON_REFUSED, REASON_DISTANCE, REASON_LOSS = 1, 2, 3
# what :func:`decide` returns: 0 for a plain check (nothing beyond its record), else these bits
F_WIDEN = 1   # a row was wider than the window: nothing changed, widen and call again
F_RULES = 2   # the loss rule saw the raw iterate following, a rollback trigger fired, or a trusted copy is due
F_DRIFT = 4   # ADWIN must read the new events, an alarm was raised, or an alarm's confirmation is due


def ph_load(m, ph) -> None:
    """Take the settings of a :class:`service.monitor.drift.PageHinkley` ``ph`` into ``m``, state as new."""
    m[PH_MIN], m[PH_DELTA], m[PH_THRESHOLD] = ph.min_instances, ph.delta, ph.threshold
    m[PH_ALPHA], m[PH_MODE] = ph.alpha, PH_MODES[ph.mode]
    ph_reset(m)


@_jit
def ph_reset(m):
    """Page-Hinkley's state as new (``PageHinkley._reset``)."""
    m[PH_DETECTED] = 0.0
    m[PH_N] = m[PH_MEAN] = m[PH_INC] = m[PH_DEC] = 0.0
    m[PH_MIN_INC] = math.inf
    m[PH_MAX_DEC] = -1.0


@_inline
def _ph_update(m, x):
    """``PageHinkley.update(x)``, the same operations in the same order."""
    if m[PH_DETECTED] > 0.0:
        ph_reset(m)
    m[PH_N] += 1.0
    m[PH_MEAN] += (1.0 / m[PH_N]) * (x - m[PH_MEAN])
    dev = x - m[PH_MEAN]
    m[PH_INC] = m[PH_ALPHA] * m[PH_INC] + dev - m[PH_DELTA]
    m[PH_DEC] = m[PH_ALPHA] * m[PH_DEC] + dev + m[PH_DELTA]
    m[PH_MIN_INC] = min(m[PH_MIN_INC], m[PH_INC])
    m[PH_MAX_DEC] = max(m[PH_MAX_DEC], m[PH_DEC])
    if m[PH_N] >= m[PH_MIN]:
        up = m[PH_INC] - m[PH_MIN_INC] > m[PH_THRESHOLD]
        down = m[PH_MAX_DEC] - m[PH_DEC] > m[PH_THRESHOLD]
        mode = m[PH_MODE]
        if mode == 0.0:
            hit = up
        elif mode == 1.0:
            hit = down
        else:
            hit = up or down
        m[PH_DETECTED] = 1.0 if hit else 0.0
    return m[PH_DETECTED] > 0.0


@_jit
def ph_feed(m, xs):
    """Feed ``xs`` in order; the indices at which the test fired (for the tests)."""
    fired = []
    for k in range(xs.shape[0]):
        if _ph_update(m, xs[k]):
            fired.append(k)
    return fired


@_inline
def _bound(m, back):
    """The event index of the ``back``-th last check (1: the last), as ``deque[-back]``."""
    return m[B_RING + int((m[B_POS] - back) % BOUNDS)]


@_jit
def decide(f, i, g, k, indptr, indices, values, mode, y, lo, hi, first, lazy, state, sc, mon, event):
    """Keep the held-out rows among ``lo..hi`` (as ``holdout._put``), score the window and apply the
    rules for the check at ``event``; ``mon`` holds the window scalars, figures, results and the
    rules' state (layout ``O_*``). Returns 0 when the caller has only the record to build, else the
    ``F_*`` bits of what it must act on. A row wider than the window stops it before anything
    changes (``F_WIDEN``; ``res[R_WIDEN]``: the width needed)."""
    prm, out = mon[O_PRM:O_PRM + N_PRM], mon[O_OUT:O_OUT + N_STATS]
    res, m = mon[O_RES:O_RES + N_RES], mon[O_STATE:]
    v = _views(f, i, g, k)  # once for both stages
    nxt, kept_now = _keep_in(v, indptr, indices, values, mode, y, indptr[:0], lo, hi, first)
    if nxt < 0:
        res[R_WIDEN] = -nxt
        return F_WIDEN
    n_bounds = int(m[B_LEN])
    patience = m[C_PATIENCE]
    prm[P_LAST] = _bound(m, 1)
    prm[P_RECENT] = _bound(m, min(int(patience), n_bounds))
    _check_in(v, lazy, state, sc, prm, out)
    median = out[ST_MEDIAN]
    if median > 0.0:
        prm[P_CUT] = m[C_ABSURD] * median
    gst = v[13]
    n = gst[G_COUNT]
    kept = out[ST_KEPT]
    raw = out[ST_RAW] / kept if kept > 0.0 else math.nan
    avg = out[ST_AVG] / kept if kept > 0.0 else math.nan
    dist = out[ST_DIST]
    if m[C_GFIX] > 0.0:
        gb = m[C_GFIX]
    else:
        gb = math.sqrt(sc[S_GSQ] / sc[S_GN]) if sc[S_GN] > 0.0 else math.nan
    if gb == gb and 0.0 < gb * gb < m[S_G2]:
        m[S_G2] = gb * gb
    allowance = m[C_NOISE] * sc[S_LASTETA] * m[S_G2] / 4.0 if m[S_G2] < math.inf else 0.0
    for q in range(N_RES):
        res[q] = 0.0
    res[R_EXCEEDANCE] = math.nan
    res[R_ALARM] = -1.0
    res[R_KEPT_NOW] = kept_now
    res[R_RAW], res[R_AVG], res[R_HELD], res[R_KEPT], res[R_DIST] = raw, avg, n, kept, dist
    res[R_ALLOWANCE], res[R_LIMIT], res[R_REFUSED] = allowance, m[C_LIMIT], m[S_REFUSED]
    reason = 0
    by_loss = False
    if m[S_REFUSED] > 0.0:
        reason = REASON_REFUSED
    elif dist > m[C_LIMIT]:
        reason = REASON_DISTANCE
    elif kept >= m[C_MIN_HOLDOUT]:
        worse = raw > (1.0 + m[C_MARGIN]) * avg + allowance
        if worse and out[ST_REC_N] < 0.0:  # the running sums leave the recent events' figures to here
            recent_figures(v[0], v[8], v[1], v[2], int(n), lazy, state, sc, prm, v[3], out)
        if worse and out[ST_REC_N] >= 10.0 and out[ST_REC_RAW] < out[ST_REC_AVG]:
            worse = False
            res[R_FOLLOWING] = 1.0
        m[S_STREAK] = m[S_STREAK] + 1.0 if worse else 0.0
        # right after a rollback the fault has shown itself: one worse check is enough then
        if m[S_STREAK] >= (1.0 if m[S_ALERT] > 0.0 else patience):
            by_loss = True
            reason = REASON_LOSS
    res[R_REASON], res[R_STREAK] = reason, m[S_STREAK]
    if reason and m[C_ROLLBACK] == 0.0:  # observed, not acted on: rollbacks are switched off
        res[R_IGNORED] = 1.0
        m[S_IGNORED] += 1.0
        reason = 0
    if reason:
        res[R_ROLLBACK] = 1.0  # the caller restores and records; the rules' state starts over
        m[S_STREAK] = m[S_HEALTHY] = 0.0
        m[S_ALERT] = 1.0 if by_loss else 0.0
    elif m[S_STREAK] > 0.0:
        m[S_HEALTHY] = 0.0
    else:
        m[S_HEALTHY] += 1.0
        m[S_ALERT] = 1.0 if (m[S_ALERT] > 0.0 and m[S_HEALTHY] < patience) else 0.0
        if m[S_HEALTHY] % m[C_SNAPSHOT] == 0.0 and gst[G_FROZEN] > 0.0:
            res[R_SNAPSHOT] = 1.0
    m[S_REFUSED] = 0.0
    res[R_LAST] = _bound(m, 1)
    res[R_CONFIRM_FROM] = _bound(m, min(int(m[C_RECENT]), n_bounds))
    if m[C_DRIFT] > 0.0:
        if m[S_ALARM] < 0.0:
            n_new = out[ST_NEW]
            if n_new > 0.0 and n - n_new >= 10.0 and median > 0.0:
                share = out[ST_NEW_ABOVE] / n_new
                res[R_EXCEEDANCE] = share
                if m[C_DRIFT] == 2.0:
                    res[R_ADWIN] = 1.0  # river's ADWIN reads the events one by one (the caller)
                elif _ph_update(m, share):
                    m[S_ALARM] = res[R_LAST] + 1.0
                    m[S_ALARM_CHECKS] = 0.0
                    res[R_ALARM] = m[S_ALARM]
        else:
            m[S_ALARM_CHECKS] += 1.0
            if m[S_ALARM_CHECKS] >= m[C_CONFIRM]:
                res[R_CONFIRM] = 1.0
    if m[C_BETTER] > 0.0 and kept > 0.0:
        m[S_RAW_SERVED] = 1.0 if raw < avg else 0.0
    res[R_RAW_SERVED] = m[S_RAW_SERVED]
    # the ring of the last checks' event indices (as deque(maxlen=C_BOUNDS).append)
    m[B_RING + int(m[B_POS])] = event
    m[B_POS] = (m[B_POS] + 1.0) % BOUNDS
    m[B_LEN] = min(m[B_LEN] + 1.0, m[C_BOUNDS])
    flags = F_RULES if (res[R_FOLLOWING] > 0.0 or res[R_REASON] > 0.0 or res[R_SNAPSHOT] > 0.0) else 0
    if res[R_ADWIN] > 0.0 or res[R_ALARM] >= 0.0 or res[R_CONFIRM] > 0.0:
        flags |= F_DRIFT
    return flags
