"""The baseline every run is compared with: a constant prediction from the targets seen so far.

A model is only worth serving if it beats the simplest predictor that needs no features. For a
regression that is the running mean of the learned targets; for a binary task it is the base rate,
estimated with the Krichevsky-Trofimov rule ``(ones + 1/2) / (n + 1)`` (Krichevsky and Trofimov,
1981, "The performance of universal encoding"), which is 1/2 before any event and never exactly 0
or 1, so its log loss stays finite. Before any event the regression baseline predicts 0, as an
untrained model does.

Two figures, both in the config's own loss so that they sit on the same axis as the model's:

* **progressive**: each learned event is scored by the baseline *before* its target updates the
  running figure, exactly as the model's progressive loss scores it before learning;
* **held-out**: the current figure scored on the newest ``window`` held-out events (the events the
  monitor scores the model on; they never update the figure). The monitor may drop older held-out
  events after a restart and leaves events with absurd targets out of its losses; this window does
  neither, so after a restart or a burst of wrong labels (until they leave the window) the
  baseline's held-out figure sits higher than one on exactly the model's events would.

The running figure and the loss sum are updated in event order with sequential sums, so a feed
applied in chunks of any size gives bit-identical figures.
"""

from __future__ import annotations

import math

import numpy as np

from models.losses import loss_value

__all__ = ["Baseline"]


