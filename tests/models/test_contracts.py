"""The contract every model configuration keeps, run over every loss x constraint x step rule x
averaging scheme x kernel.

A model scores before it has learned anything, does not touch its inputs, learns a chunk exactly as
it learns the chunk's events one by one (also across the warm-up boundary), snapshots to bytes and
back bit for bit, copies independently, stops bad input at the boundary with an error that says
where, and refuses an update that would make its state non-finite. ``digest`` (SHA-256 of the
serialized state) is the test of "bit-identical".

The loss checks compare the losses with independent implementations (scipy and scikit-learn) and
their derivatives with central finite differences; ``test_kernels.py`` checks that the kernels'
updates are gradient steps of the objective the same way.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.special
from sklearn.metrics import log_loss

import models
from models.losses import loss_derivative, loss_value

LOSSES = ("squared", "huber", "logistic")
CONSTRAINTS = ("ball", "box", "none")
RULES = ("constant", "sqrt_decay", "horizon", "anytime", "strongly_convex")
AVERAGINGS = ("uniform", "weighted", "exponential")
KERNELS = ("lazy", "dense")
NUMERIC = ("ambient_c", "door_open_s", "load_kg")
CATEGORICAL = ("van", "route")
WARMUP = 8
N_EVENTS = 40
STRONG_L2 = 0.5
ROOT = Path(__file__).resolve().parents[2]


def spec_for(loss, constraint, rule, averaging, kernel, **extra) -> models.ModelSpec:
    """The spec of one contract case: small hash space and a short warm-up, so every path runs."""
    settings = dict(numeric=NUMERIC, categorical=CATEGORICAL, hash_bits=6, scaling="warmup",
                    warmup_events=WARMUP, task="binary" if loss == "logistic" else "regression", loss=loss,
                    l2=STRONG_L2 if rule == "strongly_convex" else 0.0, constraint=constraint, radius=5.0,
                    lower=-2.0, upper=2.0, rule=rule, base=0.05, horizon=200, averaging=averaging,
                    halflife=20.0, kernel=kernel)
    settings.update(extra)
    return models.ModelSpec(**settings)


def fleet_events(n: int, seed: int, binary: bool) -> tuple[list[dict], list[float]]:
    """Invented cold-chain van telemetry with a linear hold temperature; some values are missing."""
    rng = np.random.default_rng(seed)
    events, targets = [], []
    for _ in range(n):
        ambient = round(float(rng.normal(12.0, 6.0)), 1)
        door = int(rng.integers(0, 120))
        load = int(rng.integers(100, 900))
        van = f"V{int(rng.integers(1, 25)):02d}"
        route = ("urban", "regional", "linehaul")[int(rng.integers(3))]
        event = {"ambient_c": ambient, "door_open_s": door, "load_kg": load, "van": van, "route": route}
        if rng.random() < 0.15:
            event["load_kg"] = None
        if rng.random() < 0.1:
            del event["door_open_s"]
        hold = 3.8 + 0.14 * ambient + 0.07 * door + 0.0006 * load + (0.8 if route == "urban" else 0.0)
        hold += float(rng.normal(0.0, 0.3))
        events.append(event)
        targets.append(float(hold > 8.0) if binary else round(hold, 2))
    return events, targets


def _case_params():
    for loss, cons, rule, avg, kernel in itertools.product(LOSSES, CONSTRAINTS, RULES, AVERAGINGS, KERNELS):
        rule_id = f"{rule}-l2={STRONG_L2}" if rule == "strongly_convex" else rule
        marks = ()
        if cons == "none" and rule in ("horizon", "anytime"):
            marks = pytest.mark.skip(reason=f"rule {rule!r} sets its step from the radius R of the set; the "
                                            "unbounded set 'none' has none (ModelSpec refuses it)")
        elif cons == "none" and rule == "strongly_convex":
            marks = pytest.mark.skip(reason="rule 'strongly_convex' starts with steps of 1/l2 and needs a bounded "
                                            "set to project onto (ModelSpec refuses 'none')")
        yield pytest.param((loss, cons, rule, avg, kernel), id=f"{loss}-{cons}-{rule_id}-{avg}-{kernel}", marks=marks)


CASES = list(_case_params())


@pytest.fixture(params=CASES)
def case(request):
    loss, cons, rule, avg, kernel = request.param
    spec = spec_for(loss, cons, rule, avg, kernel)
    events, targets = fleet_events(N_EVENTS, seed=7, binary=loss == "logistic")
    return spec, events, targets


def _state_arrays(model) -> dict[str, np.ndarray]:
    return {name: np.asarray(value) for name, value in model._arrays().items()}


# ---------------------------------------------------------------------------------- the contract

def test_scores_before_learning(case):
    """An untrained model scores 0 (regression) or 0.5 (binary) with both iterates, finitely."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    expected = 0.5 if spec.task == "binary" else 0.0
    for iterate in models.ITERATES:
        scores = model.score_many(events, iterate)
        assert np.all(np.isfinite(scores)) and np.all(scores == expected)
        assert model.score_one({}, iterate) == expected
    out = model.learn_many(events[:1], targets[:1])
    assert out.pred[0] == expected and np.isfinite(out.loss[0])


