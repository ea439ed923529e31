"""The lazy kernel agrees with the dense (textbook) kernel, each is deterministic on its own, and an
update is the gradient step of the objective (central finite differences as the reference).

The two kernels run the same algorithm in two representations (``models/kernels.py``): the dense
one keeps ``w`` and the average explicitly, the lazy one keeps ``w = a * v`` and the weighted sum of
iterates as ``U + A v`` (W. Xu, 2011, "Towards optimal one pass large scale learning with averaged
stochastic gradient descent", sec. 5). Rounding differs, so the comparison is to a tolerance:
``1e-9`` times the largest absolute coefficient (intercept included) of the dense iterate; on these
configurations the largest gap measured when this test was written was 5e-12 (the tolerance is
common practice, no source).

Well-conditioned means: standardized numeric features (warm-up scaling), a ball of radius 5 or a box
``[-2, 2]``, so that no step is huge compared with the curvature. Outside that regime the *reference
itself* is chaotic, not just the comparison: with huber loss, a ball of radius 50 and the anytime
rule, the first steps ``R / (G sqrt t)`` throw the residual back and forth across the clip point
``|r| = delta``, and a relative change of 1e-15 of the targets alone moved the dense kernel's final
iterate by 30% (measured when this test was written). Such configurations are left out here; they
are not a disagreement between the kernels.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

import models
from models import kernels as K
from models.losses import loss_value

TOL = 1e-9
LOSSES = ("squared", "huber", "logistic")
CONSTRAINTS = ("ball", "box", "none")
RULES = ("constant", "sqrt_decay", "horizon", "anytime", "strongly_convex")
AVERAGINGS = ("uniform", "weighted", "exponential")
N_EVENTS = 3000


def telemetry(n: int, seed: int, binary: bool):
    """Invented van telemetry with four numeric features on very different scales and two categoricals."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 4)) * [3.0, 10.0, 0.5, 100.0] + [5.0, 0.0, 1.0, 500.0]
    vans = rng.integers(1, 13, n)
    routes = rng.integers(0, 3, n)
    events = [{"ambient_c": x[i, 0], "door_open_s": x[i, 1], "compressor_duty": x[i, 2], "load_kg": x[i, 3],
               "van": f"V{vans[i]:02d}", "route": ("urban", "regional", "linehaul")[routes[i]]} for i in range(n)]
    margin = 0.3 * x[:, 0] - 0.1 * x[:, 1] + 2.0 * x[:, 2] + 0.004 * x[:, 3] + 0.5 * (vans % 3) - 1.0
    if binary:
        return events, (rng.random(n) < 1.0 / (1.0 + np.exp(-margin))).astype(float)
    return events, margin + rng.normal(size=n) * 0.5


def _spec(loss, constraint, rule, averaging, kernel, l2, **extra):
    settings = dict(numeric=("ambient_c", "door_open_s", "compressor_duty", "load_kg"), categorical=("van", "route"),
                    hash_bits=5, warmup_events=50, task="binary" if loss == "logistic" else "regression", loss=loss,
                    l2=l2, constraint=constraint, radius=5.0, lower=-2.0, upper=2.0, rule=rule, base=0.05,
                    horizon=N_EVENTS, averaging=averaging, halflife=300.0, kernel=kernel)
    settings.update(extra)
    return models.ModelSpec(**settings)


def _agreement_cases():
    for loss, cons, rule, avg in itertools.product(LOSSES, CONSTRAINTS, RULES, AVERAGINGS):
        if cons == "none" and rule in ("horizon", "anytime", "strongly_convex"):
            continue  # refused by ModelSpec: these rules need a bounded set (its radius, or a projection)
        for l2 in ((0.5,) if rule == "strongly_convex" else (0.0, 0.01)):
            yield pytest.param(loss, cons, rule, avg, l2, id=f"{loss}-{cons}-{rule}-l2={l2}-{avg}")


def _gap(lazy, dense, iterate):
    """Largest coefficient difference relative to the largest dense coefficient (intercepts included)."""
    wl, bl = lazy.weights(iterate)
    wd, bd = dense.weights(iterate)
    scale = max(float(np.abs(wd).max()), abs(bd))
    assert scale > 0.0
    return max(float(np.abs(wl - wd).max()), abs(bl - bd)) / scale


@pytest.mark.parametrize(("loss", "constraint", "rule", "averaging", "l2"), list(_agreement_cases()))
def test_lazy_agrees_with_dense(loss, constraint, rule, averaging, l2):
    """Raw and averaged iterates and the served predictions agree to 1e-9 relative, along the way."""
    events, targets = telemetry(N_EVENTS, seed=0, binary=loss == "logistic")
    lazy = models.LinearModel(_spec(loss, constraint, rule, averaging, "lazy", l2))
    dense = models.LinearModel(_spec(loss, constraint, rule, averaging, "dense", l2))
    for lo, hi in ((0, 500), (500, 1700), (1700, N_EVENTS)):
        pl = lazy.learn_many(events[lo:hi], targets[lo:hi], serve="averaged").pred
        pd = dense.learn_many(events[lo:hi], targets[lo:hi], serve="averaged").pred
        for iterate in models.ITERATES:
            assert _gap(lazy, dense, iterate) <= TOL, (hi, iterate)
        assert float(np.abs(pl - pd).max()) <= TOL * max(1.0, float(np.abs(pd).max()))
    assert lazy.n_updates == dense.n_updates == N_EVENTS
    assert lazy.refused == dense.refused == 0