class Baseline:
    """Running-mean (regression) or base-rate (binary) predictor, scored progressively and held out.

    Parameters
    ----------
    loss
        The config's loss name (``squared``, ``huber``, ``logistic``).
    window
        Held-out events kept (0: no held-out figure).
    huber_delta
        The Huber loss's ``delta``.

    Examples
    --------
    >>> b = Baseline("squared", window=0)
    >>> b.update(np.array([1.0, 3.0]), np.array([1, 1], dtype=np.int8))  # 0.5 * 1**2 + 0.5 * (3 - 1)**2
    2.5
    >>> b.target_sum, b.target_count, b.margin
    (4.0, 2, 2.0)
    """

    def __init__(self, loss: str, window: int, *, huber_delta: float = 1.0) -> None:
        self.loss = loss
        self.huber_delta = huber_delta
        self.target_sum = 0.0
        self.target_count = 0
        self.progressive_sum = 0.0
        self.progressive_count = 0
        self._held = np.zeros(window)
        self._held_next = 0
        self._held_count = 0
        self._batch: dict = {}

    # ------------------------------------------------------------------ predictions
    def _margins(self, sums: np.ndarray, counts: np.ndarray) -> np.ndarray:
        """The baseline's margin (score before the link) after ``counts`` targets summing to ``sums``."""
        if self.loss == "logistic":
            rate = (sums + 0.5) / (counts + 1.0)
            return np.log(rate) - np.log1p(-rate)
        return np.divide(sums, counts, out=np.zeros_like(sums), where=counts > 0)

    def _loss(self, margin, target) -> np.ndarray:
        return loss_value(self.loss, margin, target, self.huber_delta)

    @property
    def margin(self) -> float:
        """The current prediction as a margin (the mean, or the log-odds of the base rate)."""
        return float(self._margins(np.array([self.target_sum]), np.array([float(self.target_count)]))[0])

    # ------------------------------------------------------------------ learning
    def update(self, y: np.ndarray, mode: np.ndarray) -> float:
        """Score then absorb a batch's learned events (``mode == 1``) in order and keep its held-out
        ones (``mode == 2``); return the sum of the progressive losses added.

        The whole batch is done in a few vectorized passes; :meth:`segment_loss` and
        :meth:`holdout_at` then give the figures at any position inside it (the monitor's checks).
        """
        learned = y[mode == 1]
        # prepending the running sums makes each cumulative sum the same chain of additions as
        # absorbing the events one at a time, whatever the batch sizes
        sums = np.cumsum(np.concatenate(([self.target_sum], learned)))
        counts = self.target_count + np.arange(len(learned) + 1, dtype=np.float64)
        losses = self._loss(self._margins(sums[:-1], counts[:-1]), learned)
        chain = np.cumsum(np.concatenate(([self.progressive_sum], losses)))
        before = np.zeros(len(y) + 1, dtype=np.int64)
        np.cumsum(mode == 1, out=before[1:])
        self._batch = {"sums": sums, "counts": counts, "chain": chain, "learned_before": before}
        if len(self._held):
            held_before = np.zeros(len(y) + 1, dtype=np.int64)
            np.cumsum(mode == 2, out=held_before[1:])
            kept = self._ordered()
            held = np.concatenate((kept, y[mode == 2]))
            # prefix sums of the held-out targets (shifted by the first, against cancellation) give
            # each check's window sums in O(1): the squared and the log loss need only these
            shift = float(held[0]) if len(held) else 0.0
            prefix = np.zeros((2, len(held) + 1))
            np.cumsum(held - shift, out=prefix[0, 1:])
            np.cumsum((held - shift) ** 2, out=prefix[1, 1:])
            self._batch.update(held=held, held_before=held_before + len(kept), prefix=prefix, shift=shift)
        self.target_sum = float(sums[-1])
        self.target_count += len(learned)
        self.progressive_sum = float(chain[-1])
        self.progressive_count += len(learned)
        if len(self._held):
            self._keep(y[mode == 2])
        return float(chain[-1] - chain[0])

    def segment_loss(self, start: int, stop: int) -> float:
        """Sum of the progressive losses of the learned events at positions ``start:stop`` of the last batch."""
        b = self._batch
        return float(b["chain"][b["learned_before"][stop]] - b["chain"][b["learned_before"][start]])

    def holdout_at(self, position: int) -> float | None:
        """The held-out figure as it stood before position ``position`` of the last batch (for the
        monitor's checks; equal to :meth:`holdout_loss` at that moment up to rounding)."""
        b = self._batch
        if "held" not in b:
            return None
        k = b["learned_before"][position]
        stop = int(b["held_before"][position])
        start = max(0, stop - len(self._held))
        n = stop - start
        if not n:
            return None
        total, count = float(b["sums"][k]), float(b["counts"][k])
        if self.loss == "logistic":
            rate = (total + 0.5) / (count + 1.0)
            margin = math.log(rate) - math.log1p(-rate)
            mean_y = b["shift"] + (b["prefix"][0, stop] - b["prefix"][0, start]) / n
            return max(margin, 0.0) + math.log1p(math.exp(-abs(margin))) - mean_y * margin
        margin = total / count if count else 0.0
        if self.loss == "squared":
            d = margin - b["shift"]
            s1 = b["prefix"][0, stop] - b["prefix"][0, start]
            s2 = b["prefix"][1, stop] - b["prefix"][1, start]
            return max(0.5 * (s2 - 2.0 * d * s1 + n * d * d) / n, 0.0)
        return float(np.mean(self._loss(margin, b["held"][start:stop])))

    def _keep(self, held: np.ndarray) -> None:
        size = len(self._held)
        held = held[-size:]
        if not len(held):
            return
        for part in np.split(held, [size - self._held_next]):
            self._held[self._held_next:self._held_next + len(part)] = part
            self._held_next = (self._held_next + len(part)) % size
        self._held_count = min(self._held_count + len(held), size)

    def _ordered(self) -> np.ndarray:
        """The kept held-out targets, oldest first."""
        return np.roll(self._held, -self._held_next)[len(self._held) - self._held_count:]

    # ------------------------------------------------------------------ figures
    @property
    def progressive_loss(self) -> float | None:
        """Mean progressive loss over the learned events so far (``None`` before any)."""
        return self.progressive_sum / self.progressive_count if self.progressive_count else None

    def holdout_loss(self) -> float | None:
        """Mean loss of the current figure on the kept held-out events (``None`` without any)."""
        if not self._held_count:
            return None
        held = self._held[:self._held_count] if self._held_count < len(self._held) else self._held
        return float(np.mean(self._loss(self.margin, held)))

    def losses(self) -> dict:
        """``{"progressive": ..., "holdout": ...}``, the summary's ``baseline_loss``."""
        return {"progressive": self.progressive_loss, "holdout": self.holdout_loss()}

    # ------------------------------------------------------------------ state
    def state(self) -> dict:
        """Named plain values (numbers and one list of floats) that :meth:`load_state` restores."""
        return {"target_sum": self.target_sum, "target_count": self.target_count,
                "progressive_sum": self.progressive_sum, "progressive_count": self.progressive_count,
                "held_targets": self._ordered().tolist()}

    def load_state(self, state: dict) -> None:
        """Restore what :meth:`state` gave (a window of another size keeps the newest that fit)."""
        self.target_sum = float(state["target_sum"])
        self.target_count = int(state["target_count"])
        self.progressive_sum = float(state["progressive_sum"])
        self.progressive_count = int(state["progressive_count"])
        self._held[:] = 0.0
        self._held_next = self._held_count = 0
        if len(self._held):
            self._keep(np.asarray(state["held_targets"], dtype=np.float64))
