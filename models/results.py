"""What the model's passes return: per-event outcomes of learning, a held-out window's figures."""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

__all__ = ["Outcome", "WindowScores"]


@dataclass
class Outcome:
    """Per-event results of :meth:`LinearModel.process`.

    ``pred``: the serving iterate's prediction before learning the event (a probability for binary
    tasks); ``loss``: its loss (NaN for unlabelled events); ``code``: 0 scored, 1 learned (or buffered
    for warm-up scaling), 2 refused because the update would have made the state non-finite.
    """

    pred: np.ndarray
    loss: np.ndarray
    code: np.ndarray

    @classmethod
    def empty(cls, n: int) -> Outcome:
        return cls(np.zeros(n), np.full(n, np.nan), np.zeros(n, dtype=np.int8))


class WindowScores(NamedTuple):
    """:meth:`LinearModel.score_window`'s figures of a window of rows."""

    losses: np.ndarray  # (2, n): row 0 the raw iterate's loss of each row, row 1 the averaged one's
    usable: np.ndarray  # bool per row: neither loss overflowed and the smaller is within ``absurd`` references
    sums: tuple  # the usable rows' losses summed: (raw, averaged)
    n_usable: int
    reference: float  # the median averaged-iterate loss of the reference rows
    above: np.ndarray  # 1.0 or 0.0 per row from ``new_from`` on: its averaged-iterate loss is above the reference
    n_above: int
    distance: float  # ||w_raw - w_avg||, intercepts included
