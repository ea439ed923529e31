"""The engine's running figures: binary metrics of its own predictions against scikit-learn's
``sklearn.metrics`` (``accuracy_score``, ``roc_auc_score``, ``brier_score_loss``, ``log_loss``);
overflowing losses counted and never summed; every step-scale change an incident with its old and
new factor; a blown-up run called diverged.

Feeds: the invented cold-chain demo feeds of ``replay_data/`` (regression and binary).
"""

from __future__ import annotations

import gzip
import math
from pathlib import Path

import numpy as np
import orjson
import pytest
from sklearn import metrics as skm

from service.config import config_from_dict
from service.engine import Engine
from service.events import parse_ndjson
from service.replay.runner import run_replay
from tests.service.servicekit import FEATURES, demo_events

ROOT = Path(__file__).resolve().parents[2]
BINARY_FEED = ROOT / "replay_data" / "coldchain-demo-binary.ndjson.gz"


def _config(**sections):
    return config_from_dict({"name": "figures", "features": FEATURES,
                             "monitor": {"check_every": 100, "window": 500, **sections.pop("monitor", {})},
                             **sections})


def _binary_events(engine: Engine, n: int):
    with gzip.open(BINARY_FEED) as f:
        lines = f.read().split(b"\n")[:n]
    events, _, _ = parse_ndjson(b"\n".join(lines), engine.validator)
    return events


def test_binary_metrics_of_the_engine_agree_with_sklearn():
    """Progressive figures over every learned event's prediction (made before it was learned) and
    held-out figures over the window's events scored now, each against scikit-learn on the same
    predictions (the progressive AUC on the predictions rounded down to 1/1024, as documented)."""
    engine = Engine(_config(model={"task": "binary", "loss": "logistic"}), trace_limit=None)
    events = _binary_events(engine, 6000)
    preds, targets = [], []
    for k in range(0, len(events), 700):
        batch = engine.prepare(events[k:k + 700])
        applied = engine.apply(batch)
        learned = batch.mode == 1
        preds.append(applied.outcome.pred[learned])
        targets.append(batch.y[learned])
    p, y = np.concatenate(preds), np.concatenate(targets).astype(int)
    assert 0 < y.sum() < len(y)
    got = engine.binary_metrics()
    prog = got["progressive"]
    assert prog["count"] == len(y) == engine.learned
    assert prog["accuracy"] == pytest.approx(skm.accuracy_score(y, (p >= 0.5).astype(int)), abs=1e-15)
    assert prog["roc_auc"] == pytest.approx(skm.roc_auc_score(y, np.minimum(np.floor(p * 1024), 1023)), abs=1e-12)
    assert prog["brier"] == pytest.approx(skm.brier_score_loss(y, p), rel=1e-9)
    assert prog["log_loss"] == pytest.approx(skm.log_loss(y, p, labels=[0, 1]), rel=1e-9)
    assert prog["base_rate"] == pytest.approx(y.mean(), abs=1e-15)

    kept = engine.monitor.window.view()[2]
    held = [events[int(i)] for i in kept]
    hp, _ = engine.score([e.features for e in held])
    hy = np.array([e.target for e in held], dtype=int)
    hold = got["holdout"]
    assert hold["count"] == len(held) > 20 and 0 < hy.sum() < len(hy) and got["iterate"] == engine.serving
    assert hold["roc_auc"] == pytest.approx(skm.roc_auc_score(hy, hp), abs=1e-12)
    assert hold["accuracy"] == pytest.approx(skm.accuracy_score(hy, (hp >= 0.5).astype(int)), abs=1e-15)
    assert hold["brier"] == pytest.approx(skm.brier_score_loss(hy, hp), rel=1e-9)
    assert hold["log_loss"] == pytest.approx(skm.log_loss(hy, hp, labels=[0, 1]), rel=1e-9)
    # and the logistic loss the engine reports for the window is the same log loss
    assert engine.holdout_losses()[engine.serving] == pytest.approx(hold["log_loss"], rel=1e-6)


def test_binary_metrics_survive_a_checkpoint():
    """The running binary figures are part of the state: restored from bytes, they continue identically."""
    config = _config(model={"task": "binary", "loss": "logistic"})
    engine = Engine(config)
    events = _binary_events(engine, 3000)
    engine.apply_events(events[:1500])
    twin = Engine.from_bytes(config, engine.to_bytes())
    for e in (engine, twin):
        e.apply_events(events[1500:])
    assert twin.binary_metrics() == engine.binary_metrics() and twin.state_digest == engine.state_digest
    assert Engine(_config()).binary_metrics() is None  # a regression has none


def test_a_feature_of_1e300_is_rejected_at_the_boundary_and_changes_nothing(tmp_path):
    """Two events with a feature of 1e300 (finite, but its square overflows) are rejected with where
    and why, counted, and the run is bit-identical to the run without them; its running figures stay
    finite."""
    events = demo_events(3000, tag="h")
    clean = [dict(e) for e in events]
    for k in (1200, 2400):
        events[k] = dict(events[k], features=dict(events[k]["features"], ambient_c=1e300))
    del clean[2400], clean[1200]
    config = _config()
    feeds = []
    for name, rows in (("huge", events), ("clean", clean)):
        feed = tmp_path / f"{name}.ndjson"
        feed.write_bytes(b"\n".join(orjson.dumps(e) for e in rows) + b"\n")
        feeds.append(feed)
    for columnar in (True, False):
        huge, ref = (run_replay([f], config, keep_state=False, columnar=columnar)["summary"] for f in feeds)
        assert huge["rejected"] == 2 and [b["line"] for b in huge["bad_lines"]] == [1201, 2401]
        assert huge["bad_lines"][0]["where"] == "line 1201.features.ambient_c"
        assert "above the 1e+100 limit" in huge["bad_lines"][0]["reason"]
        assert huge["state_digest"] == ref["state_digest"] and huge["progressive_loss"] == ref["progressive_loss"]
        assert huge["progressive_loss"] is not None and all(v is not None for v in huge["holdout_loss"].values())
        assert huge["diverged"] is None


