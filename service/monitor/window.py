"""The held-out window: the newest held-out events (never learned) and their losses under both iterates.

Events are kept as compressed sparse rows in insertion order, oldest first, in buffers with room for
twice the window: appending is a copy of the new rows, and once the buffers are full the newest
``size`` rows move to the front (one copy every ``size`` events). The window is therefore always
one contiguous slice, and scoring it is one call of the model's own compiled scorer
(``LinearModel.score_rows_both``, both iterates in one pass) plus the loss in numpy: the losses are
exactly the model's.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from models import LinearModel, Rows
from models.losses import loss_value

__all__ = ["HeldOutWindow", "WindowLosses"]


@dataclass
class WindowLosses:
    """Per-event losses of the window's events, oldest event first: ``losses[0]`` under the raw
    iterate, ``losses[1]`` under the averaged one."""

    losses: np.ndarray
    events: np.ndarray


class HeldOutWindow:
    """The newest ``size`` held-out events of a model.

    Parameters
    ----------
    size
        Events kept.
    """

    def __init__(self, size: int) -> None:
        self.size = size
        self._ptr = np.zeros(2 * size + 1, dtype=np.int64)  # row k's coordinates: _ptr[k] .. _ptr[k + 1]
        self._y = np.zeros(2 * size)
        self._events = np.zeros(2 * size, dtype=np.int64)
        self._indices = np.zeros(8 * size, dtype=np.int64)
        self._values = np.zeros(8 * size)
        self._lo = self._hi = 0  # the window is rows lo..hi of the buffers

    def __len__(self) -> int:
        return self._hi - self._lo

    def events(self) -> np.ndarray:
        """Event indices of the kept events, oldest first."""
        return self._events[self._lo:self._hi].copy()

    def targets(self) -> np.ndarray:
        """Targets of the kept events, oldest first (a copy)."""
        return self._y[self._lo:self._hi].copy()

    def add(self, rows: Rows, y: np.ndarray, picked: np.ndarray, events: np.ndarray) -> None:
        """Keep rows ``picked`` of ``rows`` (targets ``y[picked]``, event indices ``events``)."""
        n = len(picked)
        if n == 0:
            return
        starts, stops = rows.indptr[picked], rows.indptr[picked + 1]
        lens = stops - starts
        # the positions of the picked rows' coordinates, in row order, without a loop per row
        offsets = np.repeat(starts - np.concatenate(([0], np.cumsum(lens)[:-1])), lens)
        take = np.arange(int(lens.sum())) + offsets
        self._make_room(n, len(take))
        hi, nnz = self._hi, int(self._ptr[self._hi])
        self._ptr[hi + 1:hi + n + 1] = nnz + np.cumsum(lens)
        self._y[hi:hi + n] = y[picked]
        self._events[hi:hi + n] = events
        self._indices[nnz:nnz + len(take)] = rows.indices[take]
        self._values[nnz:nnz + len(take)] = rows.values[take]
        self._hi = hi + n
        self._lo = max(self._lo, self._hi - self.size)

    def _make_room(self, rows: int, coords: int) -> None:
        """Move the newest rows to the front when the buffers cannot take ``rows`` more; grow them when
        even that is not enough (a batch larger than the window, or wider rows than before)."""
        if self._hi + rows < len(self._ptr) and self._ptr[self._hi] + coords <= len(self._indices):
            return
        self._keep_last(max(0, min(self._hi - self._lo, self.size - rows)))
        need_rows, need_coords = self._hi + rows, int(self._ptr[self._hi]) + coords
        if need_rows >= len(self._ptr):
            self._ptr = _grown(self._ptr, 2 * need_rows + 1)
            self._y, self._events = _grown(self._y, 2 * need_rows), _grown(self._events, 2 * need_rows)
        if need_coords > len(self._indices):
            self._indices = _grown(self._indices, 2 * need_coords)
            self._values = _grown(self._values, 2 * need_coords)

    def _keep_last(self, keep: int) -> None:
        """Keep only the newest ``keep`` rows of the window, moved to the front of the buffers."""
        lo, hi = self._hi - keep, self._hi
        first, last = int(self._ptr[lo]), int(self._ptr[hi])
        self._ptr[:keep + 1] = self._ptr[lo:hi + 1] - first
        self._y[:keep], self._events[:keep] = self._y[lo:hi], self._events[lo:hi]
        self._indices[:last - first] = self._indices[first:last]
        self._values[:last - first] = self._values[first:last]
        self._lo, self._hi = 0, keep

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change)."""
        self._keep_last(int(np.count_nonzero(self._events[self._lo:self._hi] >= event)))

    def targets(self) -> np.ndarray:
        """Targets of the kept events, oldest first (a copy)."""
        return self._y[self._lo:self._hi].copy()

    def rows(self) -> Rows:
        """The window's rows, views of the buffers valid until the next :meth:`add` (``indptr`` points
        into the whole coordinate buffers, so it need not start at 0)."""
        return Rows(self._ptr[self._lo:self._hi + 1], self._indices, self._values)

    def losses(self, model: LinearModel) -> WindowLosses:
        """Every kept event's loss under the raw and the averaged iterate of ``model``."""
        spec = model.spec
        margins = model.score_rows_both(self.rows())
        with np.errstate(over="ignore", invalid="ignore"):  # a blown-up model's losses are inf: the monitor counts them
            losses = loss_value(spec.loss, margins, self._y[self._lo:self._hi], spec.huber_delta)
        return WindowLosses(losses, self._events[self._lo:self._hi])

    # ---------------------------------------------------------------- state
    def to_arrays(self) -> dict[str, np.ndarray]:
        """The kept events only (a restored window continues identically)."""
        lo, hi = self._lo, self._hi
        first, last = int(self._ptr[lo]), int(self._ptr[hi])
        return {"window_lens": np.diff(self._ptr[lo:hi + 1]), "window_y": self._y[lo:hi],
                "window_events": self._events[lo:hi], "window_indices": self._indices[first:last],
                "window_values": self._values[first:last]}

    def load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        lens = arrays["window_lens"].astype(np.int64)
        rows = Rows(np.concatenate(([0], np.cumsum(lens))), arrays["window_indices"], arrays["window_values"])
        self._lo = self._hi = 0
        self.add(rows, arrays["window_y"], np.arange(len(lens)), arrays["window_events"])


def _grown(a: np.ndarray, n: int) -> np.ndarray:
    out = np.zeros(n, dtype=a.dtype)
    out[:len(a)] = a
    return out