@pytest.mark.parametrize("kernel", ["lazy", "dense"])
@pytest.mark.parametrize(("loss", "rule", "averaging"), [("squared", "anytime", "uniform"),
                                                         ("huber", "strongly_convex", "weighted"),
                                                         ("logistic", "sqrt_decay", "exponential")])
def test_each_kernel_is_deterministic(kernel, loss, rule, averaging):
    """Two runs of one kernel on the same events end bit-identical (equal digests)."""
    events, targets = telemetry(1000, seed=4, binary=loss == "logistic")
    l2 = 0.5 if rule == "strongly_convex" else 0.01
    digests = set()
    for _ in range(2):
        model = models.LinearModel(_spec(loss, "ball", rule, averaging, kernel, l2))
        model.learn_many(events, targets)
        digests.add(model.digest)
    assert len(digests) == 1


def test_agreement_without_intercept():
    """The ball projection without an intercept coordinate agrees as well."""
    events, targets = telemetry(N_EVENTS, seed=1, binary=False)
    models_ = [models.LinearModel(_spec("squared", "ball", "anytime", "uniform", k, 0.01, fit_intercept=False))
               for k in ("lazy", "dense")]
    for m in models_:
        m.learn_many(events, targets)
    for iterate in models.ITERATES:
        assert _gap(*models_, iterate) <= TOL
    assert models_[0].weights("raw")[1] == 0.0


# ------------------------------------------------------------------ updates are gradient steps

def _fd_gradient(objective, theta, h=1e-6):
    """Central differences, error O(h^2) for smooth objectives."""
    grad = np.zeros_like(theta)
    for j in range(theta.shape[0]):
        e = np.zeros_like(theta)
        e[j] = h
        grad[j] = (objective(theta + e) - objective(theta - e)) / (2 * h)
    return grad


def _dense_x(model, event):
    """The event's feature vector in model coordinates, with a trailing 1 for the intercept."""
    rows = model.rows([event])
    x = np.zeros(model.dim + 1)
    np.add.at(x, rows.indices, rows.values)
    x[-1] = 1.0
    return x


PROBES = [{"ambient_c": 1.2, "door_open_s": 0.5, "compressor_duty": 0.3, "load_kg": -0.2, "van": "V07",
           "route": "urban"},
          {"ambient_c": -0.4, "door_open_s": 0.9, "compressor_duty": -0.6, "load_kg": 0.1, "van": "V19",
           "route": "linehaul"}]


@pytest.mark.parametrize("kernel", ["lazy", "dense"])
@pytest.mark.parametrize("loss", LOSSES)
def test_updates_are_gradient_steps(loss, kernel):
    """The first update from 0 is ``-eta * grad f``, the second (with l2) ``theta - eta * grad f``.

    ``f`` is the event's loss plus ``l2/2 ||theta||^2`` (the intercept included), its gradient taken
    by central differences of :func:`models.losses.loss_value`; scaling none, no constraint and a
    constant step ``eta``, so nothing but the gradient step acts. The feature values are moderate,
    which keeps huber's residuals away from the clip point where the loss is not twice smooth.
    """
    eta, l2 = 0.1, 0.3
    targets = (1.0, 0.0) if loss == "logistic" else (0.7, 2.5)
    for penalty, n_steps in ((0.0, 1), (l2, 2)):
        model = models.LinearModel(_spec(loss, "none", "constant", "uniform", kernel, penalty, scaling="none",
                                         base=eta, hash_bits=4))
        theta = np.zeros(model.dim + 1)
        for event, y in list(zip(PROBES, targets))[:n_steps]:
            x = _dense_x(model, event)

            def objective(t, x=x, y=y):
                return float(loss_value(loss, t @ x, y)) + 0.5 * penalty * float(t @ t)

            expected = theta - eta * _fd_gradient(objective, theta)
            model.learn_one(event, y)
            w, b = model.weights("raw")
            theta = np.append(w, b)
            np.testing.assert_allclose(theta, expected, rtol=0, atol=1e-8)
            assert np.count_nonzero(theta) > 1