def test_input_not_mutated(case):
    """learn_many and score_many leave the caller's feature dicts and targets (list or array) as they were."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    array_targets = np.array(targets)
    kept_events, kept_list, kept_array = copy.deepcopy(events), list(targets), array_targets.copy()
    model.learn_many(events[:20], targets[:20])
    model.learn_many(events[20:], array_targets[20:])
    model.score_many(events)
    assert events == kept_events
    assert targets == kept_list
    assert np.array_equal(array_targets, kept_array)


SPLITS = [(), (1,), (WARMUP - 1,), (WARMUP,), (WARMUP + 1,), (3, WARMUP, 20), (5, 5, 33), (N_EVENTS - 1,)]


def test_chunk_equals_one_by_one(case):
    """Chunks cut anywhere (before, at and after the warm-up boundary) give the one-by-one state bit for bit."""
    spec, events, targets = case
    single = models.LinearModel(spec)
    served = []
    for e, y in zip(events, targets):
        served.append(single.score_one(e, "raw"))
        single.learn_one(e, y)
    for cuts in SPLITS:
        chunked = models.LinearModel(spec)
        bounds = [0, *cuts, N_EVENTS]
        preds = []
        for lo, hi in zip(bounds, bounds[1:]):
            preds.append(chunked.learn_many(events[lo:hi], targets[lo:hi], serve="raw").pred)
        assert chunked.digest == single.digest, cuts
        # progressive predictions agree too (the probability link is computed in numba and in numpy)
        np.testing.assert_allclose(np.concatenate(preds), served, rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("learned", [0, WARMUP // 2, 20])
def test_snapshot_round_trip(case, learned):
    """from_bytes(to_bytes()) is bit-identical, also mid warm-up, and keeps learning identically."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    model.learn_many(events[:learned], targets[:learned])
    blob = model.to_bytes()
    restored = models.LinearModel.from_bytes(blob)
    assert restored.digest == model.digest and restored.to_bytes() == blob
    assert restored.spec == spec
    model.learn_many(events[learned:], targets[learned:])
    restored.learn_many(events[learned:], targets[learned:])
    assert restored.digest == model.digest
    for iterate in models.ITERATES:
        assert np.array_equal(restored.score_many(events, iterate), model.score_many(events, iterate))


def test_copy_is_independent_and_clone_is_fresh(case):
    """Learning on copy() changes neither side's twin; clone() has the settings and no state."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    model.learn_many(events[:20], targets[:20])
    before = model.digest
    twin = model.copy()
    assert twin.digest == before
    twin.learn_many(events[20:], targets[20:])
    assert twin.digest != before and model.digest == before
    twin_state = twin.digest
    model.learn_many(events[20:30], targets[20:30])
    assert twin.digest == twin_state
    fresh = model.clone()
    assert fresh.spec == spec and fresh.n_updates == 0 and fresh.scaling_frozen == (spec.scaling == "none")
    assert fresh.digest == models.LinearModel(spec).digest


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), float("-inf")], ids=["nan", "inf", "-inf"])
def test_nonfinite_input_rejected(case, bad):
    """NaN or infinity in a feature or target raises NonFiniteInput naming it; the state is unchanged."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    model.learn_many(events[:10], targets[:10])
    before = model.digest
    rest = copy.deepcopy(events[10:])
    rest[3]["ambient_c"] = bad
    with pytest.raises(models.NonFiniteInput) as err:
        model.learn_many(rest, targets[10:])
    assert err.value.where == "[3].features.ambient_c"
    with pytest.raises(models.NonFiniteInput) as err:
        model.learn_one({"load_kg": bad}, 1.0)
    assert err.value.where == "[0].features.load_kg"
    bad_targets = list(targets[10:])
    bad_targets[5] = bad
    with pytest.raises(models.NonFiniteInput) as err:
        model.learn_many(events[10:], bad_targets)
    assert err.value.where == "[5].target"
    if spec.task == "binary":
        with pytest.raises(models.InvalidInput) as err:
            model.learn_many(events[10:13], [0.0, 1.0, 0.5])
        assert err.value.where == "[2].target"
    assert model.digest == before


