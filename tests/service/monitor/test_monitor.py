"""The stability monitor on seeded streams: label bursts, real changes, clean feeds, its detectors.

Streams come from ``tests/service/monitor/monitor_feeds.py`` (invented cold-chain telemetry, linear truth
plus Gaussian noise) and go through ``Engine.apply`` as the live service and replay do. "The
serving model's held-out loss" is always measured on a fresh clean sample of the current regime
(mean half squared error of the serving iterate), never on the monitor's own window, which may hold
garbage targets. Outside references: scikit-learn's least-squares optimum of each regime, river's
documented detector examples, scipy's binomial test.
"""

from __future__ import annotations

import hashlib
import math
import pickle
import random

import numpy as np
import pytest
from scipy.stats import binomtest
from sklearn.linear_model import LinearRegression

from models import Outcome
from models.losses import loss_value
from service.config import ConfigError, config_from_dict
from service.engine import Engine
from models.snapshot import pack, unpack
from service.monitor.detectors import ChangeDetector
from service.monitor.rules import sign_test_pvalue
from service.monitor.monitor import LAYOUT

from . import monitor_feeds as feeds

BURST = (15_000, 16_500)  # 2% of a 75,000-event stream
CHANGE_AT = 40_000


def engine(**monitor) -> Engine:
    return Engine(config_from_dict(feeds.config_dict(**monitor)), trace_limit=None, incidents_kept=None)


def apply(eng: Engine, s: feeds.Stream, lo: int, hi: int, chunk: int = 50_000) -> list:
    """Apply events ``lo..hi`` of ``s`` through the bulk path; return the actions taken."""
    actions = []
    for a in range(lo, hi, chunk):
        actions += eng.apply(feeds.batch(eng, s.part(a, min(hi, a + chunk)))).actions
    return actions


def serving_loss(eng: Engine, sample, iterate: str | None = None) -> float:
    """Mean loss on a clean ``sample`` of the serving iterate (or of ``iterate``)."""
    x, route, y = sample
    margins = eng.model.score_rows(feeds.rows(eng, x, route), iterate or eng.serving)
    return float(np.mean(loss_value("squared", margins, y)))


def reference_loss(regime: feeds.Regime, sample, seed: int) -> float:
    """Loss on ``sample`` of scikit-learn's least-squares fit to 50,000 fresh events of ``regime``."""
    x, route, y = feeds.eval_set(regime, 50_000, seed + 1000)
    fit = LinearRegression().fit(np.column_stack([x, np.eye(4)[route]]), y)
    ex, er, ey = sample
    return float(np.mean(loss_value("squared", fit.predict(np.column_stack([ex, np.eye(4)[er]])), ey)))


def kinds(eng: Engine, kind: str) -> list:
    return [i for i in eng.incidents if i["kind"] == kind]


def test_bulk_batches_are_what_the_engine_prepares():
    """The tests' numpy path builds exactly the batch ``Engine.prepare`` builds from events."""
    s = feeds.stream(3000, 1, burst=(1000, 1100))
    fast, slow = engine(), engine()
    a, b = feeds.batch(fast, s), slow.prepare(feeds.events(s))
    assert np.array_equal(a.mode, b.mode) and 100 < np.count_nonzero(a.mode == 2) < 200
    assert np.array_equal(a.rows.indptr, b.rows.indptr) and np.array_equal(a.rows.indices, b.rows.indices)
    assert np.array_equal(a.rows.values, b.rows.values) and np.array_equal(a.y, b.y)
    fast.apply(a)
    slow.apply(b)
    assert fast.state_digest == slow.state_digest and fast.incidents == slow.incidents


@pytest.mark.parametrize("loss", ["squared", "huber", "logistic"])
def test_window_losses_are_the_models_losses(loss):
    """The compiled window pass scores like ``LinearModel.score_rows`` + ``models.losses``."""
    task = "binary" if loss == "logistic" else "regression"
    cfg = config_from_dict({**feeds.config_dict(), "model": {"task": task, "loss": loss}})
    eng = Engine(cfg)
    s = feeds.stream(12_000, 2)
    if task == "binary":
        s.y = (s.y > np.median(s.y)).astype(np.float64)
    b = feeds.batch(eng, s)
    eng.apply(b)
    held = np.flatnonzero(b.mode == 2)[-cfg.monitor.window:]
    rows = b.rows.take(held)
    got = eng.holdout_losses()
    for it, key in (("raw", "raw"), ("averaged", "averaged")):
        want = np.mean(loss_value(loss, eng.model.score_rows(rows, it), b.y[held], cfg.model.huber_delta))
        assert got[key] == pytest.approx(want, rel=1e-9)


