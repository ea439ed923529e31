"""Property tests of the Euclidean projections and of the feasibility of the compiled kernels' iterates.

The four properties are the ones the convergence proofs of projected SGD use (S. Bubeck, "Convex
Optimization: Algorithms and Complexity", Foundations and Trends in Machine Learning, 2015,
Lemma 3.1): for a closed convex set ``X`` and its projection ``P``, ``P(v)`` lies in ``X``,
``P(P(v)) = P(v)``, ``<v - P(v), y - P(v)> <= 0`` for every ``y`` in ``X`` (Lemma 3.1 (i)), and
``||P(u) - P(v)|| <= ||u - v||`` (non-expansiveness, a consequence of (i) written out in the same
section).

Each hypothesis example draws a batch of 5-8 vectors of one dimension (1-48) at one scale
(``10**-6 .. 10**6``), so every one of the 12 property tests (3 sets x 4 properties) checks at least
1,250 vectors and the module at least 15,000; each test asserts its own count.

Tolerances: floating point rounding of a sum of products grows with the size of its factors, so the
slack of the inequality is ``1e-10 * max(1, |v - P(v)| |y - P(v)|)`` and that of non-expansiveness
``1e-12 * max(1, |u|, |v|)``; at unit scale both are the plain ``1e-10`` and ``1e-12`` (a common
choice, no source). Feasibility of a ball projection allows ``radius * (1 + 1e-12)``: the scaled
vector's norm is the radius up to a few rounding errors.
"""

from __future__ import annotations

import itertools

import hypothesis.extra.numpy as hnp
import hypothesis.strategies as st
import numpy as np
import pytest
from hypothesis import given, settings

import models
from models.constraints import project

KINDS = ("ball", "box", "none")
EXAMPLES = 250
MIN_BATCH = 5
MIN_VECTORS_PER_TEST = EXAMPLES * MIN_BATCH
PROPERTY = settings(max_examples=EXAMPLES, deadline=None)

_unit = st.floats(-1.0, 1.0, allow_nan=False, allow_infinity=False, width=64)


@st.composite
def problems(draw, kind):
    """A set of kind ``kind`` with random parameters, a batch ``V`` of vectors and feasible ``Y``."""
    d = draw(st.integers(1, 48))
    n = draw(st.integers(MIN_BATCH, 8))
    scale = 10.0 ** draw(st.integers(-6, 6))
    v = draw(hnp.arrays(np.float64, (n, d), elements=_unit)) * scale
    z = draw(hnp.arrays(np.float64, (n, d), elements=_unit))
    if kind == "ball":
        params = {"radius": draw(st.floats(1e-3, 1e3))}
        t = draw(hnp.arrays(np.float64, n, elements=st.floats(0.0, 1.0)))
        norms = np.sqrt(np.einsum("ij,ij->i", z, z))
        # strictly inside by 1e-12 relative: a point that rounding puts one ulp outside is not feasible
        factor = np.divide(params["radius"] * (1.0 - 1e-12) * t, norms, out=np.zeros(n), where=norms > 0)
        y = z * factor[:, None]
    elif kind == "box":
        lo, hi = draw(st.floats(0.0, 1e3)), draw(st.floats(0.0, 1e3))
        if lo + hi == 0.0:
            hi = 1.0
        params = {"lower": -lo, "upper": hi}
        # the affine map can round one ulp past a bound; clamping (exact) keeps y feasible
        y = np.minimum(np.maximum(-lo + (hi + lo) * (z + 1.0) / 2.0, -lo), hi)
    else:
        params = {}
        y = z * scale
    return params, v, y


def _p(v, kind, params):
    """Project with the module function and check the method of :class:`Constraint` agrees bitwise."""
    out = project(v, kind, **params)
    same = models.Constraint(kind, **params).project(v)
    assert np.array_equal(out, same)
    assert out is not v
    return out


def _feasible(x, kind, params):
    if kind == "ball":
        return float(np.linalg.norm(x)) <= params["radius"] * (1.0 + 1e-12)
    if kind == "box":
        return bool(np.all(x >= params["lower"]) and np.all(x <= params["upper"]))
    return bool(np.all(np.isfinite(x)))


def _run(kind, check):
    """Run ``check(params, V, Y)`` over hypothesis examples; return how many vectors it saw."""
    seen = []

    @PROPERTY
    @given(problems(kind))
    def inner(problem):
        params, v, y = problem
        check(kind, params, v, y)
        seen.append(v.shape[0])

    inner()
    return sum(seen)


def _check_feasible(kind, params, v, y):
    for x in v:
        p = _p(x, kind, params)
        assert _feasible(p, kind, params), (x, p)
        if kind == "none" or (kind == "box" and _feasible(x, kind, params)):
            assert np.array_equal(p, x)


def _check_idempotent(kind, params, v, y):
    for x in v:
        p = _p(x, kind, params)
        pp = _p(p, kind, params)
        if kind == "ball":
            # a second scaling by radius/||p|| = 1 - O(eps) may move p by a few ulps
            np.testing.assert_allclose(pp, p, rtol=1e-14, atol=0.0)
        else:
            assert np.array_equal(pp, p)


