"""Constraint sets for projected SGD and their Euclidean projections.

The learner keeps its iterate ``x = (w, b)`` (coefficients and intercept) inside a closed convex
set ``X`` by projecting after every step, ``x <- P_X(x - eta * g)``. Projection onto a closed convex
set is non-expansive and satisfies ``<v - P(v), y - P(v)> <= 0`` for every ``y`` in ``X``; both facts
drive the convergence proofs (S. Bubeck, "Convex Optimization: Algorithms and Complexity", 2015,
Lemma 3.1) and are checked by the property tests.

* ``ball``: ``{x : ||x||_2 <= radius}``; ``P(v) = v * min(1, radius / ||v||)``.
* ``box``: ``{x : lower <= x_i <= upper}``; ``P(v) = clip(v, lower, upper)``. The box must contain 0
  (the start point), which is also what lets the lazy kernel shrink coefficients it does not touch.
* ``none``: the whole space; no bound applies that needs a radius.

``radius_from_start`` is the ``R`` of the bounds: the largest distance from the start point 0 to a
point of the set. ``diameter`` is the largest distance between two points of the set.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import InvalidSettings

__all__ = ["CONSTRAINTS", "Constraint", "project"]

#: Valid constraint names and the integer code the compiled kernels use.
CONSTRAINTS = {"none": 0, "ball": 1, "box": 2}


class Constraint:
    """A constraint set with its projection, validated at construction.

    Parameters
    ----------
    kind
        ``"ball"``, ``"box"`` or ``"none"``.
    radius
        Radius of the ball (``kind="ball"``).
    lower, upper
        Bounds of every coordinate (``kind="box"``); ``lower <= 0 <= upper``.

    Examples
    --------
    >>> c = Constraint("ball", radius=1.0)
    >>> c.project(np.array([3.0, 4.0])).tolist()
    [0.6000000000000001, 0.8]
    """

    def __init__(self, kind: str = "ball", *, radius: float = 20.0, lower: float = -1.0, upper: float = 1.0):
        if kind not in CONSTRAINTS:
            valid = ", ".join(sorted(CONSTRAINTS))
            raise InvalidSettings(f"Invalid constraint {kind!r}. Valid values are: {valid}", where="constraint.set")
        if kind == "ball" and not (math.isfinite(radius) and radius > 0):
            raise InvalidSettings(f"radius must be a finite number > 0, got {radius!r}", where="constraint.radius")
        if kind == "box":
            if not (math.isfinite(lower) and math.isfinite(upper)):
                raise InvalidSettings("box bounds must be finite numbers", where="constraint.lower")
            if not lower <= 0.0 <= upper or lower == upper:
                raise InvalidSettings(
                    f"the box [{lower}, {upper}] must contain the start point 0 and have lower < upper",
                    where="constraint.lower",
                )
        self.kind = kind
        self.radius = float(radius)
        self.lower = float(lower)
        self.upper = float(upper)

    @property
    def code(self) -> int:
        return CONSTRAINTS[self.kind]

    def project(self, v: np.ndarray) -> np.ndarray:
        """Euclidean projection of ``v`` onto the set (a new array)."""
        return project(v, self.kind, self.radius, self.lower, self.upper)

    def radius_from_start(self, dim: int) -> float | None:
        """``sup_{x in X} ||x - 0||``, or ``None`` for an unbounded set (``dim`` counts the intercept)."""
        if self.kind == "ball":
            return self.radius
        if self.kind == "box":
            return math.sqrt(dim) * max(abs(self.lower), abs(self.upper))
        return None

    def diameter(self, dim: int) -> float | None:
        """``sup_{x, y in X} ||x - y||``, or ``None`` for an unbounded set."""
        if self.kind == "ball":
            return 2.0 * self.radius
        if self.kind == "box":
            return math.sqrt(dim) * (self.upper - self.lower)
        return None

    def __repr__(self) -> str:
        if self.kind == "ball":
            return f"Constraint('ball', radius={self.radius})"
        if self.kind == "box":
            return f"Constraint('box', lower={self.lower}, upper={self.upper})"
        return "Constraint('none')"


def project(v: np.ndarray, kind: str, radius: float = 1.0, lower: float = -1.0, upper: float = 1.0) -> np.ndarray:
    """Project ``v`` onto the named set; the reference for the compiled kernels."""
    v = np.asarray(v, dtype=np.float64)
    if kind == "ball":
        norm = float(np.sqrt(np.dot(v, v)))
        return v * (radius / norm) if norm > radius else v.copy()
    if kind == "box":
        return np.clip(v, lower, upper)
    if kind == "none":
        return v.copy()
    raise InvalidSettings(f"Invalid constraint {kind!r}. Valid values are: {', '.join(sorted(CONSTRAINTS))}")
