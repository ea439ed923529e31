"""Metrics of probabilities against 0/1 labels: accuracy at 0.5, ROC AUC, Brier score, log loss and
base rate, over a whole set at once (:func:`binary_metrics`) or accumulated event by event
(:class:`RunningBinaryMetrics`).

Plain numpy. The definitions follow scikit-learn's ``sklearn.metrics`` (``accuracy_score`` of the
predictions thresholded at 0.5, ``roc_auc_score``, ``brier_score_loss``, ``log_loss``), and the tests
check them against it on the same predictions:

* accuracy: the share of events where ``p >= 0.5`` equals the label (a probability of exactly 0.5
  predicts 1);
* ROC AUC: the area under the ROC curve by the trapezoidal rule, which is the Mann-Whitney statistic
  with tied scores counted as one half (Hanley and McNeil, "The meaning and use of the area under a
  receiver operating characteristic (ROC) curve", Radiology, 1982); undefined (``None``) when the
  labels hold one class only;
* Brier score: the mean of ``(p - y)**2`` (Brier, "Verification of forecasts expressed in terms of
  probability", Monthly Weather Review, 1950);
* log loss: the mean of ``-(y log p + (1 - y) log(1 - p))`` with ``p`` clipped to
  ``[eps, 1 - eps]``, ``eps`` the float64 machine epsilon (as scikit-learn clips);
* base rate: the share of labels equal to 1.

Examples
--------
>>> m = binary_metrics([0, 0, 1, 1], [0.1, 0.6, 0.4, 0.9])
>>> m.accuracy, m.roc_auc, m.base_rate
(0.5, 0.75, 0.5)
>>> round(m.brier, 4)
0.185
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

__all__ = ["LOG_LOSS_EPS", "BinaryMetrics", "RunningBinaryMetrics", "binary_metrics", "roc_auc"]

#: probabilities are clipped to ``[LOG_LOSS_EPS, 1 - LOG_LOSS_EPS]`` for the log loss only
LOG_LOSS_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True)
class BinaryMetrics:
    """Binary metrics of a set of events (every figure ``None`` for an empty set; ``roc_auc`` also
    ``None`` when the labels hold one class only)."""

    count: int
    positives: int
    accuracy: float | None
    roc_auc: float | None
    brier: float | None
    log_loss: float | None
    base_rate: float | None

    def to_dict(self) -> dict:
        """The fields as a plain dict (for JSON)."""
        return asdict(self)


def roc_auc(labels, scores) -> float | None:
    """Area under the ROC curve of ``scores`` against 0/1 ``labels``, ties counted as one half.

    Any monotone score (a probability, a margin) gives the same value. ``None`` when the labels hold
    one class only (scikit-learn raises there).
    """
    y = _labels(labels)
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    _same_length(y, s)
    pos = int(np.count_nonzero(y))
    neg = len(y) - pos
    if pos == 0 or neg == 0:
        return None
    order = np.argsort(s, kind="mergesort")
    ranked = s[order]
    # average rank (1-based) of each run of equal scores: ties share the mean of their ranks
    starts = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]])
    ends = np.r_[starts[1:], len(ranked)]
    run_rank = 0.5 * (starts + 1 + ends)
    ranks = np.empty(len(s))
    ranks[order] = np.repeat(run_rank, ends - starts)
    u = float(np.sum(ranks[y])) - pos * (pos + 1) / 2.0
    return u / (pos * neg)


def binary_metrics(labels, probabilities) -> BinaryMetrics:
    """The five metrics of ``probabilities`` (of the label 1) against 0/1 ``labels``.

    Raises
    ------
    ValueError
        If the lengths differ, a label is not 0 or 1, or a probability is outside [0, 1] or not finite.
    """
    y = _labels(labels)
    p = np.asarray(probabilities, dtype=np.float64).reshape(-1)
    _same_length(y, p)
    bad = ~((p >= 0.0) & (p <= 1.0))
    if bad.any():
        i = int(np.argmax(bad))
        raise ValueError(f"probabilities[{i}] = {p[i]!r} is not a probability in [0, 1]")
    n = len(y)
    if n == 0:
        return BinaryMetrics(0, 0, None, None, None, None, None)
    yf = y.astype(np.float64)
    q = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
    return BinaryMetrics(
        count=n,
        positives=int(np.count_nonzero(y)),
        accuracy=float(np.mean((p >= 0.5) == y)),
        roc_auc=roc_auc(y, p),
        brier=float(np.mean((p - yf) ** 2)),
        log_loss=float(-np.mean(yf * np.log(q) + (1.0 - yf) * np.log1p(-q))),
        base_rate=float(np.mean(yf)),
    )


class RunningBinaryMetrics:
    """The same metrics accumulated over a stream of events, in constant memory.

    Accuracy, Brier score, log loss and base rate are exact running sums. The ROC AUC is the exact
    AUC of the probabilities rounded down to a grid of ``bins`` equal cells (``floor(p * bins)``,
    1 in the top cell): a histogram per class, so ties inside a cell count as one half. With the
    default 1024 cells it differs from the AUC of the unrounded probabilities only through pairs
    closer than 1/1024.

    The state is a few counters and two integer histograms (:meth:`state` / :meth:`load_state`).
    """

    def __init__(self, bins: int = 1024) -> None:
        if bins < 2:
            raise ValueError(f"bins must be at least 2, got {bins}")
        self._bins = bins
        self._count = 0
        self._positives = 0
        self._correct = 0
        self._brier_sum = 0.0
        self._log_loss_sum = 0.0
        self._hist_pos = np.zeros(bins, dtype=np.int64)
        self._hist_neg = np.zeros(bins, dtype=np.int64)

    @property
    def count(self) -> int:
        return self._count

    def update(self, labels, probabilities) -> None:
        """Add events (trusted input: 0/1 labels, probabilities in [0, 1])."""
        y = np.asarray(labels, dtype=np.float64).reshape(-1)
        p = np.asarray(probabilities, dtype=np.float64).reshape(-1)
        if len(y) == 0:
            return
        pos = y == 1.0
        q = np.clip(p, LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
        self._count += len(y)
        self._positives += int(np.count_nonzero(pos))
        self._correct += int(np.count_nonzero((p >= 0.5) == pos))
        self._brier_sum += float(np.sum((p - y) ** 2))
        self._log_loss_sum += float(-np.sum(y * np.log(q) + (1.0 - y) * np.log1p(-q)))
        cell = np.minimum((p * self._bins).astype(np.int64), self._bins - 1)
        self._hist_pos += np.bincount(cell[pos], minlength=self._bins)
        self._hist_neg += np.bincount(cell[~pos], minlength=self._bins)

    def result(self) -> BinaryMetrics:
        """The metrics of every event added so far."""
        n = self._count
        if n == 0:
            return BinaryMetrics(0, 0, None, None, None, None, None)
        pos, neg = self._positives, n - self._positives
        auc = None
        if pos and neg:
            # each positive beats the negatives in lower cells and ties (one half) those in its own
            below = np.cumsum(self._hist_neg) - self._hist_neg
            wins = float(np.sum(self._hist_pos * (below + 0.5 * self._hist_neg)))
            auc = wins / (pos * neg)
        return BinaryMetrics(n, pos, self._correct / n, auc, self._brier_sum / n, self._log_loss_sum / n, pos / n)

    def state(self) -> dict:
        """The accumulated state as plain Python values (floats exact; see :meth:`load_state`)."""
        return {"bins": self._bins, "count": self._count, "positives": self._positives, "correct": self._correct,
                "brier_sum": self._brier_sum, "log_loss_sum": self._log_loss_sum,
                "hist_pos": self._hist_pos.tolist(), "hist_neg": self._hist_neg.tolist()}

    def load_state(self, state: dict) -> None:
        """Restore :meth:`state` (its ``bins`` must equal this object's)."""
        if int(state["bins"]) != self._bins:
            raise ValueError(f"state has {state['bins']} bins, this tally {self._bins}")
        self._count = int(state["count"])
        self._positives = int(state["positives"])
        self._correct = int(state["correct"])
        self._brier_sum = float(state["brier_sum"])
        self._log_loss_sum = float(state["log_loss_sum"])
        self._hist_pos = np.asarray(state["hist_pos"], dtype=np.int64).copy()
        self._hist_neg = np.asarray(state["hist_neg"], dtype=np.int64).copy()


def _labels(labels) -> np.ndarray:
    y = np.asarray(labels, dtype=np.float64).reshape(-1)
    bad = (y != 0.0) & (y != 1.0)
    if bad.any():
        i = int(np.argmax(bad))
        raise ValueError(f"labels[{i}] = {y[i]!r} is not 0 or 1")
    return y == 1.0


def _same_length(y: np.ndarray, p: np.ndarray) -> None:
    if len(y) != len(p):
        raise ValueError(f"{len(y)} labels but {len(p)} predictions")
