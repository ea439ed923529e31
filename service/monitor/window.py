"""The held-out window: the newest held-out events, never learned, that the monitor's checks score.

A batch's held-out events are kept when it arrives, before it is learned; a check at event ``e`` scores
the newest ``size`` of them up to ``e``. They are kept as sparse rows in event order in buffers with
room to spare, so a check scores one contiguous slice with the model's own compiled code. Beside the
values, the window keeps them as the model scales them (:meth:`view` with ``keep_scaled``): a check
scales only the rows it has not scored before, not the whole window again.
"""

from __future__ import annotations

import numpy as np

from models import Rows

__all__ = ["HeldOutWindow"]


class HeldOutWindow:
    """The newest ``size`` held-out events of a model (the events a check scores), oldest first."""

    def __init__(self, size: int, numeric: int = 0) -> None:
        self.size = size
        self._ptr = np.zeros(2 * size + 1, dtype=np.int64)  # row k's coordinates: _ptr[k] .. _ptr[k + 1]
        self._y = np.zeros(2 * size)
        self._events = np.zeros(2 * size, dtype=np.int64)
        self._indices = np.zeros(8 * size, dtype=np.int64)
        self._values = np.zeros(8 * size)
        self._lo = self._hi = 0  # rows lo..hi of the buffers are kept
        # the values scaled by the model, valid for the kept rows below _scaled_hi when _scale holds the
        # model's means and standard deviations (models.LinearModel.score_window checks it, bit for bit)
        self._scaled = np.zeros(8 * size)
        self._scale = np.full(2 * numeric, np.nan)
        self._scaled_hi = self._pending = 0

    def span(self, upto: int | None = None) -> tuple[int, int]:
        """Buffer rows ``(lo, hi)`` of the newest ``size`` events up to event ``upto`` (``None``: all)."""
        hi = self._hi
        if upto is not None and hi > self._lo and self._events[hi - 1] > upto:
            hi = self._lo + int(self._events[self._lo:hi].searchsorted(upto, "right"))
        return max(self._lo, hi - self.size), hi

    def __len__(self) -> int:
        lo, hi = self.span()
        return hi - lo

    def view(self, upto: int | None = None, keep_scaled: bool = False) -> tuple:
        """``(rows, targets, events)`` of the newest ``size`` events up to event ``upto`` (``None``: all),
        oldest first: views of the buffers (:meth:`add` writes past them). ``keep_scaled`` adds the
        ``scaled`` argument of :meth:`models.LinearModel.score_window` for these rows; once they are
        scored with it, :meth:`scaled_kept` records that they are scaled."""
        lo, hi = self.span(upto)
        # indptr points into the whole coordinate buffers, so it need not start at 0
        rows = Rows(self._ptr[lo:hi + 1], self._indices, self._values)
        if not keep_scaled:
            return rows, self._y[lo:hi], self._events[lo:hi]
        self._pending = hi
        return rows, self._y[lo:hi], self._events[lo:hi], (self._scaled, max(self._scaled_hi - lo, 0), self._scale)

    def scaled_kept(self) -> None:
        """The rows of the last :meth:`view` with ``keep_scaled`` were scored: their scaled values are kept."""
        self._scaled_hi = self._pending

    def add(self, rows: Rows, y: np.ndarray, picked: np.ndarray, events: np.ndarray) -> None:
        """Keep rows ``picked`` of ``rows`` (targets ``y[picked]``, event indices ``events``), which are
        newer than every event kept so far and than every check made so far."""
        if (n := len(picked)) == 0:
            return
        self._lo = max(self._lo, self._hi - self.size)  # no check to come reaches further back
        starts = rows.indptr[picked]
        lens = rows.indptr[picked + 1] - starts
        ends = np.cumsum(lens)
        # the positions of the picked rows' coordinates, in row order, without a loop per row
        take = np.arange(int(ends[-1])) + np.repeat(starts - ends + lens, lens)
        self._make_room(n, len(take))
        hi, nnz = self._hi, int(self._ptr[self._hi])
        self._ptr[hi + 1:hi + n + 1] = nnz + ends
        self._y[hi:hi + n] = y[picked]
        self._events[hi:hi + n] = events
        self._indices[nnz:nnz + len(take)] = rows.indices[take]
        self._values[nnz:nnz + len(take)] = rows.values[take]
        self._hi = hi + n

    def _make_room(self, rows: int, coords: int) -> None:
        """When the buffers cannot take ``rows`` more rows of ``coords`` coordinates, move the kept rows
        to the front of new ones with room for them (at least as large as before)."""
        lo, hi = self._lo, self._hi
        first, last = int(self._ptr[lo]), int(self._ptr[hi])
        if hi + rows < len(self._ptr) and last + coords <= len(self._indices):
            return
        room, coord_room = max(len(self._y), 2 * (hi - lo + rows)), max(len(self._indices), 2 * (last - first + coords))
        self._ptr = np.pad(self._ptr[lo:hi + 1], (0, room - (hi - lo))) - first
        self._y, self._events = (np.pad(a[lo:hi], (0, room - (hi - lo))) for a in (self._y, self._events))
        self._indices, self._values, self._scaled = (np.pad(a[first:last], (0, coord_room - (last - first)))
                                                     for a in (self._indices, self._values, self._scaled))
        self._lo, self._hi = 0, hi - lo
        self._scaled_hi = self._pending = max(self._scaled_hi - lo, 0)

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change)."""
        self._lo += int(np.count_nonzero(self._events[self._lo:self._hi] < event))

    def to_arrays(self) -> dict[str, np.ndarray]:
        """The window's events only (a restored window continues identically)."""
        lo, hi = self.span()
        first, last = int(self._ptr[lo]), int(self._ptr[hi])
        return {"window_lens": np.diff(self._ptr[lo:hi + 1]), "window_y": self._y[lo:hi],
                "window_events": self._events[lo:hi], "window_indices": self._indices[first:last],
                "window_values": self._values[first:last]}

    def load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        lens = arrays["window_lens"].astype(np.int64)
        rows = Rows(np.concatenate(([0], np.cumsum(lens))), arrays["window_indices"], arrays["window_values"])
        self._lo = self._hi = self._scaled_hi = self._pending = 0
        self.add(rows, arrays["window_y"], np.arange(len(lens)), arrays["window_events"])

