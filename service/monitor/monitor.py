"""The stability monitor: held-out loss, rollback to the averaged model, restart after a real change.

Projected SGD's guarantees hold on a stationary feed; live feeds change and labels are sometimes wrong.
Every ``check_every`` learned events the monitor scores its window (``window.py``) with both iterates
and applies the rules of ``rules.py``, each documented there, in order: *non-finite update*, *distance*,
*rollback* -> roll back (restore the newest *trusted copy*, taken every ``snapshot_every`` healthy
checks in a row since a uniform average absorbs each astray update at once; raw := averaged; later steps
times ``rollback_shrink``); *change confirmed* -> restart (the average, step schedule and ``G`` start
again; older held-out events and the trusted copy are dropped); *boundary pinned* -> incident and
warning. Every change of the step scale is an incident.

One rule lives here, *garbage*: the window's mean losses leave out events whose loss under both
iterates exceeds ``absurd_factor`` times the median of the older window events (a garbage target is
far from both iterates, so it says nothing about which is better) and losses that overflowed (above
``models.losses.OVERFLOW_LOSS``: they would make both means inf or NaN). One compiled pass
(``models.readouts.score_window``) gives the losses, the median and the usable events.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import asdict
from typing import TYPE_CHECKING

import numpy as np

from models import LinearModel, Rows
from models.snapshot import pack, unpack

from service.monitor import rules
from service.monitor.detectors import ChangeDetector
from service.monitor.rules import MIN_EVENTS, CheckFigures, RuleState, step_scale_change
from service.monitor.window import HeldOutWindow

if TYPE_CHECKING:
    from service.config import MonitorConfig

__all__ = ["LAYOUT", "Monitor"]

#: the version of :meth:`Monitor.to_bytes`' layout; a state of another one is refused
LAYOUT = 3
#: the garbage rule's median is taken over a regular sample of at most about this many older events
#: (exchangeable, so a new event still lands above it with probability 1/2)
_MEDIAN_SAMPLE = 500
_KEPT_CHECKS = 64  # event indices of the last checks kept (patience beyond this is out of reach anyway)


class Monitor:
    """Watches a model (``model``: its loss and constraint set fix the rules' scales) on held-out events
    under the ``[monitor]`` settings ``cfg``, and decides rollbacks, restarts and the serving iterate.

    The engine calls :meth:`hold_out` per batch, :meth:`check` every ``check_every`` learned events, and
    adopts the model :meth:`take_restored` returns after a rollback. ``incidents``: ``{kind, event, ts,
    reason, evidence}``, the newest ``incidents_kept`` of them (``None``: every one)."""

    def __init__(self, cfg: MonitorConfig, model: LinearModel, incidents_kept: int | None = None) -> None:
        self.cfg, spec = cfg, model.spec
        self._radius = spec.constraint_set.radius_from_start(spec.dim() + (1 if spec.fit_intercept else 0))
        self._ball = spec.constraint_set.kind == "ball"
        # a logistic loss is bounded by the margin, so a wrong label cannot be absurd: keep every event
        self._absurd = math.inf if spec.loss == "logistic" else cfg.absurd_factor
        self.window = HeldOutWindow(cfg.window, len(spec.numeric))
        self.state = RuleState(raw_served=cfg.serve == "raw")
        params = {"page_hinkley": dict(min_instances=cfg.drift_min_events, delta=cfg.drift_delta,
                                       threshold=cfg.drift_threshold, mode="up"), "adwin": dict(delta=cfg.adwin_delta)}
        self._detector = ChangeDetector(cfg.drift, **params[cfg.drift]) if cfg.drift in params else None
        self._trusted, self._trusted_event = None, None  # the trusted copy and the event it was taken at
        self._restored: LinearModel | None = None  # what the last rollback restored, until the engine takes it
        #: the newest ``incidents_kept`` incidents (``None``: all, as a replay keeps them); a service that runs
        #: for months on a drifting feed must not carry every one in memory and in every checkpoint
        self.incidents: deque[dict] = deque(maxlen=incidents_kept)

    @property
    def serving(self) -> str:
        """The iterate the model serves now: ``"raw"`` or ``"averaged"``."""
        return "raw" if self.state.raw_served else "averaged"

    @property
    def restarted_at(self) -> int | None:
        """The event of the last restart (``None``: never restarted)."""
        return self.state.restarted_at if self.state.restarted_at >= 0 else None

    @property
    def warnings(self) -> list[str]:
        """Standing warnings (today: the boundary rule's)."""
        if not self.state.boundary_open:
            return []
        share = sum(self.state.on_boundary) / self.cfg.boundary_checks
        return [f"the constraint is binding: radius {self._radius:g} may be too small (the raw iterate sat on "
                f"its boundary at {share:.0%} of the last {self.cfg.boundary_checks} checks)"]

    def holdout_losses(self, model: LinearModel) -> dict:
        """Mean window loss of both iterates now, garbage left out (``None`` on an empty window)."""
        fig = self._figures(model)
        return {"raw": None, "averaged": None} if fig is None else {"raw": fig.raw, "averaged": fig.averaged}

    def hold_out(self, rows: Rows, y: np.ndarray, mode: np.ndarray, first: int) -> None:
        """Keep the held-out events (``mode == 2``) of a batch whose row 0 is event ``first``, before it is learned."""
        picked = np.flatnonzero(mode == 2)
        self.window.add(rows, y, picked, first + picked)

    def note_refused(self, count: int) -> None:
        self.state.refused += count

    def note_rejected(self, rejected: int, total: int, event: int, ts: float | None = None) -> None:
        """Count input rejected at the boundary (the *rejected burst* rule)."""
        if (burst := rules.rejected_burst(self.state, rejected, total, self.cfg)) is not None:
            self._incident("rejected_burst", event, ts, *burst)

    def _figures(self, model: LinearModel, upto: int | None = None, check: bool = False) -> CheckFigures | None:
        """The window's figures up to event ``upto`` (``None``: all), garbage left out of the means. A
        ``check`` keeps the window's scaled values for the next one (a reader between checks changes nothing)."""
        rows, y, events, *scaled = self.window.view(upto, keep_scaled=check)
        if not len(events):
            return None
        n_old = int(events.searchsorted(self.state.checks[-1] if self.state.checks else -1, "right"))
        n_ref = n_old if n_old >= MIN_EVENTS else len(events)  # too few older events: the whole window's median
        s = model.score_window(rows, y, n_ref, _MEDIAN_SAMPLE, self._absurd, n_old, *scaled)
        if check:
            self.window.scaled_kept()
        raw, avg = (s.sums[0] / s.n_usable, s.sums[1] / s.n_usable) if s.n_usable else (math.nan, math.nan)
        g2 = self.state.g2_min  # read only: a reader between checks (the model card) changes nothing
        allowance = self.cfg.noise_allowance * model.last_step * g2 / 4.0 if g2 < math.inf else 0.0
        return CheckFigures(s.losses, events, s.usable, s.n_usable, n_old, s.above, s.n_above, raw, avg, s.distance,
                            allowance)

    def check(self, model: LinearModel, event: int, ts: float | None = None) -> dict:
        """Score the window up to ``event``, apply the rules, act; return the check's record."""
        state = self.state
        g = model.grad_bound  # the smallest since the restart: a burst inflates the estimate, not the noise
        if g and 0.0 < g * g < state.g2_min:
            state.g2_min = g * g
        fig = self._figures(model, event, check=True)
        record = {"event": int(event), "action": None, "holdout_raw": None, "holdout_avg": None, "held_out": 0,
                  "excluded": 0, "distance": model.distance() if fig is None else fig.distance}
        if fig is not None:
            record.update(holdout_raw=fig.raw, holdout_avg=fig.averaged, held_out=len(fig.events),
                          excluded=len(fig.events) - fig.n_usable, allowance=fig.allowance)
            if len(fig.above) and fig.n_old >= MIN_EVENTS:
                record["exceedance"] = fig.n_above / len(fig.above)
        if not self._rollback_rules(model, fig, event, ts, record) and fig is not None and self._detector is not None:
            self._change_rules(model, fig, event, ts, record)
        if self.cfg.serve == "better" and fig is not None and math.isfinite(fig.raw):
            state.raw_served = fig.raw < fig.averaged
        if self._ball and self._radius:
            on = model.raw_norm() >= self._radius * (1.0 - 1e-3)  # within 0.1%: projected back there
            if rules.boundary_pinned(state, on, self.cfg):
                self._incident("boundary", event, ts, self.warnings[0],
                               {"radius": self._radius, "norm_raw": model.raw_norm()})
        state.checks.append(int(event))
        del state.checks[:-_KEPT_CHECKS]
        record["serving"] = self.serving
        return record

    def _rollback_rules(self, model: LinearModel, fig: CheckFigures | None, event: int, ts, record: dict) -> bool:
        """Non-finite update, distance, rollback (held-out loss): act on the first that fires."""
        cfg, state = self.cfg, self.state
        reason, refused, by_loss = rules.non_finite_update(state), state.refused, False
        state.refused = 0
        if reason is None and fig is not None:
            limit = cfg.divergence_radii * (self._radius or max(model.norm("averaged"), 1.0))
            reason = rules.too_far_from_average(fig, limit)
            if reason is None:
                patience = state.checks[-cfg.rollback_patience] if len(state.checks) >= cfg.rollback_patience else -1
                reason = rules.raw_persistently_worse(fig, state, cfg, patience)
                by_loss = reason is not None
        if reason is not None and not cfg.rollback:
            state.ignored += 1
            record["alarm"] = reason  # observed, not acted on: this config has rollbacks switched off
            reason = None
        if reason is None:
            state.healthy = 0 if state.worse_streak else state.healthy + 1
            state.alert = state.alert and state.healthy < cfg.rollback_patience
            if state.healthy and state.healthy % cfg.snapshot_every == 0 and model.scaling_frozen:
                self._trusted, self._trusted_event = model.quick_copy(), int(event)
            return False
        restore = self._trusted is not None and not refused
        evidence = {"restored_from": self._trusted_event if restore else None}
        if fig is not None:
            evidence.update(holdout_raw=fig.raw, holdout_avg=fig.averaged, distance=fig.distance,
                            allowance=fig.allowance, held_out=fig.n_usable)
        self.rollback(model, event, reason, ts, evidence, restore)
        state.healthy, state.alert, record["action"] = 0, by_loss, "rollback"
        return True

    def _change_rules(self, model: LinearModel, fig: CheckFigures, event: int, ts, record: dict) -> None:
        """Feed the detector and open an alarm, or confirm (restart) or dismiss the open one."""
        state = self.state
        self._detector.preload()  # river loads while the learning goes on to the check that first feeds it
        if state.alarm_check < 0:
            if fig.n_old >= MIN_EVENTS and rules.feed_detector(self._detector, fig):
                state.alarm_from = (state.checks[-1] + 1) if state.checks else 0
                state.alarm_check, state.alarm_checks = int(event), 0
                record["alarm"] = state.alarm_from
            return
        state.alarm_checks += 1
        evidence = rules.change_confirmed(fig, state, self.cfg)
        if evidence is None and state.alarm_checks < self.cfg.drift_confirm:
            return
        state.alarm_from = state.alarm_check = -1
        if evidence is None:  # dismissed: the mean it learned before the alarm still holds
            self._detector.rearm()
            return
        self._detector.reset()
        before = model.step_scale
        model.restart()
        self.window.drop_before(evidence["alarm_event"])
        state.g2_min, state.worse_streak, state.healthy, state.alert = math.inf, 0, 0, False
        state.restarted_at = int(event)
        self._trusted = self._trusted_event = None  # a copy from the old world must not come back
        test = (f"medians; {evidence['above']} of {evidence['n']} fresh events above the old median"
                if evidence["test"] == "sign" else f"means of {evidence['n']} fresh events, Welch test")
        self._incident("restart", event, ts,
                       f"after event {evidence['alarm_event']:,} the averaged iterate's held-out loss rose from "
                       f"{evidence['before_averaged']:.4g} to {evidence['recent_averaged']:.4g} ({test}, "
                       f"p = {evidence['p']:.2g}): the feed changed", evidence)
        self._step_scale_changed(event, ts, before, model.step_scale, "restart")
        record["action"] = "restart"

    def take_restored(self) -> LinearModel | None:
        """The model a rollback restored from the last trusted copy, once (the engine adopts it)."""
        model, self._restored = self._restored, None
        return model

    def rollback(self, model: LinearModel, event: int, reason: str = "operator request", ts=None,
                 evidence: dict | None = None, restore: bool = False) -> None:
        """Roll ``model`` back (raw := averaged, later steps times ``rollback_shrink``), or with ``restore``
        a copy of the trusted one (the engine adopts it through :meth:`take_restored`); one incident."""
        shrink, before = self.cfg.rollback_shrink, model.step_scale
        if restore:  # the shrink compounds: the copy's steps are scaled to the current ones times the shrink
            shrink *= model.step_scale / self._trusted.step_scale
            model = self._restored = self._trusted.quick_copy()
        model.rollback(shrink)
        self.state.worse_streak = 0
        self._incident("rollback", event, ts, reason, {"step_scale": model.step_scale, **(evidence or {})})
        self._step_scale_changed(event, ts, before, model.step_scale, "rollback")

    def _step_scale_changed(self, event: int, ts, old: float, new: float, cause: str) -> None:
        if old != new:  # one incident for every change of the factor on later steps
            self._incident("step_scale", event, ts, *step_scale_change(old, new, cause, self.cfg.rollback_shrink))

    def _incident(self, kind: str, event: int, ts, reason: str, evidence: dict) -> None:
        clean = {k: (float(v) if isinstance(v, (float, np.floating)) else v) for k, v in evidence.items()}
        self.incidents.append({"kind": kind, "event": int(event), "ts": ts, "reason": reason, "evidence": clean})

    def to_bytes(self) -> bytes:
        """The state in ``models.snapshot``'s container (no pickle): a JSON header and the arrays."""
        fields, fed = self._detector.state() if self._detector is not None else ({}, np.zeros(0))
        trusted = self._trusted.to_bytes() if self._trusted is not None else b""
        header = {"format": "monitor-state", "layout": LAYOUT, "rules": asdict(self.state), "detector": fields,
                  "trusted_event": self._trusted_event, "incidents": list(self.incidents)}
        arrays = {**self.window.to_arrays(), "detector_fed": fed, "trusted": np.frombuffer(trusted, dtype=np.uint8)}
        return pack(header, arrays, {})[0]

    def load_bytes(self, blob: bytes) -> None:
        """Restore a state :meth:`to_bytes` wrote; one of another layout is refused with ``ValueError``
        before anything changes (recovery then uses an older checkpoint or replays the journal)."""
        try:
            header, arrays, _, _ = unpack(blob)
        except Exception as exc:  # not even the container: older than the layouts
            header, arrays = {"layout": f"unreadable: {exc}"}, {}
        if header.get("format") != "monitor-state" or header.get("layout") != LAYOUT:
            raise ValueError(f"monitor state of another layout ({header.get('layout')!r}; this version's is "
                             f"{LAYOUT}): it was written by another trimtab version")
        if self._detector is not None:
            self._detector.load_state(header["detector"], arrays["detector_fed"])
        self.window.load_arrays(arrays)
        self.state, self._restored = RuleState(**header["rules"]), None
        self.incidents = deque(header["incidents"], maxlen=self.incidents.maxlen)
        trusted, self._trusted_event = arrays["trusted"].tobytes(), header["trusted_event"]
        self._trusted = LinearModel.from_bytes(trusted) if trusted else None
