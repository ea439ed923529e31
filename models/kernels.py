"""Compiled per-event learning loops (numba).

Two representations of the same algorithm, selected by ``ModelSpec.kernel``:

``lazy`` (default)
    The cost of an event grows with its active features, not with the model's dimension. The raw
    coefficients are ``w = a * v`` with a scalar ``a``, so an l2 shrink or a ball projection is one
    multiplication of ``a``; ``||v||^2`` is kept up to date so the ball projection needs no pass over
    ``v``. The weighted sum of iterates ``S = sum_s c_s w_s`` is kept as ``S = U + A v`` with
    ``A = sum_s c_s a_s``: between two events that touch coordinate ``j``, ``v_j`` is constant, so a
    change ``delta`` of ``v_j`` only needs ``U_j -= A * delta`` (the trick of W. Xu, 2011, "Towards
    optimal one pass large scale learning with averaged stochastic gradient descent", sec. 5,
    extended here to projections and other weights). The averaged iterate is ``S / Z``,
    ``Z = sum_s c_s``. When ``a`` falls below ``1e-6`` the state is rebased (one pass over ``v``).
``dense``
    The textbook form: explicit ``w`` and ``xbar``, every step touches every coordinate. It is the
    reference the lazy form is tested against. Rounding differs (the lazy form multiplies by ``a`` and
    divides by ``Z`` late): on well-conditioned runs the two agree to about ``1e-9`` relative, but a
    run that is chaotic (steps large enough that tiny differences change later projections, refusals
    or rollbacks) amplifies them, and there the two can differ by a few percent.

One event, in order: score with the serving iterate (the progressive prediction), then, if it is a
learning event, take the gradient of the loss at the raw iterate, compute the step, shrink by the l2
term, step, project, check that every new value is finite (else refuse and change nothing), and
record the new raw iterate in the average. State lives in plain arrays so that a snapshot is a byte
copy; the layout of the scalar and parameter arrays is given by the ``S_*`` and ``P_*`` indices
(:mod:`models.layout`).
"""

from __future__ import annotations

import math

from .jit import numba

__all__ = [
    "N_PARAMS",
    "N_SCALARS",
    "dense_process",
    "lazy_process",
    "lazy_rebase",
    "margin_map",
    "pair_margins",
    "point_loss",
]

from .layout import (  # noqa: F401 (the layout is part of this module's interface)
    EXP_RENORM_ABOVE, LEARNED, N_PARAMS, N_SCALARS, NORM_REFRESH, P_AVG, P_BASE, P_CONS, P_DELTA, P_EXPR, P_GFIX,
    P_HORIZON, P_INTERCEPT, P_L2, P_LAZY, P_LOSS, P_LOWER, P_NNUM, P_R, P_RADIUS, P_RULE, P_UPPER, REBASE_BELOW,
    REFUSED, S_A, S_ACC, S_B, S_CEXP, S_GN, S_GSQ, S_LASTETA, S_LASTG, S_NUPD, S_NV2, S_REFUSED, S_SB, S_STEPSCALE,
    S_TAVG, S_TSTEP, S_Z, SCORED,
)

# error_model="numpy": a division by zero gives inf/nan (caught by the finiteness checks) instead of
# a Python exception, which spares a branch on every division in the hot loop
_jit = numba.njit(cache=True, nogil=True, fastmath=False, error_model="numpy")
_inline = numba.njit(cache=True, nogil=True, fastmath=False, error_model="numpy", inline="always")


@_inline
def _loss(code, delta, m, y):
    if code == 0:
        r = m - y
        return 0.5 * r * r
    if code == 1:
        r = abs(m - y)
        return 0.5 * r * r if r <= delta else delta * (r - 0.5 * delta)
    # logistic, stable log(1 + exp(m)) - y m
    if m > 0:
        return m + math.log1p(math.exp(-m)) - y * m
    return math.log1p(math.exp(m)) - y * m


#: the per-event loss, for other compiled code that must agree with the kernels (the held-out window)
point_loss = _loss


@_inline
def _dloss(code, delta, m, y):
    if code == 0:
        return m - y
    if code == 1:
        r = m - y
        return min(max(r, -delta), delta)
    return 0.5 * (1.0 + math.tanh(0.5 * m)) - y


@_inline
def _step(prm, sc, t, gnorm):
    rule = int(prm[P_RULE])
    if rule == 0:
        eta = prm[P_BASE]
    elif rule == 1:
        eta = prm[P_BASE] / math.sqrt(t)
    elif rule == 4:
        eta = 2.0 / (prm[P_L2] * (t + 1.0))
    else:
        if gnorm <= 0.0:
            return 0.0
        horizon = prm[P_HORIZON] if rule == 2 else t
        eta = prm[P_R] / (gnorm * math.sqrt(horizon))
    return eta * sc[S_STEPSCALE]


