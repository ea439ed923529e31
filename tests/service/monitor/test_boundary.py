"""The boundary rule, the verdict, and the certificate after a restart.

Outside references: scikit-learn's least-squares optimum (the constraint binds exactly when that
optimum lies outside the ball, by the first-order optimality condition of a convex problem over a
convex set), and M. Zinkevich, 2003, "Online convex programming and generalized infinitesimal gradient
ascent", Theorem 1, whose bound assumes one stationary sequence: after the monitor restarts the
average, the certificate may only speak of the feed from the restart on.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression

from models import Rows
from service.config import config_from_dict
from service.engine import Engine, PreparedBatch, holdout_fraction
from service.replay.report import verdict

from . import monitor_feeds as feeds

D = 8


def _engine_on(norm: float, radius: float, n: int = 20_000, seed: int = 5) -> tuple[Engine, float]:
    """An engine fed ``n`` events of a linear truth with weight norm ``norm`` under a ball of ``radius``;
    also the norm of scikit-learn's least-squares fit of the same events (intercept included)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, D))
    w = rng.normal(size=D)
    w *= norm / np.linalg.norm(w)
    y = x @ w + 1.0 + rng.normal(size=n)
    cfg = config_from_dict({"name": "boundary", "features": {"numeric": [f"x{j}" for j in range(D)]},
                            "constraint": {"set": "ball", "radius": radius}})
    eng = Engine(cfg, trace_limit=None)
    ids = [f"b{seed}-{i}" for i in range(n)]
    mode = np.array([2 if holdout_fraction(i) < cfg.monitor.holdout_share else 1 for i in ids], dtype=np.int8)
    rows = Rows(np.arange(0, n * D + 1, D, dtype=np.int64), np.tile(np.arange(D, dtype=np.int64), n), x.reshape(-1))
    eng.apply(PreparedBatch(ids, np.full(n, np.nan), rows, y, mode))
    fit = LinearRegression().fit(x, y)
    mean, std = eng.model.scaling  # the model's coordinates: warm-up scaled features
    return eng, float(np.linalg.norm(np.append(fit.coef_ * std, fit.intercept_ + fit.coef_ @ mean)))


def test_boundary_warning_fires_on_a_too_small_radius():
    """True weight norm 20, radius 1: the least-squares optimum lies far outside the ball, the raw
    iterate is pinned to its boundary, and the monitor says so (an incident, a standing warning the
    model card and the summary show) and the verdict is not "stable"."""
    eng, optimum_norm = _engine_on(20.0, 1.0)
    assert optimum_norm > 10.0
    (incident,) = [i for i in eng.incidents if i["kind"] == "boundary"]
    assert "the constraint is binding: radius 1 may be too small" in incident["reason"]
    assert eng.warnings and eng.warnings[0].startswith("the constraint is binding: radius 1 may be too small")
    run = {"rollbacks": [], "restarts": [], "serving": eng.serving, "warnings": eng.warnings}
    assert verdict(run).startswith("not stable: the constraint is binding")


def test_boundary_warning_stays_silent_on_a_well_sized_radius():
    """True weight norm 20, radius 40: the optimum lies inside the ball; no boundary incident, no
    warning, and the verdict is "stable" (no baseline given)."""
    eng, optimum_norm = _engine_on(20.0, 40.0)
    assert optimum_norm < 30.0
    assert not [i for i in eng.incidents if i["kind"] == "boundary"] and eng.warnings == []
    assert verdict({"rollbacks": [], "restarts": [], "serving": eng.serving, "warnings": eng.warnings}
                   ).startswith("stable")


def test_verdict_is_never_stable_while_worse_than_the_baseline():
    """A model whose loss is above the baseline's (``baseline_loss``) is not "stable"."""
    run = {"rollbacks": [], "restarts": [], "serving": "averaged", "progressive_loss": 3.0,
           "baseline_loss": {"progressive": 2.0, "holdout": None}}
    assert verdict(run).startswith("not stable: the model's loss 3 is above the baseline's 2")
    assert verdict({**run, "baseline_loss": {"progressive": 4.0, "holdout": None}}).startswith("stable")


@pytest.mark.slow
def test_certificate_after_a_restart_says_from_which_event_it_applies():
    """A real change at event 40,000: after the restart the certificate says it restarted, applies from
    the restart's event on, and counts ``T`` from there; a checkpoint keeps it."""
    s = feeds.stream(48_000, 7, change_at=40_000)
    eng = Engine(config_from_dict(feeds.config_dict()), trace_limit=None)
    eng.apply(feeds.batch(eng, s))
    (restart,) = [i for i in eng.incidents if i["kind"] == "restart"]
    cert = eng.certificate()
    assert cert["restarted"] and cert["applies_from_event"] == restart["event"]
    assert f"from event {restart['event']:,}" in cert["scope"]
    assert cert["T"] == eng.model.updates_since_restart < 48_000 - 40_000
    assert Engine.from_bytes(eng.config, eng.to_bytes()).certificate() == cert
    fresh = Engine(config_from_dict(feeds.config_dict()))
    assert not fresh.certificate()["restarted"] and fresh.certificate()["applies_from_event"] == 0