@pytest.mark.parametrize("kernel", ["lazy", "dense"])
def test_window_losses_with_missing_features_and_early_rows(kernel):
    """Events with missing numeric features, some held out before the warm-up scaling froze (kept
    unscaled, scaled at the first check after): the window still scores like ``score_rows``. (A
    missing feature makes some losses large: no event is left out as absurd here.)"""
    cfg = config_from_dict({**feeds.config_dict(absurd_factor=1e12), "model": {"kernel": kernel}})
    eng = Engine(cfg)
    s = feeds.stream(6_000, 5)
    evs = feeds.events(s)
    rng = np.random.default_rng(17)
    for e, drop in zip(evs, rng.random((len(evs), 3)) < 0.2):
        for name, gone in zip(feeds.NUMERIC, drop):
            if gone:
                del e.features[name]
    b = eng.prepare(evs)
    held = np.flatnonzero(b.mode == 2)
    assert held[0] < cfg.features.warmup_events  # some were kept before the scaling froze
    eng.apply(b)
    held = held[-cfg.monitor.window:]
    rows = b.rows.take(held)
    assert np.count_nonzero(np.diff(rows.indptr) < 4) > 50  # rows with a missing feature
    got = eng.holdout_losses()
    assert eng.trace[-1]["excluded"] == 0
    for it in ("raw", "averaged"):
        want = np.mean(loss_value("squared", eng.model.score_rows(rows, it), b.y[held]))
        assert got[it] == pytest.approx(want, rel=1e-9)


def test_sign_test_matches_scipy():
    """The confirmation's sign test is the exact one-sided binomial test (scipy.stats.binomtest)."""
    for above, n in ((0, 10), (8, 10), (40, 52), (61, 66), (30, 60)):
        want = binomtest(above, n, 0.5, alternative="greater").pvalue
        assert sign_test_pvalue(above, n) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("kind,index", [("page_hinkley", 1006), ("adwin", 1023)])
def test_detector_reproduces_river_documentation(kind, index):
    """river's documented examples (``drift.PageHinkley`` and ``drift.ADWIN`` docstrings, river 0.2x):
    with ``random.Random(12345)`` and the stream ``choices([0, 1], k=1000) + choices(range(4, 8),
    k=1000)`` the default detectors fire first at index 1006 (Page-Hinkley) and 1023 (ADWIN). The
    monitor's own wrapper, given river's defaults, must do the same."""
    rng = random.Random(12345)
    stream = rng.choices([0, 1], k=1000) + rng.choices(range(4, 8), k=1000)
    detector = ChangeDetector(kind)
    fired = [i for i, x in enumerate(stream) if detector.feed([float(x)])]
    assert fired[0] == index


