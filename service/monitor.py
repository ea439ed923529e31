"""The stability monitor: held-out loss, rollback to the averaged model, restarts after real changes.

The convergence guarantees of projected SGD hold in expectation on a stationary feed. Live feeds
drift and labels are sometimes wrong; the monitor tells the two cases apart and acts:

*Rollback* (the raw iterate went astray; the world did not change). Every ``check_every`` learned
events the raw and the averaged iterate are scored on the held-out window. If the raw iterate is
worse than the averaged one by more than ``rollback_margin`` on ``rollback_patience`` checks in a
row, or it is farther from the average than ``divergence_radii`` constraint radii, or an update was
refused as non-finite, the raw iterate is set to the averaged one and every later step is multiplied
by ``rollback_shrink``. The average is kept: it is the trusted part.

*Restart* (the world changed). A change detector (river's ``drift.PageHinkley`` or
``drift.ADWIN``) watches the averaged iterate's loss on newly held-out events, relative to its
loss on the whole window. An alarm opens a confirmation period of ``drift_confirm`` checks; if at
its end both iterates are still worse on the events held out since the alarm than they were on the
events before it, the change is real: the average is restarted (the old average describes the old
world), the step schedule is re-warmed, the held-out events from before the alarm are dropped and
an incident is recorded. A burst of wrong labels that ends within the confirmation period does not
restart anything; the rollbacks deal with it.
"""

from __future__ import annotations

import pickle

import numpy as np
from river import drift

from models import LinearModel, Rows
from models.losses import loss_value

from .config import MonitorConfig

__all__ = ["HoldoutWindow", "Monitor"]