def _check_inequality(kind, params, v, y):
    projected = np.array([_p(x, kind, params) for x in v])
    # projected points are feasible y too, pulled strictly inside (a ball projection can land one ulp out)
    feasible = np.concatenate([y, projected * (1.0 - 1e-12) if kind == "ball" else projected])
    for x, p in zip(v, projected):
        for f in feasible:
            a, b = x - p, f - p
            slack = 1e-10 * max(1.0, float(np.linalg.norm(a) * np.linalg.norm(b)))
            assert float(np.dot(a, b)) <= slack


def _check_nonexpansive(kind, params, v, y):
    vectors = np.concatenate([v, y])
    projected = [_p(x, kind, params) for x in vectors]
    for i, j in itertools.combinations(range(len(vectors)), 2):
        slack = 1e-12 * max(1.0, float(np.linalg.norm(vectors[i])), float(np.linalg.norm(vectors[j])))
        assert np.linalg.norm(projected[i] - projected[j]) <= np.linalg.norm(vectors[i] - vectors[j]) + slack


@pytest.mark.parametrize("kind", KINDS)
def test_projection_is_feasible(kind):
    """``P(v)`` is in the set (Bubeck 2015, Lemma 3.1 setting); points of a box or R^d stay put."""
    assert _run(kind, _check_feasible) >= MIN_VECTORS_PER_TEST


@pytest.mark.parametrize("kind", KINDS)
def test_projection_is_idempotent(kind):
    """``P(P(v)) = P(v)``: a projected point is already in the set."""
    assert _run(kind, _check_idempotent) >= MIN_VECTORS_PER_TEST


@pytest.mark.parametrize("kind", KINDS)
def test_projection_inequality(kind):
    """``<v - P(v), y - P(v)> <= 0`` for feasible ``y`` (S. Bubeck, 2015, Lemma 3.1 (i))."""
    assert _run(kind, _check_inequality) >= MIN_VECTORS_PER_TEST


@pytest.mark.parametrize("kind", KINDS)
def test_projection_is_nonexpansive(kind):
    """``||P(u) - P(v)|| <= ||u - v||`` (S. Bubeck, 2015, consequence of Lemma 3.1 (i))."""
    assert _run(kind, _check_nonexpansive) >= MIN_VECTORS_PER_TEST


def test_ball_projection_matches_closed_form():
    """A point outside the ball lands on the boundary along its own direction (3-4-5 triangle)."""
    p = project(np.array([3.0, 4.0]), "ball", radius=1.0)
    np.testing.assert_allclose(p, [0.6, 0.8], rtol=1e-15)


# ---------------------------------------------------------------------- the kernels' iterates

RADIUS, LOWER, UPPER = 0.7, -0.3, 0.5
KERNEL_CASES = [
    pytest.param(cons, kernel, rule, l2, id=f"{cons}-{kernel}-{rule}-l2={l2}")
    for cons, kernel in itertools.product(("ball", "box"), ("lazy", "dense"))
    for rule, l2 in (("constant", 0.0), ("constant", 0.3), ("anytime", 0.0), ("strongly_convex", 0.3))
]


@pytest.mark.parametrize(("constraint", "kernel", "rule", "l2"), KERNEL_CASES)
def test_kernel_iterates_stay_feasible(constraint, kernel, rule, l2):
    """The raw and averaged iterates (intercept included) stay in the set after every chunk.

    The targets (sd 20 around 10) and features are far larger than the set allows, and the
    constant step is large (3.0) and ``G`` is fixed at 1 so that the anytime step ``R / sqrt(t)`` is
    large too: almost every update has to be projected. The averaged
    iterate is a convex combination of feasible points, hence feasible up to rounding. The box
    check allows ``1e-12`` relative slack: the lazy kernel stores ``w = a * v`` and ``a * (bound /
    a)`` can miss the bound by one ulp.
    """
    rng = np.random.default_rng(11)
    model = models.LinearModel(numeric=["ambient_c", "door_open_s"], categorical=["van", "route"], hash_bits=4,
                               scaling="none", constraint=constraint, radius=RADIUS, lower=LOWER, upper=UPPER,
                               rule=rule, base=3.0, grad_bound=1.0, l2=l2, kernel=kernel)
    projected = 0
    for _ in range(30):
        events = [{"ambient_c": rng.normal() * 5, "door_open_s": rng.normal() * 50,
                   "van": f"V{rng.integers(1, 25):02d}", "route": str(rng.integers(3))} for _ in range(40)]
        model.learn_many(events, rng.normal(size=40) * 20 + 10)
        for iterate in ("raw", "averaged"):
            w, b = model.weights(iterate)
            full = np.append(w, b)
            assert np.all(np.isfinite(full))
            if constraint == "ball":
                norm = float(np.linalg.norm(full))
                assert norm <= RADIUS * (1.0 + 1e-12)
                projected += norm > RADIUS * 0.999
            else:
                assert np.all(full <= UPPER * (1.0 + 1e-12)) and np.all(full >= LOWER * (1.0 + 1e-12))
                projected += bool(np.any(full >= UPPER * 0.999) or np.any(full <= LOWER * 0.999))
    assert model.refused == 0 and model.n_updates == 1200
    # the constraint was active: otherwise the test would not exercise the projection at all
    assert projected > 0