def test_corrupt_or_truncated_snapshot_rejected(case):
    """Every truncation and every flipped byte tried raises SnapshotError, not another error."""
    spec, events, targets = case
    model = models.LinearModel(spec)
    model.learn_many(events, targets)
    blob = model.to_bytes()
    for cut in (0, 5, 40, len(blob) // 2, len(blob) - 33, len(blob) - 1):
        with pytest.raises(models.SnapshotError):
            models.LinearModel.from_bytes(blob[:cut])
    for pos in (0, 20, 30, len(blob) // 3, len(blob) // 2, len(blob) - 40, len(blob) - 1):
        broken = bytearray(blob)
        broken[pos] ^= 0x20
        with pytest.raises(models.SnapshotError):
            models.LinearModel.from_bytes(bytes(broken))
    with pytest.raises(models.SnapshotError):
        models.LinearModel.from_bytes(blob + b"\x00")


def test_huge_values_keep_the_state_finite(case):
    """A finite but huge feature value (1e300) never makes the state non-finite, nor stops learning.

    Every learning event is either applied or refused (``n_updates + refused`` counts them all),
    every number of the serialized state stays finite, and learning ordinary events afterwards
    still moves the iterate.
    """
    spec, events, targets = case
    model = models.LinearModel(spec)
    model.learn_many(events[:20], targets[:20])
    huge = copy.deepcopy(events[20:26])
    for e in huge:
        e["load_kg"] = 1e300
    model.learn_many(huge, targets[20:26])
    for name, values in _state_arrays(model).items():
        assert np.all(np.isfinite(values)), name
    assert model.n_updates + model.refused == 26
    before = model.weights("raw")
    model.learn_many(events[26:], targets[26:])
    assert model.n_updates + model.refused == N_EVENTS
    assert model.last_step > 0.0
    assert not np.array_equal(model.weights("raw")[0], before[0])
    for name, values in _state_arrays(model).items():
        assert np.all(np.isfinite(values)), name


# ------------------------------------------------------------------- settings the suite skips

@pytest.mark.parametrize("rule", ["horizon", "anytime", "strongly_convex"])
def test_radius_rules_need_a_bounded_set(rule):
    """The skipped cases of the suite are refused at construction, naming the setting."""
    with pytest.raises(models.InvalidSettings) as err:
        spec_for("squared", "none", rule, "uniform", "lazy")
    assert err.value.where == "steps.rule"


def test_strongly_convex_rule_needs_l2():
    with pytest.raises(models.InvalidSettings) as err:
        spec_for("squared", "ball", "strongly_convex", "uniform", "lazy", l2=0.0)
    assert err.value.where == "steps.rule"


# ----------------------------------------------------------------------------- refused updates

@pytest.mark.parametrize("kernel", KERNELS)
@pytest.mark.parametrize("loss", LOSSES)
def test_refused_update_is_counted_and_changes_nothing(loss, kernel):
    """With no constraint and a large constant step, an event with a 1e300 feature overflows.

    The update is refused (outcome code 2, counted in ``refused``), both iterates stay bit for bit
    what they were, and the whole state stays finite.
    """
    spec = spec_for(loss, "none", "constant", "uniform", kernel, scaling="none", base=1e3)
    events, targets = fleet_events(12, seed=3, binary=loss == "logistic")
    model = models.LinearModel(spec)
    model.learn_many(events[:10], targets[:10])
    raw, avg, updates = model.weights("raw"), model.weights("averaged"), model.n_updates
    huge = dict(events[10], door_open_s=1e300)
    target = 0.0 if model.score_one(huge, "raw") > 0.5 else 1.0
    out = model.learn_many([huge], [target if loss == "logistic" else 1e3])
    assert out.code[0] == 2
    assert model.refused == 1 and model.n_updates == updates
    for (w, b), (w0, b0) in ((model.weights("raw"), raw), (model.weights("averaged"), avg)):
        assert np.array_equal(w, w0) and b == b0
    for name, values in _state_arrays(model).items():
        assert np.all(np.isfinite(values)), name


@pytest.mark.parametrize("kernel", KERNELS)
def test_refused_full_shrink_keeps_the_iterate(kernel):
    """A refused update whose l2 shrink is total (``eta * l2 >= 1``) still changes nothing.

    The strongly convex rule's first step after a restart is ``eta = 2 / (2 l2)``, so the shrink
    factor ``1 - eta l2`` is 0; with a 1e300 feature the update overflows and is refused, and the raw
    iterate must stay what it was (the lazy kernel must not zero it before knowing).
    """
    spec = spec_for("squared", "ball", "strongly_convex", "uniform", kernel, scaling="none", radius=1e9)
    events, targets = fleet_events(21, seed=3, binary=False)
    model = models.LinearModel(spec)
    model.learn_many(events[:20], targets[:20])
    model.restart()
    raw = model.weights("raw")
    assert np.any(raw[0]) and raw[1] != 0.0
    out = model.learn_many([dict(events[20], door_open_s=1e300)], [1e3])
    assert out.code[0] == 2 and model.refused == 1
    w, b = model.weights("raw")
    assert np.array_equal(w, raw[0]) and b == raw[1]


# ---------------------------------------------------------------------------- gradient checks

def _margin_grid(loss):
    margins = np.linspace(-6.0, 6.0, 61) + 0.013
    targets = (0.0, 1.0) if loss == "logistic" else (-1.3, 0.0, 2.5)
    return margins, targets


@pytest.mark.parametrize("loss", LOSSES)
def test_loss_values_match_reference_libraries(loss):
    """loss_value equals scipy/scikit-learn: huber is ``scipy.special.huber``, logistic is the log
    loss of ``sklearn.metrics.log_loss`` per event, squared is half the squared error."""
    margins, targets = _margin_grid(loss)
    for y in targets:
        ours = loss_value(loss, margins, y, delta=1.0)
        if loss == "huber":
            ref = scipy.special.huber(1.0, margins - y)
        elif loss == "logistic":
            p = scipy.special.expit(margins)
            ref = np.array([log_loss([y], [[1 - q, q]], labels=[0, 1]) for q in p])
        else:
            ref = 0.5 * (margins - y) ** 2
        np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("loss", LOSSES)
def test_loss_derivative_matches_finite_differences(loss):
    """loss_derivative equals the central difference of loss_value (h = 1e-6, error O(h^2))."""
    margins, targets = _margin_grid(loss)
    h = 1e-6
    for y in targets:
        fd = (loss_value(loss, margins + h, y) - loss_value(loss, margins - h, y)) / (2 * h)
        np.testing.assert_allclose(loss_derivative(loss, margins, y), fd, rtol=0, atol=1e-7)


# ------------------------------------------------------------------------------- determinism

def determinism_digests() -> list[str]:
    """Digests of a fixed set of learning runs; the same in every process (used by a subprocess)."""
    digests = []
    for loss, cons, rule, avg, kernel in (("squared", "ball", "anytime", "uniform", "lazy"),
                                          ("huber", "box", "sqrt_decay", "exponential", "dense"),
                                          ("logistic", "ball", "horizon", "weighted", "lazy"),
                                          ("squared", "box", "strongly_convex", "weighted", "dense")):
        model = models.LinearModel(spec_for(loss, cons, rule, avg, kernel))
        events, targets = fleet_events(N_EVENTS, seed=13, binary=loss == "logistic")
        model.learn_many(events, targets)
        digests.append(model.digest)
    return digests


def test_digests_are_equal_across_processes():
    """A fresh interpreter with another hash seed reproduces every digest (no salted hash, no clock)."""
    code = ("import json; from tests.models.test_contracts import determinism_digests; "
            "print(json.dumps(determinism_digests()))")
    env = dict(os.environ, PYTHONHASHSEED="12345")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True,
                          timeout=240, check=True)
    theirs = json.loads(done.stdout.strip().splitlines()[-1])
    assert theirs == determinism_digests()


def test_stable_hash64_is_little_endian_blake2b():
    """stable_hash64 is BLAKE2b with an 8-byte digest read little-endian (Python's hashlib as reference)."""
    for text in ("van\x1fV07", "route\x1furban", "", "van\x1fKühlwagen-7"):
        ref = int.from_bytes(hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest(), "little")
        assert models.stable_hash64(text) == ref