@_inline
def _score_event(lazy, st, sc, prm, mean, std, indices, values, lo, hi, xs):
    """Gather one event's scaled values into ``xs`` and return its raw and averaged margins,
    ``sum x^2`` and ``<v, x>`` in one pass (both iterates' coefficients share a cache line)."""
    nnum = int(prm[P_NNUM])
    sq = 0.0
    dv = 0.0
    da = 0.0
    for k in range(lo, hi):
        j = indices[k]
        x = values[k]
        if j < nnum:
            x = (x - mean[j]) / std[j]
        xs[k - lo] = x
        sq += x * x
        dv += st[j, 0] * x
        da += st[j, 1] * x
    raw, avg = pair_margins(lazy, sc, dv, da)
    return raw, avg, sq, dv


@_inline
def pair_margins(lazy, sc, dv, da):
    """The raw and averaged margins of an event from ``dv = <state[:, 0], x>`` and
    ``da = <state[:, 1], x>`` (intercepts included), in either representation."""
    if lazy:
        raw = sc[S_A] * dv + sc[S_B]
        avg = (da + sc[S_ACC] * dv + sc[S_SB]) / sc[S_Z] if sc[S_Z] > 0.0 else raw
    else:
        raw = dv + sc[S_B]
        avg = da + sc[S_SB] if sc[S_Z] > 0.0 else raw
    return raw, avg


@_inline
def margin_map(lazy, sc):
    """:func:`pair_margins` for many events at once, as coefficients of an affine map:
    ``raw = ar * dv + br`` and ``avg = (ua * da + aa * dv + ba) * ia``, returned as
    ``(ar, br, ua, aa, ba, ia)`` (a product by ``1/Z`` instead of a division per event, so the
    averaged margin may differ from ``pair_margins`` in the last bit)."""
    ar = sc[S_A] if lazy else 1.0
    br = sc[S_B]
    if sc[S_Z] <= 0.0:  # nothing averaged yet: the average is the raw iterate
        return ar, br, 0.0, ar, br, 1.0
    return ar, br, 1.0, (sc[S_ACC] if lazy else 0.0), sc[S_SB], (1.0 / sc[S_Z] if lazy else 1.0)


@_inline
def _gradient_bound(prm, sc, g, sq, wx, wnorm2):
    """Record ``||grad||^2`` of this event (loss part + l2 part) and return the current ``G``."""
    l2 = prm[P_L2]
    b = sc[S_B]
    icpt = prm[P_INTERCEPT]
    gn2 = g * g * (sq + icpt) + 2.0 * g * l2 * (wx + icpt * b) + l2 * l2 * (wnorm2 + b * b)
    gn2 = max(gn2, 0.0)
    if prm[P_GFIX] > 0.0:
        return prm[P_GFIX], gn2
    return math.sqrt((sc[S_GSQ] + gn2) / (sc[S_GN] + 1.0)), gn2


@_inline
def _record_average(sc, prm):
    """Advance the averaging weights by one update of the raw iterate ``(a * v, b)``."""
    sc[S_TAVG] += 1.0
    avg = int(prm[P_AVG])
    if avg == 0:
        c = 1.0
    elif avg == 1:
        c = sc[S_TAVG]
    else:
        sc[S_CEXP] *= prm[P_EXPR]
        c = sc[S_CEXP]
    sc[S_Z] += c
    return c


@_jit
def lazy_rebase(st, sc):
    """Fold ``A v`` into ``U`` and ``a`` into ``v``: same iterates, ``a = 1``, ``A = 0``."""
    a = sc[S_A]
    big_a = sc[S_ACC]
    nv2 = 0.0
    for j in range(st.shape[0]):
        st[j, 1] += big_a * st[j, 0]
        st[j, 0] *= a
        nv2 += st[j, 0] * st[j, 0]
    sc[S_ACC] = 0.0
    sc[S_A] = 1.0
    sc[S_NV2] = nv2


@_jit
def _exp_renorm(lazy, st, sc):
    c = sc[S_CEXP]
    if lazy:
        for j in range(st.shape[0]):
            st[j, 1] /= c
        sc[S_ACC] /= c
        sc[S_SB] /= c
    sc[S_Z] /= c
    sc[S_CEXP] = 1.0


