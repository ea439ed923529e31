"""Compiled read-outs of a model's learned state: an iterate as a plain vector, the distance between
the raw and the averaged iterate, and scores of rows under both iterates (with the held-out
monitor's figures of a window in one pass), for both representations of :mod:`models.kernels`.

They read the scalar state through the ``S_*`` indices of :mod:`models.kernels`; numba freezes those
constants into this file's cached code, so after a change of that layout clear the cache
(``find . -name '*.nb[ic]' -delete``).
"""

from __future__ import annotations

import math

import numpy as np

from .kernels import (P_DELTA, P_LOSS, P_NNUM, S_A, S_ACC, S_B, S_SB, S_Z, _inline, _jit, _loss, _score_event,
                      pair_margins)
from .losses import OVERFLOW_LOSS

__all__ = ["iterate_distance", "materialize", "score_rows_both", "score_window"]


@_jit
def materialize(lazy, st, sc, iterate, out):
    """Write the raw (0) or averaged (1) coefficient vector into ``out``; return the intercept."""
    d = st.shape[0]
    if iterate == 0 or sc[S_Z] <= 0.0:
        a = sc[S_A] if lazy else 1.0
        for j in range(d):
            out[j] = a * st[j, 0]
        return sc[S_B]
    if lazy:
        # loaded once (the compiler cannot prove ``out`` is not ``sc``); a product by 1/Z instead of
        # d divisions: the division bound the loop, and every reader of the average goes through here
        big_a, inv_z = sc[S_ACC], 1.0 / sc[S_Z]
        for j in range(d):
            out[j] = (st[j, 1] + big_a * st[j, 0]) * inv_z
        return sc[S_SB] * inv_z
    for j in range(d):
        out[j] = st[j, 1]
    return sc[S_SB]


@_jit
def iterate_distance(lazy, st, sc):
    """``||(w_raw, b_raw) - (w_avg, b_avg)||`` in one pass, without building either vector."""
    return _distance(lazy, st, sc)


@_inline
def _distance(lazy, st, sc):
    if sc[S_Z] <= 0.0:
        return 0.0
    d2 = 0.0
    if lazy:
        a, big_a, inv_z = sc[S_A], sc[S_ACC], 1.0 / sc[S_Z]
        for j in range(st.shape[0]):
            diff = a * st[j, 0] - (st[j, 1] + big_a * st[j, 0]) * inv_z
            d2 += diff * diff
        db = sc[S_B] - sc[S_SB] * inv_z
    else:
        for j in range(st.shape[0]):
            diff = st[j, 0] - st[j, 1]
            d2 += diff * diff
        db = sc[S_B] - sc[S_SB]
    return math.sqrt(d2 + db * db)


@_jit
def score_rows_both(lazy, st, sc, prm, mean, std, indptr, indices, values, out):
    """Margins of rows ``0..out.shape[1]`` with both iterates in one pass: ``out[0]`` raw, ``out[1]`` averaged
    (the monitor scores its held-out window with both at every check)."""
    n = out.shape[1]
    width = 0
    for i in range(n):
        width = max(width, indptr[i + 1] - indptr[i])
    xs = np.empty(max(width, 1))
    for i in range(n):
        out[0, i], out[1, i], _, _ = _score_event(lazy, st, sc, prm, mean, std, indices, values, indptr[i],
                                                  indptr[i + 1], xs)


@_inline
def _kth_smallest(a, k):
    """The ``k``-th smallest value of ``a`` (from 0; NaN above every number), reordering ``a``: N. Wirth's
    selection ("Algorithms + Data Structures = Programs", 1976), as ``np.partition(a, k)[k]`` gives it
    (written out: numba's ``np.partition`` adds seconds to the first compile and 15 ms to every load)."""
    lo, hi = 0, a.shape[0] - 1
    while lo < hi:
        x, i, j = a[k], lo, hi
        while i <= j:
            while a[i] < x or (x != x and a[i] == a[i]):
                i += 1
            while x < a[j] or (a[j] != a[j] and x == x):
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i, j = i + 1, j - 1
        if j < k:
            lo = i
        if k < i:
            hi = j
    return a[k]


@_inline
def _block_sum(a, r, lo, n):
    """numpy's sum of a block of ``a[r, lo:lo + n]``, ``n <= 128``: eight running sums, then the rest."""
    if n < 8:
        res = -0.0
        for i in range(lo, lo + n):
            res += a[r, i]
        return res
    s0, s1, s2, s3, s4, s5, s6, s7 = a[r, lo], a[r, lo + 1], a[r, lo + 2], a[r, lo + 3], a[r, lo + 4], \
        a[r, lo + 5], a[r, lo + 6], a[r, lo + 7]
    i = lo + 8
    while i < lo + n - n % 8:
        s0, s1, s2, s3 = s0 + a[r, i], s1 + a[r, i + 1], s2 + a[r, i + 2], s3 + a[r, i + 3]
        s4, s5, s6, s7 = s4 + a[r, i + 4], s5 + a[r, i + 5], s6 + a[r, i + 6], s7 + a[r, i + 7]
        i += 8
    res = ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7))
    for k in range(i, lo + n):
        res += a[r, k]
    return res