def test_noise_allowance_is_the_raw_iterates_stationary_excess():
    """The allowance ``eta E||g||^2 / 4`` is the raw iterate's mean excess loss under constant
    steps: measured against scikit-learn's least-squares optimum it agrees within 25%."""
    for eta in (0.005, 0.02):
        cfg = config_from_dict({**feeds.config_dict(enabled=False), "steps": {"rule": "constant", "base": eta}})
        eng, s = Engine(cfg), feeds.stream(80_000, 5)
        sample = feeds.eval_set(feeds.BASE, 20_000, 5)
        x, route, y = sample
        fit = LinearRegression().fit(np.column_stack([s.x, np.eye(4)[s.route]]), s.y)
        optimum = np.mean(loss_value("squared", fit.predict(np.column_stack([x, np.eye(4)[route]])), y))
        apply(eng, s, 0, 20_000)
        excess = []
        for lo in range(20_000, 80_000, 500):
            apply(eng, s, lo, lo + 500)
            excess.append(serving_loss(eng, sample, "raw") - optimum)
        mean, std = eng.model.scaling
        resid = fit.predict(np.column_stack([x, np.eye(4)[route]])) - y
        # gradient of one event at the optimum in the model's coordinates: 3 scaled numerics, one
        # signed route bucket, the intercept
        g2 = np.mean(resid**2 * (np.sum(((x - mean) / std) ** 2, axis=1) + 2.0))
        ratio = np.mean(excess) / (eta * g2 / 4.0)
        print(f"eta {eta}: raw excess {np.mean(excess):.5f}, eta E||g||^2 / 4 = {eta * g2 / 4:.5f}, ratio {ratio:.2f}")
        assert 0.75 < ratio < 1.33


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_label_burst_is_rolled_back(seed):
    """A 1,500-event Fahrenheit burst (2% of 75,000 events): a rollback within
    ``check_every * (rollback_patience + 1)`` learned events of its start, the serving model's
    loss 1,000 events after it within 10% of its pre-burst value, no restart; with the monitor off
    (``[monitor] enabled = false``: what a user without the monitor runs; every event is learned)
    the same figure is at least 2x worse. The pre-burst figure is itself checked against
    scikit-learn's least-squares optimum of the regime."""
    s = feeds.stream(75_000, seed, burst=BURST)
    sample = feeds.eval_set(feeds.BASE, 20_000, seed)
    figures = {}
    for label, kw in (("on", {}), ("off", {"enabled": False})):
        eng = engine(**kw)
        apply(eng, s, 0, BURST[0])
        pre = serving_loss(eng, sample)
        apply(eng, s, BURST[0], BURST[1] + 1000)
        post = serving_loss(eng, sample)
        apply(eng, s, BURST[1] + 1000, len(s))
        figures[label] = (pre, post, eng)
        print(f"seed {seed} monitor {label}: pre-burst {pre:.4f}, 1,000 events after {post:.4f} "
              f"(x{post / pre:.3f})")
    pre, post, eng = figures["on"]
    cfg = eng.config.monitor
    mode = feeds.batch(eng, s).mode
    rollbacks = kinds(eng, "rollback")
    assert rollbacks, "no rollback"
    first = rollbacks[0]["event"]
    learned_until = int(np.count_nonzero(mode[BURST[0]:first + 1] == 1))
    assert BURST[0] <= first and learned_until <= cfg.check_every * (cfg.rollback_patience + 1)
    assert post <= 1.10 * pre
    assert not kinds(eng, "restart")
    assert pre <= 1.05 * reference_loss(feeds.BASE, sample, seed)
    off_pre, off_post, _ = figures["off"]
    assert off_post >= 2.0 * off_pre and off_post >= 2.0 * post
    garbage_in_window = max(r["excluded"] for r in eng.trace)
    assert garbage_in_window >= 0.8 * cfg.holdout_share * (BURST[1] - BURST[0])


SPAN = 8_000  # events after the change within which the serving loss is back within 10%


@pytest.mark.parametrize("seed,drift", [(1, "page_hinkley"), (2, "page_hinkley"), (3, "adwin")])
def test_real_change_restarts(seed, drift):
    """The coefficients change at event 40,000 (after a label burst at 15,000, whose garbage stays
    in the window): one restart, after the change; within 8,000 events the serving model's loss is
    within 10% of scikit-learn's least-squares optimum of the new regime; with restarts disabled
    (``drift = "off"``, rollbacks still on) it stays at least 2x worse over the whole span."""
    s = feeds.stream(CHANGE_AT + SPAN, seed, burst=BURST, change_at=CHANGE_AT)
    sample = feeds.eval_set(feeds.CHANGED, 20_000, seed)
    ref = reference_loss(feeds.CHANGED, sample, seed)
    curves = {}
    for label, kw in (("on", {"drift": drift}), ("no restarts", {"drift": "off"})):
        eng = engine(**kw)
        apply(eng, s, 0, CHANGE_AT)
        curve = []
        for lo in range(CHANGE_AT, CHANGE_AT + SPAN, 1000):
            apply(eng, s, lo, lo + 1000)
            curve.append(serving_loss(eng, sample) / ref)
        curves[label] = (curve, eng)
        print(f"seed {seed} {label}: loss / optimum every 1,000 events after the change: "
              + " ".join(f"{c:.2f}" for c in curve))
    curve, eng = curves["on"]
    restarts = kinds(eng, "restart")
    assert len(restarts) == 1 and CHANGE_AT < restarts[0]["event"] < CHANGE_AT + SPAN
    assert restarts[0]["evidence"]["alarm_event"] >= CHANGE_AT - eng.config.monitor.check_every
    assert curve[-1] <= 1.10
    assert min(curves["no restarts"][0]) >= 2.0
    assert not kinds(curves["no restarts"][1], "restart")
    print(f"restart at event {restarts[0]['event']}: {restarts[0]['reason']}")