@_inline
def _learn_lazy(st, sc, prm, indices, lo, hi, xs, sq, raw, dv, y, cand):
    g = _dloss(int(prm[P_LOSS]), prm[P_DELTA], raw, y)
    a = sc[S_A]
    gnorm, gn2 = _gradient_bound(prm, sc, g, sq, a * dv, a * a * sc[S_NV2])
    t = sc[S_TSTEP] + 1.0
    eta = _step(prm, sc, t, gnorm)
    shrink = max(1.0 - eta * prm[P_L2], 0.0)
    zero = False
    if a * shrink < REBASE_BELOW:
        lazy_rebase(st, sc)
        if shrink == 0.0:
            # the full shrink makes w = 0; v is zeroed only once the update is accepted
            zero = True
            shrink = 1.0
        a = 1.0
    new_a = a * shrink
    b = 0.0 if zero else sc[S_B] * shrink
    if prm[P_INTERCEPT] > 0.0:
        b -= eta * g
    nv2 = 0.0 if zero else sc[S_NV2]
    step = eta * g / new_a
    for k in range(lo, hi):
        j = indices[k]
        old = 0.0 if zero else st[j, 0]
        nv = old - step * xs[k - lo]
        nv2 += nv * nv - old * old
        cand[k - lo] = nv
    # a NaN or infinite candidate makes the running sum of squares NaN or infinite: one test for all
    finite = math.isfinite(nv2)
    nv2 = max(nv2, 0.0)
    cons = int(prm[P_CONS])
    if cons == 1:
        norm2 = new_a * new_a * nv2 + b * b
        r = prm[P_RADIUS]
        if norm2 > r * r:
            p = r / math.sqrt(norm2)
            new_a *= p
            b *= p
    elif cons == 2:
        lo_b, hi_b = prm[P_LOWER], prm[P_UPPER]
        for k in range(lo, hi):
            w = new_a * cand[k - lo]
            if w < lo_b or w > hi_b:
                nv = min(max(w, lo_b), hi_b) / new_a
                nv2 += nv * nv - cand[k - lo] * cand[k - lo]
                cand[k - lo] = nv
        b = min(max(b, lo_b), hi_b)
    # a gradient whose squared norm overflows would make G infinite for good (every later step 0)
    ok = (finite and math.isfinite(new_a) and math.isfinite(b) and math.isfinite(nv2) and math.isfinite(eta)
          and new_a > 0.0 and math.isfinite(gn2))
    if not ok:
        sc[S_REFUSED] += 1.0
        return False
    if zero:
        # after the rebase A = 0, so U alone holds the weighted sum and zeroing v leaves it intact
        for j in range(st.shape[0]):
            st[j, 0] = 0.0
    big_a = sc[S_ACC]
    for k in range(lo, hi):
        j = indices[k]
        st[j, 1] -= big_a * (cand[k - lo] - st[j, 0])
        st[j, 0] = cand[k - lo]
    sc[S_A] = new_a
    sc[S_B] = b
    sc[S_NV2] = nv2
    c = _record_average(sc, prm)
    sc[S_ACC] += c * new_a
    sc[S_SB] += c * b
    _finish_update(sc, eta, gn2)
    if sc[S_CEXP] > EXP_RENORM_ABOVE:
        _exp_renorm(True, st, sc)
    if sc[S_A] < REBASE_BELOW or (int(sc[S_NUPD]) & (NORM_REFRESH - 1)) == 0:
        lazy_rebase(st, sc)
    return True


@_inline
def _finish_update(sc, eta, gn2):
    sc[S_TSTEP] += 1.0
    sc[S_NUPD] += 1.0
    sc[S_GSQ] += gn2
    sc[S_GN] += 1.0
    sc[S_LASTETA] = eta
    sc[S_LASTG] = math.sqrt(gn2)


