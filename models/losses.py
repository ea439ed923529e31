"""Convex losses of a linear score and their derivatives.

Every loss is written as a function of the margin ``m = <w, x> + b`` and the target ``y``:

* ``squared``: ``(m - y)**2 / 2`` (half squared error, so the derivative is the residual);
* ``huber``: ``r**2 / 2`` for ``|r| <= delta`` and ``delta * (|r| - delta / 2)`` beyond (Huber, 1964,
  "Robust estimation of a location parameter"), ``r = m - y``;
* ``logistic``: ``log(1 + exp(m)) - y * m`` for ``y`` in {0, 1}, the negative log-likelihood of
  ``P(y = 1) = sigmoid(m)``.

All three are convex in ``m``; squared and huber are 1-smooth, logistic is 1/4-smooth. The compiled
kernels carry their own copy of these formulas (``kernels.py``); the functions here are the readable
reference that the tests compare the kernels against.
"""

from __future__ import annotations

import numpy as np

from .errors import code_of

__all__ = ["LOSSES", "OVERFLOW_LOSS", "loss_code", "loss_derivative", "loss_value", "overflowed"]

#: Valid loss names and the integer code the compiled kernels use.
LOSSES = {"squared": 0, "huber": 1, "logistic": 2}


#: A loss above this (or not finite) has overflowed for the purpose of running figures: it is counted,
#: never summed, so that a sum of up to 1e150 of them stays finite (float64 ends near 1.8e308). Common
#: practice, no published source: no loss of a sensible model on sensible units comes near it.
OVERFLOW_LOSS = 1e150


def overflowed(losses: np.ndarray) -> np.ndarray:
    """``True`` where a loss is NaN, infinite or above :data:`OVERFLOW_LOSS` (NaN counts: it is not a loss)."""
    return ~(np.abs(losses) <= OVERFLOW_LOSS)


def loss_code(name: str) -> int:
    """Return the kernel code of loss ``name``; raise :class:`InvalidSettings` on unknown names."""
    return code_of(LOSSES, name, "loss", "model.loss")


def loss_value(name: str, margin, target, delta: float = 1.0):
    """Loss of ``margin`` against ``target`` (vectorized over numpy arrays)."""
    m = np.asarray(margin, dtype=np.float64)
    y = np.asarray(target, dtype=np.float64)
    if name == "squared":
        return 0.5 * (m - y) ** 2
    if name == "huber":
        r = np.abs(m - y)
        return np.where(r <= delta, 0.5 * r**2, delta * (r - 0.5 * delta))
    if name == "logistic":
        return np.logaddexp(0.0, m) - y * m
    loss_code(name)
    raise AssertionError("unreachable")


def loss_derivative(name: str, margin, target, delta: float = 1.0):
    """Derivative of the loss with respect to the margin (vectorized)."""
    m = np.asarray(margin, dtype=np.float64)
    y = np.asarray(target, dtype=np.float64)
    if name == "squared":
        return m - y
    if name == "huber":
        return np.clip(m - y, -delta, delta)
    if name == "logistic":
        return 0.5 * (1.0 + np.tanh(0.5 * m)) - y
    loss_code(name)
    raise AssertionError("unreachable")