def test_no_false_alarms_on_a_million_clean_events():
    """1,000,000 clean stationary events in four seeded streams, default settings: no rollback,
    at most one restart. The detector's input, the share of new held-out events above the older
    events' median, is binomial around 1/2 when nothing changes; its mean over the checks is too."""
    checks = rollbacks = restarts = alarms = 0
    shares = []
    for seed in (101, 102, 103, 104):
        eng = engine()
        apply(eng, feeds.stream(250_000, seed), 0, 250_000)
        checks += len(eng.trace)
        rollbacks += len(kinds(eng, "rollback"))
        restarts += len(kinds(eng, "restart"))
        alarms += sum(1 for r in eng.trace if "alarm" in r)
        shares += [r["exceedance"] for r in eng.trace if "exceedance" in r]
    print(f"{checks} checks on 1,000,000 events: {rollbacks} rollbacks, {restarts} restarts, {alarms} "
          f"drift alarms dismissed or confirmed; false rollback rate {rollbacks / checks:.2e} per check, "
          f"false restart rate {restarts / checks:.2e} per check; mean exceedance share {np.mean(shares):.4f}")
    assert rollbacks == 0 and restarts <= 1
    assert abs(np.mean(shares) - 0.5) < 0.01


def _vector_digest(model, iterate: str) -> str:
    w, b = model.weights(iterate)
    return hashlib.sha256((np.append(w, b) + 0.0).tobytes()).hexdigest()  # + 0.0 turns -0.0 into 0.0


def test_rollback_leaves_a_usable_model_and_checkpoints_replay_it():
    """After the first rollback of a burst: raw == averaged (digests of both vectors), a smaller
    step scale, learning continues; a checkpoint taken right then, restored and fed the rest of the
    stream, ends bit-identical to an uninterrupted run of the whole stream."""
    s = feeds.stream(30_000, 4, burst=BURST)
    eng = engine()
    mode = feeds.batch(eng, s).mode
    every = eng.config.monitor.check_every
    ends = np.flatnonzero(mode == 1)[every - 1::every] + 1  # a batch ending here ends with a check
    lo = 0
    scale_before = None
    for hi in ends:
        scale_before = eng.model.step_scale
        actions = apply(eng, s, lo, int(hi))
        lo = int(hi)
        if any(a["action"] == "rollback" for a in actions):
            break
    else:
        pytest.fail("no rollback")
    assert _vector_digest(eng.model, "raw") == _vector_digest(eng.model, "averaged")
    assert eng.model.step_scale == pytest.approx(0.5 * scale_before)
    blob = eng.to_bytes()
    updates = eng.model.n_updates
    restored = Engine.from_bytes(eng.config, blob, trace_limit=None)
    assert restored.state_digest == eng.state_digest
    apply(eng, s, lo, len(s))
    apply(restored, s, lo, len(s), chunk=777)
    whole = engine()
    apply(whole, s, 0, len(s), chunk=10_000)
    assert eng.model.n_updates > updates + 10_000
    assert restored.state_digest == eng.state_digest == whole.state_digest
    assert restored.incidents == eng.incidents == whole.incidents
    assert math.isfinite(serving_loss(eng, feeds.eval_set(feeds.BASE, 5000, 4)))


def test_monitor_state_of_another_layout_is_refused():
    """A checkpoint's monitor state written by a trimtab with another layout is refused with a clear
    error, and the monitor is unchanged: a state of the previous layout number, and a pickled state
    (the format before this one)."""
    eng = engine()
    apply(eng, feeds.stream(3000, 8), 0, 3000)
    before = eng.monitor.to_bytes()
    header, arrays, extra, _ = unpack(before)
    older = pack({**header, "layout": LAYOUT - 1}, arrays, extra)[0]
    for blob in (older, pickle.dumps({"_mon": np.zeros(3)})):
        with pytest.raises(ValueError, match="another layout"):
            eng.monitor.load_bytes(blob)
        assert eng.monitor.to_bytes() == before