class HoldoutWindow:
    """The newest ``size`` held-out events, as a ring of padded rows (scored as CSR)."""

    def __init__(self, size: int, width: int = 16) -> None:
        self.size = size
        self._idx = np.zeros((size, width), dtype=np.int64)
        self._val = np.zeros((size, width))
        self._len = np.zeros(size, dtype=np.int64)
        self._y = np.zeros(size)
        self._event = np.full(size, -1, dtype=np.int64)
        self._next = 0
        self._count = 0

    def __len__(self) -> int:
        return self._count

    def add(self, rows: Rows, y: np.ndarray, events: np.ndarray) -> None:
        width = rows.width()
        if width > self._idx.shape[1]:
            grow = max(width, 2 * self._idx.shape[1])
            self._idx = np.pad(self._idx, ((0, 0), (0, grow - self._idx.shape[1])))
            self._val = np.pad(self._val, ((0, 0), (0, grow - self._val.shape[1])))
        for k in range(len(rows)):
            lo, hi = rows.indptr[k], rows.indptr[k + 1]
            slot = self._next
            self._idx[slot, : hi - lo] = rows.indices[lo:hi]
            self._val[slot, : hi - lo] = rows.values[lo:hi]
            self._len[slot] = hi - lo
            self._y[slot] = y[k]
            self._event[slot] = events[k]
            self._next = (slot + 1) % self.size
            self._count = min(self._count + 1, self.size)

    def _order(self) -> np.ndarray:
        if self._count < self.size:
            return np.arange(self._count)
        return (np.arange(self.size) + self._next) % self.size

    def rows(self, since_event: int = -1) -> tuple[Rows, np.ndarray, np.ndarray]:
        """Rows, targets and event indices of the kept events (oldest first) at or after ``since_event``."""
        order = self._order()
        order = order[self._event[order] >= since_event]
        lens = self._len[order]
        indptr = np.zeros(len(order) + 1, dtype=np.int64)
        np.cumsum(lens, out=indptr[1:])
        mask = np.arange(self._idx.shape[1])[None, :] < lens[:, None]
        return (Rows(indptr, self._idx[order][mask], self._val[order][mask]), self._y[order].copy(),
                self._event[order].copy())

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change)."""
        rows, y, ev = self.rows(since_event=event)
        self.__init__(self.size, self._idx.shape[1])
        self.add(rows, y, ev)


class Monitor:
    """Watches a model on held-out events and decides rollbacks, restarts and the serving iterate."""

    def __init__(self, cfg: MonitorConfig, model: LinearModel) -> None:
        self.cfg = cfg
        spec = model.spec
        self._loss = spec.loss
        self._delta = spec.huber_delta
        dim = spec.dim() + (1 if spec.fit_intercept else 0)
        self._radius = spec.constraint_set.radius_from_start(dim)
        self.window = HoldoutWindow(cfg.window)
        self._detector = self._new_detector()
        self._worse_streak = 0
        self._refused_since = 0
        self._alarm_event: int | None = None
        self._alarm_checks = 0
        self._alarm_base: tuple[float, float] | None = None
        self._last_check_event = -1
        self._serving = "raw" if cfg.serve == "raw" else "averaged"
        self._last: dict = {}
        self.incidents: list[dict] = []
        self._rejects: list[tuple[int, int]] = []
        self._reject_open = False

    def _new_detector(self):
        if self.cfg.drift == "page_hinkley":
            return drift.PageHinkley(min_instances=10, threshold=self.cfg.drift_threshold, mode="up")
        if self.cfg.drift == "adwin":
            return drift.ADWIN()
        return None

    # ---------------------------------------------------------------- inputs
    @property
    def serving(self) -> str:
        """The iterate the model serves now: ``"raw"`` or ``"averaged"``."""
        return self._serving

    @property
    def last_check(self) -> dict:
        return dict(self._last)

    def add_holdout(self, rows: Rows, y: np.ndarray, events: np.ndarray) -> None:
        self.window.add(rows, y, events)

    def note_refused(self, count: int) -> None:
        self._refused_since += count

    def note_rejected(self, rejected: int, total: int, event: int, ts: float | None = None) -> None:
        """Count rejected input; a share above ``reject_burst_share`` in the last ``reject_window``
        events is recorded as one incident per burst."""
        if total <= 0:
            return
        self._rejects.append((rejected, total))
        n = 0
        bad = 0
        keep = []
        for r, t in reversed(self._rejects):
            if n >= self.cfg.reject_window:
                break
            keep.append((r, t))
            n += t
            bad += r
        self._rejects = keep[::-1]
        share = bad / n
        if share > self.cfg.reject_burst_share and n >= min(self.cfg.reject_window, 50) and not self._reject_open:
            self._reject_open = True
            self._incident("rejected_burst", event, ts,
                           f"{bad} of the last {n} events were rejected ({share:.0%})", {"share": share})
        elif share < self.cfg.reject_burst_share / 2:
            self._reject_open = False

    # ---------------------------------------------------------------- the check
    def _losses(self, model: LinearModel, rows: Rows, y: np.ndarray) -> tuple[float, float]:
        if len(rows) == 0:
            return float("nan"), float("nan")
        raw = loss_value(self._loss, model.score_rows(rows, "raw"), y, self._delta)
        avg = loss_value(self._loss, model.score_rows(rows, "averaged"), y, self._delta)
        return float(np.mean(raw)), float(np.mean(avg))

    def check(self, model: LinearModel, event: int, ts: float | None = None) -> dict:
        """Evaluate both iterates on the window, act if needed; return the check's record."""
        cfg = self.cfg
        rows, y, ev = self.window.rows()
        raw, avg = self._losses(model, rows, y)
        record = {"event": event, "holdout_raw": raw, "holdout_avg": avg, "held_out": len(rows), "action": None}
        new = ev > self._last_check_event
        self._last_check_event = event
        if len(rows) >= 10 and np.isfinite(avg):
            distance = model.distance()
            record["distance"] = distance
            worse = raw > avg * (1.0 + cfg.rollback_margin)
            self._worse_streak = self._worse_streak + 1 if worse else 0
            limit = cfg.divergence_radii * (self._radius if self._radius else max(model.norm("averaged"), 1.0))
            reason = None
            if self._refused_since:
                reason = f"{self._refused_since} update(s) refused as non-finite"
            elif distance > limit:
                reason = f"raw iterate {distance:.3g} from the average (limit {limit:.3g})"
            elif self._worse_streak >= cfg.rollback_patience:
                reason = (f"held-out loss of the raw iterate {raw:.4g} vs averaged {avg:.4g} "
                          f"(> {cfg.rollback_margin:.0%} worse on {self._worse_streak} checks)")
            if reason:
                model.rollback(cfg.rollback_shrink)
                self._worse_streak = 0
                record["action"] = "rollback"
                self._incident("rollback", event, ts, reason,
                               {"holdout_raw": raw, "holdout_avg": avg, "distance": distance,
                                "step_scale": model.step_scale})
            self._drift(model, rows, y, ev, new, avg, event, ts, record)
        self._refused_since = 0
        if cfg.serve == "better" and np.isfinite(raw) and np.isfinite(avg):
            self._serving = "raw" if raw < avg else "averaged"
        record["serving"] = self._serving
        self._last = record
        return record

    def _drift(self, model, rows, y, ev, new, avg, event, ts, record) -> None:
        if self._detector is None:
            return
        if self._alarm_event is None:
            if new.any() and avg > 0:
                recent = loss_value(self._loss, model.score_rows(rows.take(np.flatnonzero(new)), "averaged"),
                                    y[new], self._delta)
                self._detector.update(float(np.mean(recent)) / avg)
                if self._detector.drift_detected:
                    before = rows.take(np.flatnonzero(~new))
                    self._alarm_event = int(ev[new].min())
                    self._alarm_base = self._losses(model, before, y[~new])
                    self._alarm_checks = 0
            return
        self._alarm_checks += 1
        if self._alarm_checks < self.cfg.drift_confirm:
            return
        after = ev >= self._alarm_event
        raw_after, avg_after = self._losses(model, rows.take(np.flatnonzero(after)), y[after])
        raw_before, avg_before = self._alarm_base
        grow = 1.0 + self.cfg.rollback_margin
        if raw_after > raw_before * grow and avg_after > avg_before * grow:
            model.restart()
            self.window.drop_before(self._alarm_event)
            record["action"] = "restart"
            self._incident("restart", event, ts,
                           f"held-out loss rose from {avg_before:.4g} to {avg_after:.4g} (averaged) and from "
                           f"{raw_before:.4g} to {raw_after:.4g} (raw) after event {self._alarm_event}: "
                           "the feed changed", {"alarm_event": self._alarm_event,
                                                "before": [raw_before, avg_before], "after": [raw_after, avg_after]})
        self._alarm_event = None
        self._alarm_base = None
        self._detector = self._new_detector()

    def _incident(self, kind: str, event: int, ts, reason: str, evidence: dict) -> None:
        self.incidents.append({"kind": kind, "event": int(event), "ts": ts, "reason": reason,
                               "evidence": {k: (float(v) if isinstance(v, (float, np.floating)) else v)
                                            for k, v in evidence.items()}})

    def manual_rollback(self, model: LinearModel, event: int, reason: str = "operator request") -> None:
        model.rollback(self.cfg.rollback_shrink)
        self._incident("rollback", event, None, reason, {"step_scale": model.step_scale})

    # ---------------------------------------------------------------- state
    def to_bytes(self) -> bytes:
        state = {k: v for k, v in self.__dict__.items() if k != "cfg"}
        return pickle.dumps(state, protocol=5)

    def load_bytes(self, blob: bytes) -> None:
        self.__dict__.update(pickle.loads(blob))