@_inline
def _learn_dense(st, sc, prm, indices, lo, hi, xs, sq, raw, dv, y, cand):
    g = _dloss(int(prm[P_LOSS]), prm[P_DELTA], raw, y)
    d = st.shape[0]
    wnorm2 = 0.0
    for j in range(d):
        wnorm2 += st[j, 0] * st[j, 0]
    gnorm, gn2 = _gradient_bound(prm, sc, g, sq, dv, wnorm2)
    t = sc[S_TSTEP] + 1.0
    eta = _step(prm, sc, t, gnorm)
    shrink = max(1.0 - eta * prm[P_L2], 0.0)
    for j in range(d):
        cand[j] = st[j, 0] * shrink
    b = sc[S_B] * shrink
    if prm[P_INTERCEPT] > 0.0:
        b -= eta * g
    for k in range(lo, hi):
        cand[indices[k]] -= eta * g * xs[k - lo]
    cons = int(prm[P_CONS])
    if cons == 1:
        norm2 = b * b
        for j in range(d):
            norm2 += cand[j] * cand[j]
        r = prm[P_RADIUS]
        if norm2 > r * r:
            p = r / math.sqrt(norm2)
            for j in range(d):
                cand[j] *= p
            b *= p
    elif cons == 2:
        for j in range(d):
            cand[j] = min(max(cand[j], prm[P_LOWER]), prm[P_UPPER])
        b = min(max(b, prm[P_LOWER]), prm[P_UPPER])
    ok = math.isfinite(b) and math.isfinite(eta) and math.isfinite(gn2)
    for j in range(d):
        ok = ok and math.isfinite(cand[j])
    if not ok:
        sc[S_REFUSED] += 1.0
        return False
    c = _record_average(sc, prm)
    r_avg = c / sc[S_Z]
    for j in range(d):
        st[j, 0] = cand[j]
        st[j, 1] += r_avg * (cand[j] - st[j, 1])
    sc[S_B] = b
    sc[S_SB] += r_avg * (b - sc[S_SB])
    _finish_update(sc, eta, gn2)
    if sc[S_CEXP] > EXP_RENORM_ABOVE:
        _exp_renorm(False, st, sc)
    return True


@_inline
def _serve_event(lazy, st, sc, prm, mean, std, indices, values, lo, hi, y, mode, serve, loss_code, delta,
                 out_pred, out_loss, out_code, i, xs):
    """Score event ``i`` (features ``lo..hi``) with the serving iterate and write its prediction, its
    loss (NaN without a label) and the code ``SCORED``; return the raw margin, ``sum x^2`` and
    ``<v, x>`` that learning it needs. ``loss_code`` and ``delta`` are read once per batch by the caller."""
    raw, avg, sq, dv = _score_event(lazy, st, sc, prm, mean, std, indices, values, lo, hi, xs)
    m = avg if serve == 1 else raw
    out_pred[i] = 0.5 * (1.0 + math.tanh(0.5 * m)) if loss_code == 2 else m
    out_code[i] = SCORED
    if mode[i] != 0:
        out_loss[i] = _loss(loss_code, delta, m, y[i])
    else:
        out_loss[i] = math.nan
    return raw, sq, dv


# The two loops below differ only in the learning step they call. They are written out twice, not
# shared behind a ``lazy`` flag: numba compiles both branches of a test on an argument, so one shared
# loop compiled the dense step into the lazy kernel (and back), about 40% of a first run's compiling.

@_jit
def lazy_process(st, sc, prm, mean, std, indptr, indices, values, y, mode, serve,
                 out_pred, out_loss, out_code, start, stop, max_learn, xs, cand):
    """Run events ``start..stop`` through the lazy kernel; stop after ``max_learn`` learning events.

    ``mode[i]``: 0 score only, 1 score and learn, 2 score and compute the loss but do not learn
    (held-out events). ``serve``: 0 raw iterate, 1 averaged. Returns the index of the next event.
    """
    loss_code, delta = int(prm[P_LOSS]), prm[P_DELTA]
    learned = 0
    i = start
    while i < stop and learned < max_learn:
        lo, hi = indptr[i], indptr[i + 1]
        raw, sq, dv = _serve_event(True, st, sc, prm, mean, std, indices, values, lo, hi, y, mode, serve,
                                   loss_code, delta, out_pred, out_loss, out_code, i, xs)
        if mode[i] == 1:
            done = _learn_lazy(st, sc, prm, indices, lo, hi, xs, sq, raw, dv, y[i], cand)
            out_code[i] = LEARNED if done else REFUSED
            learned += 1
        i += 1
    return i


@_jit
def dense_process(st, sc, prm, mean, std, indptr, indices, values, y, mode, serve,
                  out_pred, out_loss, out_code, start, stop, max_learn, xs, cand):
    """Same contract as :func:`lazy_process` on the dense representation."""
    loss_code, delta = int(prm[P_LOSS]), prm[P_DELTA]
    learned = 0
    i = start
    while i < stop and learned < max_learn:
        lo, hi = indptr[i], indptr[i + 1]
        raw, sq, dv = _serve_event(False, st, sc, prm, mean, std, indices, values, lo, hi, y, mode, serve,
                                   loss_code, delta, out_pred, out_loss, out_code, i, xs)
        if mode[i] == 1:
            done = _learn_dense(st, sc, prm, indices, lo, hi, xs, sq, raw, dv, y[i], cand)
            out_code[i] = LEARNED if done else REFUSED
            learned += 1
        i += 1
    return i
