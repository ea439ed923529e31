"""The settings of one linear model, validated at construction."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from .averaging import averaging_code
from .constraints import Constraint
from .errors import InvalidSettings
from .losses import loss_code
from .steps import step_code

__all__ = ["ModelSpec"]

_TASK_LOSSES = {"regression": ("squared", "huber"), "binary": ("logistic",)}


@dataclass(frozen=True)
class ModelSpec:
    """Everything that defines a model before it has learned anything.

    The names follow the config file (``[features]``, ``[model]``, ``[constraint]``, ``[steps]``,
    ``[averaging]``); an invalid value raises :class:`InvalidSettings` naming the key and the valid
    values. ``grad_bound=None`` means "auto": ``G`` is estimated as the root of the running mean of
    the squared norms of the stochastic gradients seen so far.
    """

    numeric: tuple[str, ...] = ()
    categorical: tuple[str, ...] = ()
    hash_bits: int = 12
    scaling: str = "warmup"
    warmup_events: int = 500
    task: str = "regression"
    loss: str = "squared"
    huber_delta: float = 1.0
    l2: float = 0.0
    fit_intercept: bool = True
    constraint: str = "ball"
    radius: float = 20.0
    lower: float = -1.0
    upper: float = 1.0
    rule: str = "anytime"
    base: float = 0.05
    horizon: int = 100_000
    grad_bound: float | None = None
    averaging: str = "uniform"
    halflife: float = 5000.0
    kernel: str = "lazy"

    def __post_init__(self) -> None:
        object.__setattr__(self, "numeric", tuple(self.numeric))
        object.__setattr__(self, "categorical", tuple(self.categorical))
        names = self.numeric + self.categorical
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise InvalidSettings(f"features declared twice: {dup}", where="features")
        if not 1 <= self.hash_bits <= 24:
            raise InvalidSettings(f"hash_bits must be 1..24, got {self.hash_bits}", where="features.hash_bits")
        _choice(self.scaling, ("none", "warmup"), "features.scaling")
        if self.scaling == "warmup" and self.warmup_events < 2:
            raise InvalidSettings("warmup_events must be >= 2", where="features.warmup_events")
        _choice(self.task, tuple(_TASK_LOSSES), "model.task")
        loss_code(self.loss)
        if self.loss not in _TASK_LOSSES[self.task]:
            raise InvalidSettings(
                f"loss {self.loss!r} does not fit task {self.task!r}; valid: {', '.join(_TASK_LOSSES[self.task])}",
                where="model.loss")
        _positive(self.huber_delta, "model.huber_delta")
        if not (math.isfinite(self.l2) and self.l2 >= 0):
            raise InvalidSettings(f"l2 must be a finite number >= 0, got {self.l2}", where="model.l2")
        Constraint(self.constraint, radius=self.radius, lower=self.lower, upper=self.upper)
        step_code(self.rule)
        _positive(self.base, "steps.base")
        if self.horizon < 1:
            raise InvalidSettings("horizon must be >= 1", where="steps.horizon")
        if self.grad_bound is not None:
            _positive(self.grad_bound, "steps.grad_bound")
        if self.rule in ("horizon", "anytime") and self.constraint == "none":
            raise InvalidSettings(f"rule {self.rule!r} sets its step from the radius R of the constraint set; "
                                  "use constraint 'ball' or 'box'", where="steps.rule")
        if self.rule == "strongly_convex" and self.l2 <= 0:
            raise InvalidSettings("rule 'strongly_convex' needs l2 > 0 (alpha = l2)", where="steps.rule")
        if self.rule == "strongly_convex" and self.constraint == "none":
            # its steps 2/(alpha (t+1)) start at 1/alpha: with a small l2 the first steps are huge, and
            # only the projection onto a bounded set keeps them from throwing the iterate to infinity
            # (the rate 2G^2/(alpha (T+1)) of Lacoste-Julien, Schmidt and Bach, 2012, assumes both)
            raise InvalidSettings(f"rule 'strongly_convex' needs a bounded constraint set ('ball' or 'box'): its "
                                  f"first steps are 1/alpha = 1/l2 = {1 / self.l2:g} long, and without a "
                                  "projection they can diverge", where="steps.rule")
        averaging_code(self.averaging)
        _positive(self.halflife, "averaging.halflife")
        _choice(self.kernel, ("dense", "lazy"), "model.kernel")

    @property
    def constraint_set(self) -> Constraint:
        return Constraint(self.constraint, radius=self.radius, lower=self.lower, upper=self.upper)

    def dim(self) -> int:
        """Coordinates without the intercept."""
        return len(self.numeric) + ((1 << self.hash_bits) if self.categorical else 0)

    def kernel_params(self) -> np.ndarray:
        """The parameter array the compiled kernels read (layout in ``layout.P_*``)."""
        from . import layout as K

        p = np.zeros(K.N_PARAMS)
        full_dim = self.dim() + (1 if self.fit_intercept else 0)
        p[K.P_LOSS] = loss_code(self.loss)
        p[K.P_DELTA] = self.huber_delta
        p[K.P_L2] = self.l2
        p[K.P_CONS] = self.constraint_set.code
        p[K.P_RADIUS] = self.radius
        p[K.P_LOWER] = self.lower
        p[K.P_UPPER] = self.upper
        p[K.P_RULE] = step_code(self.rule)
        p[K.P_BASE] = self.base
        p[K.P_HORIZON] = self.horizon
        p[K.P_R] = self.constraint_set.radius_from_start(full_dim) or 0.0
        p[K.P_GFIX] = self.grad_bound if self.grad_bound is not None else -1.0
        p[K.P_AVG] = averaging_code(self.averaging)
        p[K.P_EXPR] = 2.0 ** (1.0 / self.halflife)
        p[K.P_INTERCEPT] = 1.0 if self.fit_intercept else 0.0
        p[K.P_NNUM] = len(self.numeric)
        p[K.P_LAZY] = 1.0 if self.kernel == "lazy" else 0.0
        return p

    def to_dict(self) -> dict:
        d = asdict(self)
        d["numeric"] = list(self.numeric)
        d["categorical"] = list(self.categorical)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> ModelSpec:
        return cls(**d)


def _choice(value, valid, where):
    if value not in valid:
        raise InvalidSettings(f"Invalid value {value!r}. Valid values are: {', '.join(valid)}", where=where)


def _positive(value, where):
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        raise InvalidSettings(f"must be a finite number > 0, got {value!r}", where=where)
