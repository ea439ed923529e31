"""The baseline beside every run: the running mean of the target, or the base rate, scored on the same events.

References outside trimtab: river's ``stats.Mean`` (the running mean, updated after each event is
scored) and the Krichevsky-Trofimov estimator written out with Python's ``fractions`` (Krichevsky
and Trofimov, 1981, "The performance of universal encoding": ``(ones + 1/2) / (n + 1)``); the
losses are written out from their textbook formulas (half squared error; the negative Bernoulli
log-likelihood).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from river import stats

from service.config import config_from_dict
from service.engine import Engine
from service.events import Event
from tests.service.servicekit import FEATURES, demo_events

WINDOW = 300


def _config(**model):
    return config_from_dict({"name": "b", "features": FEATURES, "model": model,
                             "monitor": {"check_every": 100, "window": WINDOW, "holdout_share": 0.1}})


def _events(n: int, binary: bool = False) -> list[Event]:
    out = []
    for e in demo_events(n, tag="base"):
        target = float(e["target"] > 4.5) if binary else e["target"]
        out.append(Event(e["id"], e["ts"], e["features"], target))
    return out


def _modes(engine: Engine, events: list[Event]) -> tuple[np.ndarray, np.ndarray]:
    batch = engine.prepare(events)
    return batch.y, batch.mode


def test_regression_baseline_is_river_running_mean_scored_before_each_update():
    """Progressive: each learned event's half squared error against river's running mean of the learned
    targets before it; held out: the final mean on the newest WINDOW held-out targets."""
    events = _events(3_000)
    engine = Engine(_config())
    y, mode = _modes(engine, events)
    for k in range(0, len(events), 700):
        engine.apply_events(events[k:k + 700])
    mean, total = stats.Mean(), 0.0
    for target in y[mode == 1]:
        total += 0.5 * (target - mean.get()) ** 2
        mean.update(target)
    held = y[mode == 2][-WINDOW:]
    expected_held = sum(0.5 * (t - mean.get()) ** 2 for t in held) / len(held)
    got = engine.baseline_loss
    assert got["progressive"] == pytest.approx(total / int(np.sum(mode == 1)), rel=1e-12)
    assert got["holdout"] == pytest.approx(expected_held, rel=1e-12)
    assert engine.baseline.margin == pytest.approx(mean.get(), rel=1e-13)
    assert 0 < int(np.sum(mode == 2)) and len(held) == WINDOW


def test_binary_baseline_is_the_krichevsky_trofimov_base_rate_in_log_loss():
    events = _events(2_000, binary=True)
    engine = Engine(_config(task="binary", loss="logistic"))
    y, mode = _modes(engine, events)
    engine.apply_events(events)
    ones, n, total = 0, 0, 0.0
    for target in y[mode == 1]:
        p = Fraction(2 * ones + 1, 2 * (n + 1))
        total -= math.log(p) if target == 1.0 else math.log(1 - p)
        ones, n = ones + int(target), n + 1
    assert 0 < ones < n
    assert engine.baseline_loss["progressive"] == pytest.approx(total / n, rel=1e-10)
    held = y[mode == 2][-WINDOW:]
    p = (ones + 0.5) / (n + 1)
    expected = -np.mean(np.where(held == 1.0, math.log(p), math.log(1 - p)))
    assert engine.baseline_loss["holdout"] == pytest.approx(expected, rel=1e-10)


def test_baseline_is_bit_identical_across_chunkings_and_through_bytes():
    """One by one, in chunks, or restored from bytes half way: the same figures to the bit."""
    events = _events(1_200)
    whole = Engine(_config())
    whole.apply_events(events)
    single = Engine(_config())
    for e in events[:600]:
        single.apply_events([e])
    restored = Engine.from_bytes(single.config, single.to_bytes())
    for k in range(600, 1_200, 37):
        restored.apply_events(events[k:k + 37])
    assert restored.baseline.state() == whole.baseline.state()
    assert restored.baseline_loss == whole.baseline_loss


def test_no_held_out_window_without_holdout_and_warning_when_model_is_no_better():
    """``holdout_share = 0``: no held-out figure; a model held at zero by a tiny radius does worse than
    the mean (the demo targets sit around 4 degC), and the engine says so."""
    cfg = config_from_dict({"name": "b", "features": FEATURES, "constraint": {"set": "ball", "radius": 1e-6},
                            "monitor": {"holdout_share": 0.0, "check_every": 100}})
    engine = Engine(cfg)
    engine.apply_events(_events(1_000))
    assert engine.baseline_loss["holdout"] is None
    assert engine.baseline_loss["progressive"] < engine.progressive_loss
    assert any("baseline" in w for w in engine.warnings)
    good = Engine(_config())
    good.apply_events(_events(3_000))
    assert not any("baseline" in w for w in good.warnings)


@pytest.mark.parametrize("loss", ["squared", "huber", "logistic"])
def test_figures_inside_a_batch_equal_the_batch_cut_there(loss):
    """What a check reads in the middle of a batch (``segment_loss``, ``holdout_at``, from prefix sums)
    equals the figures of a baseline that was given the batch only up to that point (a direct mean
    of the loss over the window, as :func:`models.losses.loss_value` computes it)."""
    from service.baseline import Baseline

    rng = np.random.default_rng(3)
    n = 4_000
    y = (rng.random(n) < 0.3).astype(float) if loss == "logistic" else rng.normal(1e3, 2.0, n)
    mode = rng.choice(np.array([0, 1, 2], dtype=np.int8), n, p=[0.05, 0.8, 0.15])
    whole = Baseline(loss, 250)
    whole.update(y[:1_000], mode[:1_000])
    whole.update(y[1_000:], mode[1_000:])
    for cut in (1_000, 1_001, 1_777, 3_999, 4_000):
        part = Baseline(loss, 250)
        part.update(y[:1_000], mode[:1_000])
        before = part.progressive_sum
        part.update(y[1_000:cut], mode[1_000:cut])
        assert whole.holdout_at(cut - 1_000) == pytest.approx(part.holdout_loss(), rel=1e-9, abs=1e-12)
        assert whole.segment_loss(0, cut - 1_000) == pytest.approx(part.progressive_sum - before, rel=1e-9,
                                                                   abs=1e-12)
