"""Iterate averaging schemes.

Each scheme gives update ``s`` (counted from 1 since the last restart) a weight ``c_s`` and
serves ``xbar_t = sum_s c_s x_s / sum_s c_s``:

* ``uniform``: ``c_s = 1``, the Polyak-Ruppert average (Polyak and Juditsky, 1992, "Acceleration of
  stochastic approximation by averaging"); its bound is Bubeck (2015) Thm 6.1.
* ``weighted``: ``c_s = s``, i.e. weights ``2 s / (t (t + 1))``; online,
  ``xbar_t = (1 - 2/(t+1)) xbar_{t-1} + 2/(t+1) x_t`` (Lacoste-Julien, Schmidt, Bach, 2012,
  arXiv:1212.2002, which proves ``2 G^2 / (alpha (T + 1))`` with steps ``2 / (alpha (t + 1))``).
* ``exponential``: ``c_s = 2**(s / halflife)``: an update's weight halves every ``halflife``
  updates, so the average follows a slowly changing optimum. No published bound is claimed.

The compiled kernels keep ``sum_s c_s x_s`` lazily (only the coordinates an event touches change);
:func:`online_weights` is the readable reference the tests compare with.
"""

from __future__ import annotations

import numpy as np

from .errors import code_of

__all__ = ["AVERAGING", "averaging_code", "online_weights"]

#: Valid averaging schemes and the integer code the compiled kernels use.
AVERAGING = {"uniform": 0, "weighted": 1, "exponential": 2}


def averaging_code(name: str) -> int:
    """Kernel code of scheme ``name``; raise :class:`InvalidSettings` on unknown names."""
    return code_of(AVERAGING, name, "averaging scheme", "averaging.scheme")


def online_weights(name: str, t: int, halflife: float = 5000.0) -> np.ndarray:
    """Normalized weights ``c_s / sum c`` of updates ``1..t`` in the average after ``t`` updates.

    Computed by running the online recursion ``xbar_s = (1 - r_s) xbar_{s-1} + r_s x_s`` with
    ``r_s = c_s / sum_{u <= s} c_u`` on the unit vectors, which is how the service averages.
    """
    code = averaging_code(name)
    weights = np.zeros(t)
    total = 0.0
    for s in range(1, t + 1):
        c = 1.0 if code == 0 else float(s) if code == 1 else 2.0 ** (s / halflife)
        total += c
        r = c / total
        weights[: s - 1] *= 1.0 - r
        weights[s - 1] = r
    return weights
