"""Step-size rules for projected SGD.

``t`` counts updates since the last (re)start, from 1. ``R`` is the radius of the constraint set
around the start point, ``G`` a bound on the root of the stochastic gradients' second moment,
``E||g||^2 <= G^2``, given or estimated from the gradients seen so far ("auto").

======================  =========================  ===================================================
rule                    step ``eta_t``             where it comes from
======================  =========================  ===================================================
``constant``            ``base``                   no vanishing guarantee: the raw iterate settles at a
                                                   noise floor of order ``base``
``sqrt_decay``          ``base / sqrt(t)``         Zinkevich (2003), "Online convex programming and
                                                   generalized infinitesimal gradient ascent", Thm 1
``horizon``             ``R / (G sqrt(T))``        Bubeck (2015), "Convex Optimization: Algorithms and
                                                   Complexity", Thm 6.1, for a planned horizon ``T``
``anytime``             ``R / (G sqrt(t))``        Zinkevich (2003) Thm 1 with the scale of Bubeck's
                                                   Thm 6.1; needs no horizon
``strongly_convex``     ``2 / (alpha (t + 1))``    Lacoste-Julien, Schmidt, Bach (2012),
                                                   arXiv:1212.2002, with ``alpha = l2``
======================  =========================  ===================================================

A rollback multiplies every later step by a factor below 1 (``step_scale``, see the monitor).
"""

from __future__ import annotations

import math

from .errors import InvalidSettings, code_of

__all__ = ["STEP_RULES", "step_code", "step_size"]

#: Valid step rules and the integer code the compiled kernels use.
STEP_RULES = {"constant": 0, "sqrt_decay": 1, "horizon": 2, "anytime": 3, "strongly_convex": 4}


def step_code(name: str) -> int:
    """Kernel code of rule ``name``; raise :class:`InvalidSettings` on unknown names."""
    return code_of(STEP_RULES, name, "step rule", "steps.rule")


def step_size(name: str, t: int, *, base: float = 0.05, radius: float | None = None, grad_bound: float | None = None,
              horizon: int = 1, alpha: float = 0.0) -> float:
    """The step of rule ``name`` at update ``t`` (1-based); the reference for the kernels."""
    if t < 1:
        raise ValueError("t counts updates from 1")
    code = step_code(name)
    if code == 0:
        return base
    if code == 1:
        return base / math.sqrt(t)
    if code == 4:
        return 2.0 / (alpha * (t + 1))
    if radius is None or grad_bound is None or grad_bound <= 0:
        raise InvalidSettings(f"rule {name!r} needs a radius R and a gradient bound G > 0", where="steps.rule")
    if code == 2:
        return radius / (grad_bound * math.sqrt(horizon))
    return radius / (grad_bound * math.sqrt(t))
