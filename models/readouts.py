"""Compiled read-outs of a model's learned state: an iterate as a plain vector, and the distance
between the raw and the averaged iterate, for both representations of :mod:`models.kernels`.

They read the scalar state through the ``S_*`` indices of :mod:`models.kernels`; numba freezes those
constants into this file's cached code, so after a change of that layout clear the cache
(``find . -name '*.nb[ic]' -delete``).
"""

from __future__ import annotations

import math

from .kernels import S_A, S_ACC, S_B, S_SB, S_Z, _jit

__all__ = ["iterate_distance", "materialize"]


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