@pytest.mark.parametrize("kernel", ["lazy", "dense"])
@pytest.mark.parametrize("loss", LOSSES)
def test_kernel_loss_matches_reference(loss, kernel):
    """The compiled kernel's copy of the loss (held-out mode 2) equals loss_value at the same margin."""
    events, targets = telemetry(600, seed=9, binary=loss == "logistic")
    model = models.LinearModel(_spec(loss, "ball", "anytime", "uniform", kernel, 0.0))
    model.learn_many(events[:400], targets[:400])
    rows, y = model.rows(events[400:]), model.check_targets(targets[400:])
    out = models.Outcome.empty(len(y))
    before = model.digest
    model.process(rows, y, np.full(len(y), 2, np.int8), out, serve="raw")
    assert model.digest == before
    margins = model.score_rows(rows, "raw")
    np.testing.assert_allclose(out.loss, loss_value(loss, margins, y), rtol=1e-12, atol=1e-15)


# ------------------------------------------------------------------------- the long lazy run

LONG_EVENTS = 200_000
CHUNK = 2_000
ACTIVE = 8
DENSE_BITS, LAZY_BITS = 8, 16


def _sparse_stream(seed: int):
    """Rows with 8 distinct random buckets out of 256 and a target no point of the unit ball fits."""
    rng = np.random.default_rng(seed)
    idx = np.argsort(rng.random((LONG_EVENTS, 1 << DENSE_BITS)), axis=1)[:, :ACTIVE].astype(np.int64)
    idx.sort(axis=1)
    values = rng.normal(size=(LONG_EVENTS, ACTIVE))
    truth = rng.normal(size=1 << DENSE_BITS) * 3.0
    y = np.einsum("ij,ij->i", truth[idx], values) + 2.0 + rng.normal(size=LONG_EVENTS) * 0.5
    indptr = np.arange(0, LONG_EVENTS * ACTIVE + 1, ACTIVE, dtype=np.int64)
    return models.Rows(indptr, idx.reshape(-1), values.reshape(-1)), y


@pytest.mark.parametrize(("averaging", "halflife"), [("uniform", 5000.0), ("exponential", 400.0)])
def test_long_lazy_run_with_rebases_agrees_with_dense(averaging, halflife):
    """200,000 events, 2**16 buckets, l2 > 0 and the unit ball active: lazy stays within 1e-9 of dense.

    The lazy scale ``a`` shrinks by ``(1 - eta l2)`` and by every ball projection, so the state must be
    rebased (``a`` folded into ``v``) many times; the test sees ``a`` fall below 1e-3 and jump back up
    between two observations that no periodic norm refresh explains. The dense reference uses 2**8
    buckets (speed); the events only use those, and the lazy model's other 65,280 coordinates must
    stay exactly 0. With ``halflife=400`` the exponential weights pass 1e150 and are renormalized
    once (2**(200000/400) = 2**500).
    """
    rows, y = _sparse_stream(seed=21)
    common = dict(categorical=("cell",), scaling="none", loss="squared", l2=0.05, constraint="ball", radius=1.0,
                  rule="constant", base=0.02, averaging=averaging, halflife=halflife)
    lazy = models.LinearModel(hash_bits=LAZY_BITS, kernel="lazy", **common)
    dense = models.LinearModel(hash_bits=DENSE_BITS, kernel="dense", **common)
    mode = np.ones(LONG_EVENTS, np.int8)
    out_l, out_d = models.Outcome.empty(LONG_EVENTS), models.Outcome.empty(LONG_EVENTS)
    scales, norms, unexplained_rebases, worst = [], [], 0, 0.0
    for start in range(0, LONG_EVENTS, CHUNK):
        stop = start + CHUNK
        lazy.process(rows, y, mode, out_l, serve="raw", start=start, stop=stop)
        dense.process(rows, y, mode, out_d, serve="raw", start=start, stop=stop)
        scale = float(lazy._sc[K.S_A])
        refreshed = (start // K.NORM_REFRESH) != (stop // K.NORM_REFRESH)
        if scales and scale > scales[-1] and not refreshed:
            unexplained_rebases += 1
        scales.append(scale)
        norms.append(lazy.norm("raw"))
        if stop % 20_000 == 0:
            for iterate in models.ITERATES:
                wl, bl = lazy.weights(iterate)
                wd, bd = dense.weights(iterate)
                assert not np.any(wl[1 << DENSE_BITS:])
                ref = max(float(np.abs(wd).max()), abs(bd))
                worst = max(worst, max(float(np.abs(wl[:1 << DENSE_BITS] - wd).max()), abs(bl - bd)) / ref)
    assert worst <= TOL
    # the ball is active: the raw iterate sits on the sphere at most observations, never outside
    assert np.median(norms) > 0.999 and max(norms) <= 1.0 + 1e-12
    assert min(scales) < 1e-3 and unexplained_rebases > 0
    assert lazy.n_updates == dense.n_updates == LONG_EVENTS and lazy.refused == 0
    np.testing.assert_allclose(out_l.pred, out_d.pred, rtol=0, atol=TOL * float(np.abs(out_d.pred).max()))
