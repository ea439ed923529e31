"""The layout of the compiled kernels' state and parameter arrays, and their outcome codes.

Plain constants, kept apart from :mod:`models.kernels` so that code which only reads or writes the
arrays (the model, the spec, snapshots) does not import numba. The kernels read these as globals:
numba freezes them into its cached code, so after a change here clear numba's cache
(``find . -name '*.nb[ic]' -delete``); the ahead-of-time kernels (:mod:`models.native`) hash this
file into their key and rebuild by themselves.
"""

from __future__ import annotations

__all__ = [
    "EXP_RENORM_ABOVE", "LEARNED", "NORM_REFRESH", "N_PARAMS", "N_SCALARS", "REBASE_BELOW", "REFUSED", "SCORED",
]

# parameter array (float64), fixed for a model
P_LOSS, P_DELTA, P_L2, P_CONS, P_RADIUS, P_LOWER, P_UPPER = 0, 1, 2, 3, 4, 5, 6
P_RULE, P_BASE, P_HORIZON, P_R, P_GFIX, P_AVG, P_EXPR, P_INTERCEPT, P_NNUM, P_LAZY = 7, 8, 9, 10, 11, 12, 13, 14, 15, 16
N_PARAMS = 17

# scalar state array (float64), learned
S_A, S_B, S_ACC, S_Z, S_SB, S_NV2, S_TSTEP, S_TAVG, S_NUPD, S_CEXP = 0, 1, 2, 3, 4, 5, 6, 7, 8, 9
S_GSQ, S_GN, S_STEPSCALE, S_REFUSED, S_LASTETA, S_LASTG = 10, 11, 12, 13, 14, 15
N_SCALARS = 16

#: Rebase the lazy state when the scale ``a`` drops below this (rounding stays ~1e-10 relative).
REBASE_BELOW = 1e-6
#: Recompute ``||v||^2`` exactly every this many updates so that rounding cannot accumulate
#: (a power of two: the test is a bit mask, a float modulo costs more than the rest of an update).
NORM_REFRESH = 65536
#: Divide the exponential-average accumulators down when the newest weight passes this.
EXP_RENORM_ABOVE = 1e150

# per-event outcome codes written by the kernels
SCORED, LEARNED, REFUSED = 0, 1, 2
