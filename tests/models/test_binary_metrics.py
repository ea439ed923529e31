"""Binary metrics against scikit-learn's ``sklearn.metrics`` (``accuracy_score``, ``roc_auc_score``,
``brier_score_loss``, ``log_loss``) on the same labels and predictions."""

from __future__ import annotations

import re

import numpy as np
import pytest
from sklearn import metrics as skm

from models.binary_metrics import RunningBinaryMetrics, binary_metrics, roc_auc


def _cases():
    rng = np.random.default_rng(20261204)
    y = rng.integers(0, 2, 500)
    p = 1.0 / (1.0 + np.exp(-(1.5 * y - 0.75 + rng.normal(size=500))))
    yield "continuous", y, p
    # a coarse grid makes many tied scores, across both classes
    yield "many_ties", y, np.round(p, 1)
    yield "all_tied", y, np.full(500, 0.3)
    # exact 0 and 1 exercise the log-loss clipping, exact 0.5 the threshold
    edge = np.r_[np.zeros(5), np.ones(5), np.full(6, 0.5), rng.uniform(size=20)]
    yield "edges", rng.integers(0, 2, len(edge)), edge
    yield "rare_positives", (rng.uniform(size=400) < 0.03).astype(int), rng.uniform(size=400)


CASES = list(_cases())


@pytest.mark.parametrize(("name", "y", "p"), CASES, ids=[c[0] for c in CASES])
def test_binary_metrics_agree_with_sklearn(name, y, p):
    """Each figure equals scikit-learn's on the same predictions (accuracy: the predictions
    thresholded at 0.5, with 0.5 itself predicting 1)."""
    m = binary_metrics(y, p)
    assert m.count == len(y) and m.positives == int(y.sum())
    assert m.accuracy == pytest.approx(skm.accuracy_score(y, (p >= 0.5).astype(int)), abs=1e-15)
    assert m.roc_auc == pytest.approx(skm.roc_auc_score(y, p), abs=1e-12)
    assert m.brier == pytest.approx(skm.brier_score_loss(y, p), abs=1e-12)
    assert m.log_loss == pytest.approx(skm.log_loss(y, p, labels=[0, 1]), rel=1e-12)
    assert m.base_rate == pytest.approx(float(np.mean(y)), abs=1e-15)


def test_auc_of_margins_equals_auc_of_probabilities():
    """The AUC depends on the order of the scores only (scikit-learn ``roc_auc_score`` on margins)."""
    y, p = CASES[0][1], CASES[0][2]
    margins = np.log(p / (1.0 - p))
    assert roc_auc(y, margins) == pytest.approx(skm.roc_auc_score(y, margins), abs=1e-12)
    assert roc_auc(y, margins) == pytest.approx(roc_auc(y, p), abs=1e-12)


def test_one_class_and_empty_sets_have_no_auc():
    assert binary_metrics([1, 1, 1], [0.2, 0.7, 0.9]).roc_auc is None
    empty = binary_metrics([], [])
    assert empty.count == 0 and empty.accuracy is None and empty.log_loss is None


@pytest.mark.parametrize(("labels", "probs", "where"), [
    ([0, 2], [0.1, 0.2], "labels[1]"),
    ([0, 1], [0.1, 1.5], "probabilities[1]"),
    ([0, 1], [np.nan, 0.5], "probabilities[0]"),
    ([0, 1, 1], [0.1, 0.5], "2 predictions"),
], ids=["label_not_binary", "probability_above_one", "probability_nan", "lengths_differ"])
def test_bad_input_is_refused_naming_where(labels, probs, where):
    with pytest.raises(ValueError, match=re.escape(where)):
        binary_metrics(labels, probs)


@pytest.mark.parametrize(("name", "y", "p"), CASES, ids=[c[0] for c in CASES])
def test_running_metrics_match_sklearn_on_the_grid(name, y, p):
    """Accumulated in uneven chunks, the running figures equal scikit-learn's; its AUC equals
    ``roc_auc_score`` of the probabilities rounded down to the 1024-cell grid."""
    run = RunningBinaryMetrics()
    for chunk in np.array_split(np.arange(len(y)), 7):
        run.update(y[chunk], p[chunk])
    m = run.result()
    grid = np.minimum(np.floor(p * 1024), 1023)
    assert m.count == len(y)
    assert m.accuracy == pytest.approx(skm.accuracy_score(y, (p >= 0.5).astype(int)), abs=1e-15)
    if len(set(y)) == 2:
        assert m.roc_auc == pytest.approx(skm.roc_auc_score(y, grid), abs=1e-12)
    assert m.brier == pytest.approx(skm.brier_score_loss(y, p), rel=1e-12)
    assert m.log_loss == pytest.approx(skm.log_loss(y, p, labels=[0, 1]), rel=1e-12)
    assert m.base_rate == pytest.approx(float(np.mean(y)), abs=1e-15)


def test_running_state_round_trips():
    y, p = CASES[1][1], CASES[1][2]
    run = RunningBinaryMetrics()
    run.update(y[:200], p[:200])
    again = RunningBinaryMetrics()
    again.load_state(run.state())
    run.update(y[200:], p[200:])
    again.update(y[200:], p[200:])
    assert again.result() == run.result()