@_inline
def _numpy_row_sum(a, r):
    """``a[r].sum()`` bit for bit: numpy's pairwise summation (``pairwise_sum`` in numpy's
    ``loops_utils.h``: halves, rounded down to a multiple of 8, until blocks of at most 128), added to
    0.0; its recursion unrolled on a stack of (start, length, halves summed)."""
    todo, sums = np.empty((64, 3), np.int64), np.empty(64)
    todo[0, 0], todo[0, 1], todo[0, 2], top, done = 0, a.shape[1], 0, 1, 0
    while top:
        top -= 1
        lo, n, halves = todo[top, 0], todo[top, 1], todo[top, 2]
        if n <= 128:
            sums[done] = _block_sum(a, r, lo, n)
            done += 1
        elif halves:
            done -= 1
            sums[done - 1] += sums[done]
        else:
            n2 = n // 2 - (n // 2) % 8
            todo[top, 2] = 1
            todo[top + 1, 0], todo[top + 1, 1], todo[top + 1, 2] = lo + n2, n - n2, 0
            todo[top + 2, 0], todo[top + 2, 1], todo[top + 2, 2] = lo, n2, 0
            top += 3
    return 0.0 + sums[0]


@_inline
def _same_bits(a, b):
    """Whether ``a`` and ``b`` are the same number, sign of zero included (NaN is never the same)."""
    return a == b and math.copysign(1.0, a) == math.copysign(1.0, b)


@_inline
def _scale_rows(prm, mean, std, indptr, indices, values, scaled, n_scaled, scale):
    """Write rows ``n_scaled..`` of ``values`` scaled as :func:`models.kernels._score_event` scales them
    into ``scaled`` (the same positions), or every row when ``scale`` (the means, then the standard
    deviations) does not hold ``mean`` and ``std`` bit for bit; then ``scale`` does."""
    nnum = int(prm[P_NNUM])
    n_scaled = min(max(n_scaled, 0), indptr.shape[0] - 1)
    same = scale.shape[0] == 2 * nnum
    for j in range(nnum if same else 0):
        same = same and _same_bits(scale[j], mean[j]) and _same_bits(scale[nnum + j], std[j])
    if not same:
        n_scaled = 0
        if scale.shape[0] == 2 * nnum:
            for j in range(nnum):
                scale[j], scale[nnum + j] = mean[j], std[j]
    for k in range(indptr[n_scaled], indptr[indptr.shape[0] - 1]):
        j = indices[k]
        x = values[k]
        if j < nnum:
            x = (x - mean[j]) / std[j]
        scaled[k] = x


@_jit
def score_window(lazy, st, sc, prm, mean, std, indptr, indices, values, scaled, n_scaled, scale, y, n_ref, sample_max,
                 absurd, losses, usable, above):
    """The held-out monitor's figures of a window of rows in one pass (the rules that read them are in
    ``service/monitor/``). Writes ``losses[0, i]`` and ``losses[1, i]``, row ``i``'s loss under the raw
    and the averaged iterate; ``usable[i]``, whether neither loss overflowed (``OVERFLOW_LOSS``) and
    the smaller is at most ``absurd`` times the reference; ``above``, 1.0 or 0.0 for each of the last
    ``len(above)`` rows: whether its averaged-iterate loss exceeds the reference. The reference is the
    median averaged-iterate loss of a regular sample of rows ``0..n_ref``: every ``max(1, n_ref //
    sample_max)``-th, an odd count (a partition finds the median). Returns ``(reference, n_usable,
    raw_sum, avg_sum, n_above, distance)``: the sums of the usable rows' losses as numpy sums
    ``losses[:, usable]`` (pairwise along each row when every row is usable, else in row order from 0.0
    over the column-major copy numpy makes), how many rows are above, and :func:`iterate_distance`.

    ``scaled`` (beside ``values``) keeps the rows' scaled values from one call to the next (a window's
    rows stay while the model changes, its scaling does not once frozen): rows ``0..n_scaled`` are taken
    from it when ``scale`` says they were scaled with ``mean`` and ``std`` (:func:`_scale_rows`), the
    others are scaled into it first. The margins are then :func:`models.kernels._score_event`'s, the
    same operations in the same order."""
    code, delta = int(prm[P_LOSS]), prm[P_DELTA]
    n = losses.shape[1]
    _scale_rows(prm, mean, std, indptr, indices, values, scaled, n_scaled, scale)
    # unsigned positions: numba then reads without its test for a negative index (a third of this loop)
    first_col, second_col = np.uint64(0), np.uint64(1)
    for i in range(n):
        dv = 0.0
        da = 0.0
        for k in range(np.uint64(indptr[i]), np.uint64(indptr[i + 1])):
            j = np.uint64(indices[k])
            x = scaled[k]
            dv += st[j, first_col] * x
            da += st[j, second_col] * x
        raw, avg = pair_margins(lazy, sc, dv, da)
        losses[0, i] = _loss(code, delta, raw, y[i])
        losses[1, i] = _loss(code, delta, avg, y[i])
    step = max(1, n_ref // sample_max)
    m = (n_ref + step - 1) // step
    m -= 1 - m % 2
    sample = np.empty(m)
    for k in range(m):
        sample[k] = losses[1, k * step]
    reference = _kth_smallest(sample, m // 2)
    limit = absurd * reference if reference > 0.0 else np.inf
    n_usable = 0
    for i in range(n):
        a, b = losses[0, i], losses[1, i]
        usable[i] = abs(a) <= OVERFLOW_LOSS and abs(b) <= OVERFLOW_LOSS and min(a, b) <= limit
        n_usable += usable[i]
    if n_usable == n:
        raw_sum, avg_sum = _numpy_row_sum(losses, 0), _numpy_row_sum(losses, 1)
    else:  # a second pass only then: the running sums are a chain of dependent additions
        raw_sum, avg_sum = 0.0, 0.0
        for i in range(n):
            if usable[i]:
                raw_sum += losses[0, i]
                avg_sum += losses[1, i]
    first, n_above = n - above.shape[0], 0
    for i in range(first, n):
        above[i - first] = 1.0 if losses[1, i] > reference else 0.0
        n_above += int(above[i - first])
    return reference, n_usable, raw_sum, avg_sum, n_above, _distance(lazy, st, sc)
