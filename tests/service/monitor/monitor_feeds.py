"""Seeded event streams for the monitor tests, built as numpy arrays for the engine's bulk path.

The streams are invented telemetry of the fictional cold-chain van fleet: three numeric features
(``ambient_c``, ``door_open_s``, ``load_kg``) and one categorical feature (``route``); the target is
the hold-probe reading, linear in the features plus Gaussian noise. A stream can carry

* a *label burst*: a faulty gateway relays Fahrenheit readings labelled Celsius
  (``target * 1.8 + 32``) for a contiguous stretch of events (the features stay honest);
* a *real change*: from a given event on, the readings follow a second :class:`Regime`.

:func:`batch` turns a stream into the :class:`~service.engine.PreparedBatch` that
``Engine.prepare`` would build from the same events (the held-out share is chosen by the engine's
own stable hash of the id), without building a Python dict per event, so that a million events fit
in the test budget. :func:`events` gives the same stream as validated events for the slow path;
the tests check that both paths agree.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from models import Rows
from service.engine import Engine, PreparedBatch, holdout_fraction
from service.events import Event

__all__ = ["BASE", "CATEGORICAL", "CHANGED", "NUMERIC", "ROUTES", "Regime", "Stream", "batch", "config_dict",
           "eval_set", "events", "rows", "stream"]

NUMERIC = ("ambient_c", "door_open_s", "load_kg")
CATEGORICAL = ("route",)
ROUTES = ("urban", "regional", "linehaul", "depot")
START_TS = 1772439300.0


@dataclass(frozen=True)
class Regime:
    """Mean probe reading: ``intercept + coef . numeric + route effect``, noise ``noise_sd``."""

    intercept: float
    coef: tuple[float, float, float]
    route: tuple[float, float, float, float]
    noise_sd: float = 0.5

    def mean(self, x: np.ndarray, route: np.ndarray) -> np.ndarray:
        return self.intercept + x @ np.asarray(self.coef) + np.asarray(self.route)[route]


#: The fleet before and after a probe recalibration plus new compressor firmware.
BASE = Regime(3.8, (0.14, 0.03, 0.002), (0.8, 0.0, -0.3, 0.4))
CHANGED = Regime(5.3, (0.30, 0.05, -0.001), (-0.4, 0.6, 0.9, -0.8))


@dataclass
class Stream:
    """A generated stream: features, the target actually sent, and the clean target."""

    ids: list
    x: np.ndarray
    route: np.ndarray
    y: np.ndarray
    clean: np.ndarray
    ts: np.ndarray
    meta: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.ids)

    def part(self, lo: int, hi: int) -> Stream:
        return Stream(self.ids[lo:hi], self.x[lo:hi], self.route[lo:hi], self.y[lo:hi], self.clean[lo:hi],
                      self.ts[lo:hi], dict(self.meta))


def _features(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    ambient = np.round(rng.normal(15.0, 8.0, n), 1)
    door = np.where(rng.random(n) < 0.6, 0, rng.integers(8, 61, n))
    load = rng.integers(100, 901, n)
    route = rng.integers(0, len(ROUTES), n)
    return np.column_stack([ambient, door, load]).astype(np.float64), route


def stream(n: int, seed: int, *, regime: Regime = BASE, change_at: int | None = None,
           changed: Regime = CHANGED, burst: tuple[int, int] | None = None, prefix: str = "ev") -> Stream:
    """``n`` events; from ``change_at`` on they follow ``changed``; ``burst = (start, stop)`` corrupts
    the targets of those events as a Fahrenheit-relaying gateway would."""
    rng = np.random.default_rng([seed, 11])
    x, route = _features(rng, n)
    noise = rng.normal(0.0, 1.0, n)
    clean = regime.mean(x, route) + regime.noise_sd * noise
    if change_at is not None:
        late = np.arange(n) >= change_at
        clean[late] = changed.mean(x[late], route[late]) + changed.noise_sd * noise[late]
    y = clean.copy()
    if burst is not None:
        y[burst[0]:burst[1]] = y[burst[0]:burst[1]] * 1.8 + 32.0
    ids = [f"{prefix}{seed}-{i:07d}" for i in range(n)]
    ts = START_TS + 2.5 * np.arange(n)
    return Stream(ids, x, route, y, clean, ts, {"seed": seed, "change_at": change_at, "burst": burst})


def eval_set(regime: Regime, n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A clean evaluation sample of ``regime``: numeric features, route codes, targets."""
    rng = np.random.default_rng([seed, 23])
    x, route = _features(rng, n)
    return x, route, regime.mean(x, route) + regime.noise_sd * rng.normal(0.0, 1.0, n)


def rows(engine: Engine, x: np.ndarray, route: np.ndarray) -> Rows:
    """The engine's rows for numeric features ``x`` and route codes (3 numeric + 1 hashed coordinate)."""
    n = len(route)
    buckets = [engine.model.mapper.bucket("route", r) for r in ROUTES]
    col = np.array([b[0] for b in buckets], dtype=np.int64)[route]
    sign = np.array([b[1] for b in buckets])[route]
    indices = np.column_stack([np.tile(np.arange(3, dtype=np.int64), (n, 1)), col]).reshape(-1)
    values = np.column_stack([x, sign]).reshape(-1)
    return Rows(np.arange(0, 4 * n + 1, 4, dtype=np.int64), indices, values)


def batch(engine: Engine, s: Stream) -> PreparedBatch:
    """What ``engine.prepare(events(s))`` returns, built directly from the arrays."""
    share = engine.config.monitor.holdout_share if engine.config.monitor.enabled else 0.0
    held = np.array([holdout_fraction(i) < share for i in s.ids], dtype=bool) if share > 0 else np.zeros(len(s), bool)
    mode = np.where(held, 2, 1).astype(np.int8)
    return PreparedBatch(list(s.ids), s.ts.copy(), rows(engine, s.x, s.route), s.y.copy(), mode)


def events(s: Stream) -> list[Event]:
    """The stream as validated events (the slow path, for checking :func:`batch`)."""
    out = []
    for k in range(len(s)):
        feats = {"ambient_c": float(s.x[k, 0]), "door_open_s": int(s.x[k, 1]), "load_kg": int(s.x[k, 2]),
                 "route": ROUTES[s.route[k]]}
        out.append(Event(s.ids[k], float(s.ts[k]), feats, float(s.y[k])))
    return out


def config_dict(**monitor) -> dict:
    """The config the monitor tests run: the documented defaults, features of this feed."""
    return {"name": "monitor-test", "features": {"numeric": list(NUMERIC), "categorical": list(CATEGORICAL)},
            "monitor": monitor}
