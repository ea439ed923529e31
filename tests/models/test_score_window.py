"""The held-out monitor's one compiled pass (``readouts.score_window``) against numpy's own operations.

numpy is the reference: the losses are ``models.losses.loss_value`` of the model's margins
(``LinearModel.score_rows_both``), the reference median is ``np.partition`` of the same regular
sample, the usable mask and the means are numpy's comparisons and sums. Equality is exact, bit for
bit: the monitor's figures (and so its decisions) must not depend on which of the two computed them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from models import LinearModel, Rows
from models.jit import numba
from models import readouts as R
from models.losses import OVERFLOW_LOSS, loss_value


def numpy_figures(model: LinearModel, rows: Rows, y: np.ndarray, n_ref: int, sample_max: int, absurd: float):
    """The same figures with numpy: losses, usable mask, means of the usable losses, reference."""
    spec = model.spec
    with np.errstate(over="ignore", invalid="ignore"):
        losses = loss_value(spec.loss, model.score_rows_both(rows), y, spec.huber_delta)
    sample = losses[1, :n_ref][::max(1, n_ref // sample_max)]
    sample = sample[:len(sample) - 1 + len(sample) % 2]
    reference = float(np.partition(sample, len(sample) // 2)[len(sample) // 2])
    limit = absurd * reference if reference > 0 else math.inf
    with np.errstate(invalid="ignore"):
        usable = (np.minimum(losses[0], losses[1]) <= limit) & (np.abs(losses) <= OVERFLOW_LOSS).all(axis=0)
    kept = losses if usable.all() else losses[:, usable]  # numpy sums the two in different orders
    return losses, usable, kept.sum(axis=1), reference


@pytest.mark.parametrize("loss", ["squared", "huber", "logistic"])
@pytest.mark.parametrize("n_ref,sample_max", [(1, 500), (40, 500), (1900, 500), (2000, 7)])
def test_window_figures_equal_numpys(loss, n_ref, sample_max):
    """Both iterates' losses, the usable events (garbage targets and an overflowing one left out), their
    sums and the reference median are numpy's, exactly."""
    rng = np.random.default_rng([n_ref, sample_max, len(loss)])
    binary = loss == "logistic"
    model = LinearModel(numeric=["a", "b"], categorical=["k"], loss=loss, task="binary" if binary else "regression",
                        scaling="warmup", warmup_events=50)
    feats = [{"a": float(rng.normal()), "b": float(rng.normal() * 5), "k": f"k{rng.integers(0, 40)}"}
             for _ in range(4000)]
    y = np.array([f["a"] - 0.2 * f["b"] for f in feats]) + rng.normal(size=4000)
    y = (y > 0).astype(float) if binary else y
    model.learn_many(feats[:2000], y[:2000])
    rows, yw = model.rows(feats[2000:]), y[2000:].copy()
    if not binary:
        yw[[5, 700, 1500]] = [1e4, -3e3, 1e200]  # garbage targets, one whose loss overflows
    new_from = max(n_ref - 30, 0)  # the rows whose place against the reference is asked for
    losses, usable, sums, n_usable, reference, above, n_above, distance = model.score_window(
        rows, yw, n_ref, sample_max, 30.0, new_from)
    ref_losses, ref_usable, ref_sums, ref_reference = numpy_figures(model, rows, yw, n_ref, sample_max, 30.0)
    assert np.array_equal(losses, ref_losses)
    assert np.array_equal(usable, ref_usable)
    assert reference == ref_reference
    assert n_usable == np.count_nonzero(ref_usable)
    assert np.array_equal(np.array(sums), ref_sums)
    assert binary or not usable[[5, 700, 1500]].any()
    assert np.array_equal(above, (ref_losses[1, new_from:] > ref_reference).astype(np.float64))
    assert n_above == np.count_nonzero(ref_losses[1, new_from:] > ref_reference) and len(above) == 2000 - new_from
    (w_raw, b_raw), (w_avg, b_avg) = model.weights("raw"), model.weights("averaged")
    assert distance == model.distance()  # the same compiled pass
    assert math.isclose(distance, math.sqrt(np.sum((w_raw - w_avg) ** 2) + (b_raw - b_avg) ** 2), rel_tol=1e-9)


@numba.njit
def _kth(a, k):
    return R._kth_smallest(a, k)


def test_selection_equals_numpys_partition():
    """N. Wirth's selection gives ``np.partition(a, k)[k]`` on 5,000 random arrays with ties, infinities
    and NaN (which both order above every number)."""
    rng = np.random.default_rng(11)
    for t in range(5000):
        n = int(rng.integers(1, 60))
        a = np.round(rng.normal(size=n) * (2 if t % 2 else 1e6))
        if t % 3 == 0:
            a[rng.integers(0, n, size=int(rng.integers(1, 4)))] = np.nan
        if t % 5 == 0:
            a[rng.integers(0, n)] = np.inf
        k = int(rng.integers(0, n))
        want, got = np.partition(a, k)[k], _kth(a.copy(), k)
        assert want == got or (np.isnan(want) and np.isnan(got)), (a, k)


@numba.njit
def _row_sums(a):
    return R._numpy_row_sum(a, 0), R._numpy_row_sum(a, 1)


def test_row_sums_equal_numpys():
    """The kernel's sums of a window's losses are numpy's ``losses.sum(axis=1)``, bit for bit, on every
    length up to 300 and 200 longer ones (heavy-tailed values, so the order of the additions shows)."""
    rng = np.random.default_rng(5)
    for n in list(range(1, 301)) + [int(k) for k in rng.integers(301, 20_000, size=200)]:
        losses = np.abs(rng.standard_cauchy((2, n))) * rng.random()
        assert _row_sums(losses) == tuple(losses.sum(axis=1).tolist()), n
