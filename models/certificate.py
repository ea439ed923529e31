"""The guarantee certificate: which published bound applies to a run, with the numbers it uses.

Every bound is on the expected suboptimality ``E[f(xbar_T)] - f*`` of the averaged iterate, for an
objective ``f(x) = E[loss(x; event)] + l2/2 ||x||^2`` over the constraint set, under three
assumptions: events are drawn i.i.d. from one fixed distribution (a stationary feed), the
stochastic gradients are unbiased, and their second moment is bounded, ``E||g||^2 <= G^2``. A feed
that drifts voids all of them; the monitor exists for that case.

==================  ===========  =============================================  =========================
rule                averaging    bound at ``T`` updates                          source
==================  ===========  =============================================  =========================
``horizon``         uniform      ``R^2/(2 eta T) + eta G^2/2``, which is         Bubeck (2015), "Convex
                                 ``R G / sqrt(T)`` at the planned horizon        Optimization: Algorithms
                                                                                 and Complexity", Thm 6.1
``anytime``         uniform      ``(D^2/(2R) + R) G / sqrt(T)``                  Zinkevich (2003) Thm 1,
                                 (``3 R G / sqrt(T)`` on a ball)                 with online-to-batch
                                                                                 conversion (derived)
``sqrt_decay``      uniform      ``(D^2/(2c) + c G^2) / sqrt(T)``, ``c = base``  as above (derived)
``strongly_convex`` weighted     ``2 G^2 / (alpha (T + 1))``                     Lacoste-Julien, Schmidt,
                                                                                 Bach (2012),
                                                                                 arXiv:1212.2002, Thm 4
``constant``        any          not applicable: the stochastic gradient does    -
                                 not vanish at the optimum, so the raw iterate
                                 keeps a noise floor of order ``eta``
==================  ===========  =============================================  =========================

``R`` is the largest distance from the start point 0 to the set, ``D`` its diameter. The two
"derived" rows sum ``||x_t - x*||^2`` telescoping with growing ``1/eta_t`` (bounded by ``D^2``) and
``sum_t eta_t <= 2 c sqrt(T)``; they are written from memory of the standard argument, not copied
from a theorem statement.
"""

from __future__ import annotations

import math

from .spec import ModelSpec

__all__ = ["ASSUMPTIONS", "certificate"]

ASSUMPTIONS = (
    "bound on the expected suboptimality of the averaged iterate, not on any single run",
    "events i.i.d. from one stationary distribution (drift voids the bound)",
    "unbiased stochastic gradients with E||g||^2 <= G^2 over the constraint set",
)

_SOURCES = {
    "horizon": "S. Bubeck, Convex Optimization: Algorithms and Complexity, 2015, Theorem 6.1",
    "anytime": "M. Zinkevich, Online Convex Programming and Generalized Infinitesimal Gradient Ascent, "
               "ICML 2003, Theorem 1 (online-to-batch conversion)",
    "sqrt_decay": "M. Zinkevich, ICML 2003, Theorem 1 (online-to-batch conversion)",
    "strongly_convex": "S. Lacoste-Julien, M. Schmidt, F. Bach, A simpler approach to obtaining an O(1/t) "
                       "convergence rate for the projected stochastic subgradient method, 2012, arXiv:1212.2002",
}
_AVERAGING_NEEDED = {"horizon": "uniform", "anytime": "uniform", "sqrt_decay": "uniform",
                     "strongly_convex": "weighted"}


def certificate(spec: ModelSpec, updates: int, grad_bound: float | None, *, grad_estimated: bool,
                step_scale: float = 1.0, restarted_at: int | None = None) -> dict:
    """The certificate of a model with ``spec`` after ``updates`` updates since its last restart.

    Parameters
    ----------
    grad_bound
        The ``G`` in use (given, or the current estimate); ``None`` before any gradient was seen.
    grad_estimated
        Whether ``G`` was estimated from the feed (then the bound is indicative, not proven).
    step_scale
        The product of the rollback shrink factors; a value below 1 changes the step, so the
        bound is computed for the step actually in use where the theorem allows it.
    restarted_at
        The event at which the average was last restarted after a change (``None``: never). The
        bound then speaks of the feed from that event on only: ``T`` counts the updates since.
    """
    dim = spec.dim() + (1 if spec.fit_intercept else 0)
    cons = spec.constraint_set
    radius = cons.radius_from_start(dim)
    diameter = cons.diameter(dim)
    out = {
        "rule": spec.rule,
        "averaging": spec.averaging,
        "applicable": False,
        "bound": None,
        "formula": None,
        "R": radius,
        "D": diameter,
        "G": grad_bound,
        "G_estimated": grad_estimated,
        "alpha": spec.l2,
        "T": int(updates),
        "source": _SOURCES.get(spec.rule),
        "assumptions": list(ASSUMPTIONS),
        "reason": "",
        "restarted": restarted_at is not None,
        "applies_from_event": 0 if restarted_at is None else int(restarted_at),
        "scope": ("the whole feed" if restarted_at is None else
                  f"the feed from event {restarted_at:,} on: the average restarted there after a change"),
    }
    rule = spec.rule
    if rule == "constant":
        out["reason"] = ("a constant step has no vanishing bound: the stochastic gradient does not vanish at "
                         "the optimum, so the raw iterate keeps a noise floor of order eta")
        return out
    if spec.averaging != _AVERAGING_NEEDED[rule]:
        out["reason"] = f"the bound for rule {rule!r} is for {_AVERAGING_NEEDED[rule]!r} averaging"
        return out
    if updates < 1:
        out["reason"] = "no update yet"
        return out
    if rule != "sqrt_decay" and (grad_bound is None or grad_bound <= 0):
        out["reason"] = "no gradient bound G yet"
        return out
    if rule in ("horizon", "anytime", "sqrt_decay") and radius is None:
        out["reason"] = "the constraint set is unbounded"
        return out
    T = float(updates)
    G = grad_bound or 0.0
    if rule == "horizon":
        eta = step_scale * radius / (G * math.sqrt(spec.horizon))
        out["bound"] = radius**2 / (2 * eta * T) + eta * G**2 / 2
        out["formula"] = "R^2/(2 eta T) + eta G^2/2, eta = R/(G sqrt(horizon)); = R G/sqrt(T) at T = horizon"
    elif rule == "anytime":
        c = step_scale * radius / G
        out["bound"] = (diameter**2 / (2 * c) + c * G**2) / math.sqrt(T)
        out["formula"] = "(D^2/(2c) + c G^2)/sqrt(T), c = R/G (= 3 R G/sqrt(T) on a ball)"
    elif rule == "sqrt_decay":
        if G <= 0 or diameter is None:
            out["reason"] = "no gradient bound G yet"
            return out
        c = step_scale * spec.base
        out["bound"] = (diameter**2 / (2 * c) + c * G**2) / math.sqrt(T)
        out["formula"] = "(D^2/(2c) + c G^2)/sqrt(T), c = base"
    else:
        if step_scale != 1.0:
            out["reason"] = "a rollback shrank the step below 2/(alpha (t+1)); the theorem needs that exact step"
            return out
        out["bound"] = 2 * G**2 / (spec.l2 * (T + 1))
        out["formula"] = "2 G^2/(alpha (T + 1))"
    out["applicable"] = True
    return out