def test_an_overflowing_loss_is_counted_not_summed():
    """A feature of 1e90 passes the boundary, but its loss under a learned model is far above
    ``OVERFLOW_LOSS`` (1e150): such losses are counted in ``nonfinite_losses`` and the progressive
    loss stays the mean of the other learned events' losses."""
    events = demo_events(3000, tag="g")
    for k in (1200, 2400):
        events[k] = dict(events[k], features=dict(events[k]["features"], ambient_c=1e90))
    engine = Engine(_config())
    validated = [engine.validator.validate(e, "") for e in events]
    losses = []
    for k in range(0, len(validated), 500):
        batch = engine.prepare(validated[k:k + 500])
        applied = engine.apply(batch)
        losses.append(applied.outcome.loss[batch.mode == 1])
    losses = np.concatenate(losses)
    huge = ~(np.abs(losses) <= 1e150)
    assert engine.nonfinite_losses == int(huge.sum()) >= 1
    assert engine.progressive_loss == pytest.approx(float(np.mean(losses[~huge])), rel=1e-12)
    assert math.isfinite(engine.progressive_loss)
    assert any(f"{engine.nonfinite_losses:,} learned event(s) overflowed" in w for w in engine.warnings)


def _blowup_config(monitor: dict | None = None):
    """Squared loss, no constraint, a constant step of 5 on warm-up-scaled features: each update
    multiplies the error by about |1 - 5 ||x||^2|| > 1 (gradient descent on an L-smooth loss needs
    a step below 2 / L; Yu. Nesterov, his 2004 textbook on convex optimization (Kluwer), Thm 2.1.14),
    and the monitor's rollbacks cannot halve it back fast enough."""
    return _config(constraint={"set": "none"}, steps={"rule": "constant", "base": 5.0}, monitor=monitor or {})


@pytest.fixture(scope="module")
def blown_up(tmp_path_factory):
    feed = tmp_path_factory.mktemp("blowup") / "feed.ndjson"
    feed.write_bytes(b"\n".join(orjson.dumps(e) for e in demo_events(6000, tag="b")) + b"\n")
    return run_replay([feed], _blowup_config(), keep_state=False)


def test_a_blown_up_run_says_diverged(blown_up):
    summary = blown_up["summary"]
    assert summary["diverged"] and "blew up" in summary["diverged"]
    assert summary["verdict"].startswith("diverged: ") and not summary["verdict"].startswith("stable")
    assert summary["progressive_loss"] is not None and summary["nonfinite_losses"] > 0


def test_a_sound_run_is_not_called_diverged(tmp_path):
    feed = tmp_path / "feed.ndjson"
    feed.write_bytes(b"\n".join(orjson.dumps(e) for e in demo_events(3000, tag="s")) + b"\n")
    summary = run_replay([feed], _config(), keep_state=False)["summary"]
    assert summary["diverged"] is None and "diverged" not in summary["verdict"]


def test_every_step_scale_change_is_an_incident(blown_up):
    """Each rollback halves the step scale (``rollback_shrink = 0.5``) and each restart sets it back
    to 1: the ``step_scale`` incidents chain old -> new from 1, one per rollback or restart."""
    incidents = blown_up["incidents"]
    changes = [i for i in incidents if i["kind"] == "step_scale"]
    actions = [i for i in incidents if i["kind"] in ("rollback", "restart")]
    assert len(actions) >= 2 and len(changes) == len(actions)
    scale = 1.0
    for change, action in zip(changes, actions):
        ev = change["evidence"]
        assert change["event"] == action["event"] and ev["cause"] == action["kind"]
        assert ev["old"] == pytest.approx(scale, rel=1e-12)
        assert ev["new"] == (1.0 if action["kind"] == "restart" else pytest.approx(0.5 * scale, rel=1e-12))
        assert action["kind"] != "rollback" or ev["new"] == action["evidence"]["step_scale"]
        scale = ev["new"]
    rollbacks = [c["evidence"]["new"] for c in changes if c["evidence"]["cause"] == "rollback"]
    assert [r["step_scale"] for r in blown_up["summary"]["rollbacks"]] == rollbacks


def test_an_operator_rollback_records_the_step_scale():
    engine = Engine(_config())
    engine.apply_events([engine.validator.validate(e, "") for e in demo_events(600, tag="o")])
    engine.rollback("operator request")
    engine.rollback("operator request")
    changes = [(i["evidence"]["old"], i["evidence"]["new"]) for i in engine.incidents if i["kind"] == "step_scale"]
    assert changes == [(1.0, 0.5), (0.5, 0.25)] and engine.model.step_scale == 0.25