def test_trusted_copy_is_an_independent_model():
    """The monitor's cheap copy of a model is the model: same state digest as a ``to_bytes`` copy,
    unchanged while the original learns on, and it learns like a ``from_bytes`` copy."""
    eng = engine()
    s = feeds.stream(6000, 8)
    apply(eng, s, 0, 3000)
    twin, snap = eng.model.quick_copy(), eng.model.copy()
    assert twin.digest == snap.digest == eng.model.digest
    apply(eng, s, 3000, 6000)
    assert twin.digest == snap.digest != eng.model.digest
    rest = feeds.batch(eng, s.part(3000, 6000))
    for m in (twin, snap):
        m.process(rest.rows, rest.y, rest.mode, Outcome.empty(len(rest)))
    assert twin.digest == snap.digest


def test_serve_better_follows_the_lower_window_loss():
    """``serve = "better"``: every check serves the iterate with the lower held-out loss."""
    eng = engine(serve="better")
    apply(eng, feeds.stream(40_000, 6), 0, 40_000)
    served = {r["serving"] for r in eng.trace}
    assert served == {"raw", "averaged"}
    for r in eng.trace:
        if r["held_out"] - r["excluded"] > 0:
            assert r["serving"] == ("raw" if r["holdout_raw"] < r["holdout_avg"] else "averaged")


def test_restart_drops_the_old_window_and_keeps_the_raw_iterate():
    """A restart keeps only held-out events from the alarm on and starts a fresh average."""
    s = feeds.stream(CHANGE_AT + SPAN, 7, change_at=CHANGE_AT)
    eng = engine()
    apply(eng, s, 0, len(s), chunk=1_000)
    (restart,) = kinds(eng, "restart")
    assert eng.monitor.window.view()[2].min() >= restart["evidence"]["alarm_event"]
    assert eng.model.updates_since_restart < len(s) - CHANGE_AT
    ev = restart["evidence"]
    assert ev["p"] <= 1e-3 and ev["recent_averaged"] > 1.1 * ev["before_averaged"]


def test_rejected_bursts_are_incidents():
    """A share of rejected input above ``reject_burst_share`` is one incident per burst."""
    eng = engine()
    for k in range(40):
        bad = 30 if 10 <= k < 20 or 30 <= k < 35 else 0
        eng.note_rejected(bad, 100, None)
    assert [i["kind"] for i in eng.incidents] == ["rejected_burst", "rejected_burst"]


def test_monitor_settings_are_validated():
    with pytest.raises(ConfigError) as err:
        config_from_dict(feeds.config_dict(boundary_share=0.0))
    assert err.value.where == "monitor.boundary_share"
    with pytest.raises(ConfigError) as err:
        config_from_dict(feeds.config_dict(drift="cusum"))
    assert err.value.where == "monitor.drift"


def test_a_live_engine_keeps_its_newest_incidents_only():
    """A service's engine keeps the newest ``INCIDENTS_KEPT`` incidents, in memory and through a
    checkpoint; a replay's engine (``incidents_kept=None``) keeps every one."""
    from service.engine import INCIDENTS_KEPT

    cfg = config_from_dict(feeds.config_dict())
    live, replay = Engine(cfg), Engine(cfg, trace_limit=None, incidents_kept=None)
    bursts = INCIDENTS_KEPT + 25
    for eng in (live, replay):
        for k in range(bursts):  # each burst opens (all rejected), then closes (none rejected)
            eng.note_rejected(600, 600, float(k))  # more than the rule's 500-event window each
            eng.note_rejected(0, 600, None)
    assert len(replay.incidents) == bursts
    kept = live.incidents
    assert len(kept) == INCIDENTS_KEPT
    assert [i["ts"] for i in kept] == [float(k) for k in range(25, bursts)]  # the newest, oldest first
    restored = Engine.from_bytes(cfg, live.to_bytes())
    assert restored.incidents == kept
    restored.note_rejected(600, 600, 9e9)
    assert len(restored.incidents) == INCIDENTS_KEPT and restored.incidents[-1]["ts"] == 9e9
