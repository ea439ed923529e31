"""The held-out window: the newest held-out events (never learned) and their losses under both iterates.

Events are kept as compressed sparse rows in insertion order, oldest first, in buffers with room for
twice the window: appending is a copy of the new rows, and once the buffers are full the newest
``size`` rows move to the front (one copy every ``size`` events). The window is therefore always
one contiguous slice, and scoring it is two calls of the model's own compiled scorer
(``LinearModel.score_rows``) plus the loss in numpy: the losses are exactly the model's.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from models import LinearModel, Rows
from models.losses import loss_value

__all__ = ["HeldOutWindow", "WindowLosses"]


@dataclass
class WindowLosses:
    """Per-event losses of the window's events under both iterates, oldest event first."""

    raw: np.ndarray
    averaged: np.ndarray
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
        self._lens = np.zeros(2 * size, dtype=np.int64)  # active coordinates of each kept row
        self._y = np.zeros(2 * size)
        self._events = np.zeros(2 * size, dtype=np.int64)
        self._indices = np.zeros(8 * size, dtype=np.int64)
        self._values = np.zeros(8 * size)
        self._lo = self._hi = 0  # the window is rows lo..hi of the buffers
        self._nnz = 0  # coordinates stored in rows 0..hi

    def __len__(self) -> int:
        return self._hi - self._lo

    def events(self) -> np.ndarray:
        """Event indices of the kept events, oldest first."""
        return self._events[self._lo:self._hi].copy()

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
        hi, nnz = self._hi, self._nnz
        self._lens[hi:hi + n] = lens
        self._y[hi:hi + n] = y[picked]
        self._events[hi:hi + n] = events
        self._indices[nnz:nnz + len(take)] = rows.indices[take]
        self._values[nnz:nnz + len(take)] = rows.values[take]
        self._hi, self._nnz = hi + n, nnz + len(take)
        self._lo = max(self._lo, self._hi - self.size)

    def _make_room(self, rows: int, coords: int) -> None:
        """Move the newest rows to the front when the buffers cannot take ``rows`` more; grow them when
        even that is not enough (a batch larger than the window, or wider rows than before)."""
        if self._hi + rows <= len(self._lens) and self._nnz + coords <= len(self._indices):
            return
        keep = max(0, min(self._hi - self._lo, self.size - rows))
        self._keep_last(keep)
        need_rows, need_coords = self._hi + rows, self._nnz + coords
        if need_rows > len(self._lens):
            for name in ("_lens", "_y", "_events"):
                setattr(self, name, _grown(getattr(self, name), 2 * need_rows))
        if need_coords > len(self._indices):
            self._indices = _grown(self._indices, 2 * need_coords)
            self._values = _grown(self._values, 2 * need_coords)

    def _keep_last(self, keep: int) -> None:
        """Keep only the newest ``keep`` rows of the window, moved to the front of the buffers."""
        lo = self._hi - keep
        first = int(self._lens[:lo].sum())
        for name in ("_lens", "_y", "_events"):
            a = getattr(self, name)
            a[:keep] = a[lo:self._hi]
        self._indices[:self._nnz - first] = self._indices[first:self._nnz]
        self._values[:self._nnz - first] = self._values[first:self._nnz]
        self._lo, self._hi, self._nnz = 0, keep, self._nnz - first

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change)."""
        self._keep_last(int(np.count_nonzero(self._events[self._lo:self._hi] >= event)))

    def rows(self) -> Rows:
        """The window's rows (views of the buffers, valid until the next :meth:`add`)."""
        lens = self._lens[self._lo:self._hi]
        first = int(self._lens[:self._lo].sum())
        indptr = np.zeros(len(lens) + 1, dtype=np.int64)
        np.cumsum(lens, out=indptr[1:])
        return Rows(indptr, self._indices[first:first + indptr[-1]], self._values[first:first + indptr[-1]])

    def losses(self, model: LinearModel) -> WindowLosses:
        """Every kept event's loss under the raw and the averaged iterate of ``model``."""
        spec = model.spec
        rows, y = self.rows(), self._y[self._lo:self._hi]
        raw, avg = (loss_value(spec.loss, model.score_rows(rows, it), y, spec.huber_delta)
                    for it in ("raw", "averaged"))
        return WindowLosses(raw, avg, self._events[self._lo:self._hi])

    # ---------------------------------------------------------------- state
    def to_arrays(self) -> dict[str, np.ndarray]:
        """The kept events only (a restored window continues identically)."""
        rows = self.rows()
        return {"window_lens": self._lens[self._lo:self._hi], "window_y": self._y[self._lo:self._hi],
                "window_events": self._events[self._lo:self._hi], "window_indices": rows.indices,
                "window_values": rows.values}

    def load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        lens = arrays["window_lens"].astype(np.int64)
        rows = Rows(np.concatenate(([0], np.cumsum(lens))), arrays["window_indices"], arrays["window_values"])
        self._lo = self._hi = self._nnz = 0
        self.add(rows, arrays["window_y"], np.arange(len(lens)), arrays["window_events"])


def _grown(a: np.ndarray, n: int) -> np.ndarray:
    out = np.zeros(n, dtype=a.dtype)
    out[:len(a)] = a
    return out
