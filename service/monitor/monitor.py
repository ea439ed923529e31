"""The stability monitor: held-out loss, rollback to the averaged model, restart after a real change.

The convergence guarantees of projected SGD hold in expectation on a stationary feed; live feeds
change and labels are sometimes wrong. The monitor keeps the newest ``window`` held-out events
(never learned) and every ``check_every`` learned events scores them with both iterates, and
applies the rules below, in one compiled call (``rules.decide``; for the squared loss the window's
losses come from running sums, ``window_sums.py``, equal to a full pass up to rounding). Losses over
the window leave out the events whose loss under *both* iterates exceeds
``absurd_factor`` times the window's median (a garbage target is far from both, so it says nothing
about which is better; with Gaussian noise the default 50 drops about 2 clean events in a million).

**Rollback** (the raw iterate went astray, the world did not change): go back to the newest
*trusted copy* of the model (taken every ``snapshot_every`` healthy checks in a row), set its raw
iterate to its averaged one and multiply every later step by ``rollback_shrink``. The copy matters
because a uniform average absorbs each astray update at once (in the tests' feed, 250 updates of a
Fahrenheit burst cost the average 20% of held-out loss, which raw := averaged would keep); the
updates learned since the copy are given up. Right after a rollback by the loss rule one worse
check is enough for the next, until ``rollback_patience`` healthy checks have passed (the fault has
shown itself; a burst that goes on would otherwise re-enter the average for patience checks).
Triggers:

* an update was refused as non-finite (then only raw := averaged; nothing was learned);
* the raw iterate is farther than ``divergence_radii`` constraint radii from the average;
* ``rollback_patience`` checks in a row with
  ``L_raw > (1 + rollback_margin) L_avg + noise_allowance * eta * G**2 / 4``. The last term is
  the raw iterate's own noise: around the optimum, the covariance ``C`` of ``w - w*`` under steps
  ``eta`` solves ``H C + C H = eta Cov(g)`` to first order, so the expected excess loss
  ``tr(H C) / 2`` is ``eta E||g||^2 / 4`` whatever the curvature (a derivation, not a citation).
  With the default radius it exceeds a 10% margin for the first few hundred thousand updates,
  which is why a bare margin rolled back clean feeds. ``eta`` is the last step and ``G`` the
  smallest gradient bound seen since the last restart (a burst inflates the running estimate, not
  the clean noise). Judged once ``min_holdout`` usable events are kept. A check does not count
  when the raw iterate beats the average on the events held out during those checks: it is then
  following a change, not diverging.

**Restart** (the world changed): restart the average from the raw iterate, re-warm the step
schedule and ``G``, drop the held-out events from before the change, forget the trusted copy. A
change detector (river's ``drift.PageHinkley`` or ``drift.ADWIN``) reads at each check the share
of the newly held-out events whose averaged-iterate loss exceeds the median of (a fixed eighth of)
the older window events: on a stationary feed that share is binomial around 1/2 whatever the loss
or the noise (the events are exchangeable and none was learned), so one threshold fits every feed.
An alarm opens ``drift_confirm`` checks; then the events held out in the last ``confirm_recent``
checks are compared with those held out before the alarm: the averaged iterate must be worse on
them by a one-sided sign test at level ``drift_level`` against its pre-alarm median, and by more
than ``rollback_margin`` in median. A label burst that ended before that recent stretch restarts
nothing; one that outlasts ``drift_confirm - confirm_recent`` checks cannot be told from a change.
Only the averaged iterate must be worse: the raw one, not judged as diverging while it follows the
newest events, typically fits the new world within a few hundred updates, and it is the average
that a restart replaces (the incident's evidence has both).

A rollback distrusts the raw iterate: it keeps the (trusted) average and the step schedule, only
shrunk. A restart distrusts the average: it keeps the raw iterate and starts the schedule afresh
(``step_scale`` back to 1). Rejected-input bursts (a share above ``reject_burst_share`` of the last
``reject_window`` events) are incidents too, one per burst.
"""

from __future__ import annotations

import copy
import math
import pickle
import numpy as np

from models import LinearModel, Rows

from service.config import MonitorConfig
from service.monitor import rules as R
from service.monitor.rules import R_ALLOWANCE, R_AVG, R_DIST, R_EXCEEDANCE, R_HELD, R_KEPT, R_KEPT_NOW, R_RAW, R_RAW_SERVED
from service.monitor.drift import ChangeDetector, sign_test_pvalue
from service.monitor.holdout import (LOSS_CODES, N_PRM, N_STATS, N_WORK, P_ABSURD, P_CODE, P_CUT, P_DELTA, ST_AVG, ST_KEPT,
                      ST_MEDIAN, ST_NEW, ST_RAW, HoldoutWindow)

__all__ = ["Monitor"]


def _copy_model(model: LinearModel, into: LinearModel | None = None) -> LinearModel:
    """An independent copy of ``model``, in a few microseconds: the learned state of a model lives in
    numpy arrays ("state lives in plain arrays so that a snapshot is a byte copy", models/kernels.py),
    which are copied; the rest (frozen spec, the mapper's growing cache of categorical names, the
    empty warm-up buffer of a frozen model) is shared. With ``into`` (an earlier copy) the arrays
    are copied into its own where the shapes agree, which spares allocating them again (the trusted
    copy is refreshed every few checks). The tests check it against ``to_bytes``."""
    twin = copy.copy(model) if into is None else into
    theirs = vars(twin)
    for k, v in vars(model).items():
        if isinstance(v, np.ndarray):
            mine = theirs.get(k) if into is not None else None
            if mine is not None and mine is not v and mine.shape == v.shape and mine.dtype == v.dtype:
                np.copyto(mine, v)
            else:
                theirs[k] = v.copy()
        elif into is not None:
            theirs[k] = v
    return twin


_NOTHING_HELD = (Rows(np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros(0)), np.zeros(0),
                 np.zeros(0, dtype=np.int8), 0, 0, 0)


class Monitor:
    """Watches a model on held-out events and decides rollbacks, restarts and the serving iterate.

    Parameters
    ----------
    cfg
        The ``[monitor]`` settings.
    model
        The model watched (its loss and constraint set fix the rules' scales).

    Notes
    -----
    The engine feeds held-out events (:meth:`hold_out`, or :meth:`add_holdout` with rows of their
    own), refused updates and rejected input, calls :meth:`check` every ``check_every`` learned
    events and adopts the model :meth:`take_restored` returns after a rollback. ``incidents`` lists
    ``{kind, event, ts, reason, evidence}``; the state round-trips through :meth:`to_bytes`.
    """

    def __init__(self, cfg: MonitorConfig, model: LinearModel) -> None:
        self.cfg = cfg
        spec = model.spec
        self._radius = spec.constraint_set.radius_from_start(spec.dim() + (1 if spec.fit_intercept else 0))
        self.window = HoldoutWindow(cfg.window, len(spec.numeric), sums=spec.loss == "squared")
        self._mon = np.zeros(R.N_MONITOR)  # window scalars and figures, the rules' results and state
        self._prm[P_CODE] = LOSS_CODES[spec.loss]
        self._prm[P_DELTA] = spec.huber_delta
        # a logistic loss is bounded by the margin, so a wrong label cannot be absurd: keep every event
        self._absurd = math.inf if spec.loss == "logistic" else cfg.absurd_factor
        self._prm[P_CUT] = math.inf
        self._prm[P_ABSURD] = self._absurd
        # the rules' settings and state, read and written by the compiled check (rules.py)
        m = self._m
        m[R.C_MARGIN], m[R.C_PATIENCE], m[R.C_MIN_HOLDOUT] = cfg.rollback_margin, cfg.rollback_patience, cfg.min_holdout
        m[R.C_LIMIT] = cfg.divergence_radii * self._radius if self._radius else math.nan  # else set per check
        m[R.C_NOISE], m[R.C_SNAPSHOT], m[R.C_ROLLBACK] = cfg.noise_allowance, cfg.snapshot_every, float(cfg.rollback)
        m[R.C_ABSURD], m[R.C_BETTER] = self._absurd, float(cfg.serve == "better")
        m[R.C_DRIFT] = R.DRIFT_CODES[cfg.drift]
        m[R.C_CONFIRM], m[R.C_RECENT] = cfg.drift_confirm, cfg.confirm_recent
        m[R.C_GFIX] = float(spec.grad_bound) if spec.grad_bound is not None else 0.0
        # event indices of the last checks (bounded: a patience set out of reach must not grow it)
        m[R.C_BOUNDS] = min(max(cfg.rollback_patience, cfg.confirm_recent), 64) + 1
        m[R.B_LEN], m[R.B_POS], m[R.B_RING] = 1.0, 1.0, -1.0
        m[R.S_G2], m[R.S_ALARM], m[R.S_RAW_SERVED] = math.inf, -1.0, float(cfg.serve == "raw")
        # the detector cfg asks for: Page-Hinkley runs compiled in the check (its settings copied),
        # ADWIN as river's object, fed by the check's caller
        detector = ChangeDetector.for_monitor(cfg)
        self._detector = detector if cfg.drift == "adwin" else None
        if cfg.drift == "page_hinkley":
            R.ph_load(m, detector.detector)
        self._trusted: LinearModel | None = None
        self._trusted_event: int | None = None
        self._restored: LinearModel | None = None
        self._last: dict = {}
        self.incidents: list[dict] = []
        self._rejects: list[tuple[int, int]] = []
        self._reject_open = False

    # views of the one array the compiled check reads and writes (views are made on access, so that
    # a pickled monitor is one array again when loaded)
    @property
    def _prm(self) -> np.ndarray:
        return self._mon[R.O_PRM:R.O_PRM + N_PRM]

    @property
    def _stats(self) -> np.ndarray:
        return self._mon[R.O_OUT:R.O_OUT + N_STATS]

    @property
    def _res(self) -> np.ndarray:
        return self._mon[R.O_RES:R.O_RES + R.N_RES]

    @property
    def _m(self) -> np.ndarray:
        return self._mon[R.O_STATE:]

    # ---------------------------------------------------------------- inputs
    @property
    def serving(self) -> str:
        """The iterate the model serves now: ``"raw"`` or ``"averaged"``."""
        return "raw" if self._m[R.S_RAW_SERVED] else "averaged"

    @property
    def alarms_ignored(self) -> int:
        """Rollback alarms raised while ``[monitor] rollback = false`` (reported, not acted on)."""
        return int(self._m[R.S_IGNORED])

    @property
    def last_check(self) -> dict:
        return dict(self._last)

    def add_holdout(self, rows: Rows, y: np.ndarray, events: np.ndarray) -> None:
        """Keep held-out events: row ``k`` of ``rows`` has target ``y[k]`` and event index ``events[k]``."""
        n = len(rows)
        self.window.add(rows, np.asarray(y, dtype=np.float64), np.full(n, 2, dtype=np.int8), 0, n, 0,
                        np.asarray(events, dtype=np.int64))

    def hold_out(self, rows: Rows, y: np.ndarray, mode: np.ndarray, start: int, stop: int, first: int) -> None:
        """Keep the held-out events (``mode == 2``) among rows ``start..stop`` of a prepared batch
        whose row 0 is event ``first`` (the engine's path: no per-segment index arrays)."""
        self.window.add(rows, y, mode, start, stop, first)

    def note_refused(self, count: int) -> None:
        self._m[R.S_REFUSED] += count

    def note_rejected(self, rejected: int, total: int, event: int, ts: float | None = None) -> None:
        """Count rejected input; one incident per burst above ``reject_burst_share``."""
        if total <= 0:
            return
        self._rejects.append((rejected, total))
        n = bad = 0
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
    def holdout_losses(self, model: LinearModel) -> dict:
        """Window losses of both iterates now, absurd events left out (``None`` on an empty window).

        Safe to call between or during checks: it uses buffers of its own. Until the first check
        after the warm-up scaling froze, the last check's figures are returned.
        """
        if not len(self.window) or self.window.unscaled:
            return {"raw": self._last.get("holdout_raw"), "averaged": self._last.get("holdout_avg")}
        st, prm = np.zeros(N_STATS), self._prm.copy()
        self.window.stats(model, prm, st, np.zeros((N_WORK, self.window.size)))
        kept = st[ST_KEPT]
        return {"raw": st[ST_RAW] / kept, "averaged": st[ST_AVG] / kept} if kept else {"raw": None, "averaged": None}

    def check(self, model: LinearModel, event: int, ts: float | None = None, held: tuple | None = None) -> dict:
        """Evaluate both iterates on the window, act if needed; return the check's record. ``held``:
        ``(rows, y, mode, start, stop, first)`` as for :meth:`hold_out`, rows kept first (one call).

        Most checks only build their record: the compiled rules return 0 then, and the Python that
        acts (rollback, trusted copy, ADWIN, alarm, confirmation) runs only on the bits they return."""
        window = self.window
        if not window.ready:  # until the scaling froze and the rows kept before it were scaled
            window.prepare_check(model, self._prm)
        if self._radius is None:
            self._m[R.C_LIMIT] = self.cfg.divergence_radii * max(model.norm("averaged"), 1.0)
        lazy, state, sc = model.kernel_state()
        rows, y, mode, lo, hi, first = held if held is not None else _NOTHING_HELD
        args = (rows.indptr, rows.indices, rows.values, mode, y, lo, hi, first, lazy, state, sc, self._mon, event)
        flags = R.decide(window._f, window._i, window._g, window._k, *args)
        if flags & R.F_WIDEN:  # a wider row than any before: widen the window (rare), then again
            window.widen(int(self._mon[R.O_RES + R.R_WIDEN]))
            flags = R.decide(window._f, window._i, window._g, window._k, *args)
        r = self._res.tolist()  # Python floats from here on
        if not window.ready and r[R_KEPT_NOW]:
            window.note_kept()
        n = int(r[R_HELD])
        record = {"event": int(event), "holdout_raw": r[R_RAW], "holdout_avg": r[R_AVG], "held_out": n,
                  "excluded": n - int(r[R_KEPT]), "action": None, "distance": r[R_DIST], "allowance": r[R_ALLOWANCE]}
        if flags & R.F_RULES:
            self._act(model, event, ts, record, r)
        if r[R_EXCEEDANCE] == r[R_EXCEEDANCE]:
            record["exceedance"] = r[R_EXCEEDANCE]
        if flags & R.F_DRIFT:
            self._drift(model, event, ts, record, r)
        record["serving"] = "raw" if r[R_RAW_SERVED] else "averaged"
        self._last = record
        return record

    def _act(self, model: LinearModel, event: int, ts, record: dict, r: list) -> None:
        """What the rules ask of a check (``F_RULES``): note a raw iterate that follows the newest
        events, roll back (or note the trigger when rollbacks are off), take a trusted copy."""
        if r[R.R_FOLLOWING]:
            record["following"] = True
        if r[R.R_REASON]:
            reason = self._reason(r)
            if r[R.R_IGNORED]:
                record["alarm"] = reason  # observed, not acted on: this config has rollbacks switched off
            else:
                raw, avg, distance, allowance = r[R_RAW], r[R_AVG], r[R_DIST], r[R_ALLOWANCE]
                self._rollback(model, event, ts, reason, r[R.R_REASON] == R.REASON_LOSS, int(r[R.R_REFUSED]),
                               {"holdout_raw": raw, "holdout_avg": avg, "distance": distance,
                                "allowance": allowance, "held_out": int(r[R_KEPT])})
                record["action"] = "rollback"
        elif r[R.R_SNAPSHOT]:
            self._trusted, self._trusted_event = _copy_model(model, self._trusted), int(event)

    def _drift(self, model: LinearModel, event: int, ts, record: dict, r: list) -> None:
        """What the change detector asks of a check (``F_DRIFT``): feed ADWIN, note an alarm, confirm
        or dismiss one whose checks are up."""
        if r[R.R_ADWIN]:
            st = self._stats
            if self._detector.update_many(self.window.new_above(int(st[ST_NEW]), float(st[ST_MEDIAN]))):
                m = self._m
                m[R.S_ALARM], m[R.S_ALARM_CHECKS] = r[R.R_LAST] + 1.0, 0.0
                record["alarm"] = int(m[R.S_ALARM])
        if r[R.R_ALARM] >= 0.0:
            record["alarm"] = int(r[R.R_ALARM])
        if r[R.R_CONFIRM]:
            self._confirm(model, event, ts, record, r[R.R_CONFIRM_FROM])

    def _reason(self, r: list) -> str:
        cfg = self.cfg
        if r[R.R_REASON] == R.REASON_REFUSED:
            return f"{int(r[R.R_REFUSED])} update(s) refused as non-finite"
        if r[R.R_REASON] == R.REASON_DISTANCE:
            return f"raw iterate {r[R.R_DIST]:.3g} from the average (limit {r[R.R_LIMIT]:.3g})"
        return (f"held-out loss of the raw iterate {r[R.R_RAW]:.4g} vs averaged {r[R.R_AVG]:.4g} (worse by more "
                f"than {cfg.rollback_margin:.0%} plus its noise allowance {r[R.R_ALLOWANCE]:.3g} on "
                f"{int(r[R.R_STREAK])} checks in a row)")

    def _rollback(self, model: LinearModel, event: int, ts, reason: str, by_loss: bool, refused: int,
                  evidence: dict) -> LinearModel:
        """Go back to the last trusted copy (not after a refused update: nothing was learned then),
        set raw := averaged and shrink the steps; return the model now in use. (The rules' state,
        and after a rollback by the loss rule the one-check trigger, are set by ``rules.decide``.)"""
        restore = self._trusted is not None and not refused
        if restore:
            model = self._restored = _copy_model(self._trusted)
        model.rollback(self.cfg.rollback_shrink)
        self._incident("rollback", event, ts, reason, {**evidence, "step_scale": model.step_scale,
                                                      "restored_from": self._trusted_event if restore else None})
        return model

    def take_restored(self) -> LinearModel | None:
        """The model a rollback restored from the last trusted check, once (the engine adopts it)."""
        model, self._restored = self._restored, None
        return model

    def _confirm(self, model: LinearModel, event: int, ts, record: dict, recent_from: float) -> None:
        """An alarm's ``drift_confirm`` checks are up: restart if the averaged iterate got worse."""
        m = self._m
        alarm = int(m[R.S_ALARM])
        self.window.score_all(model, self._prm)  # the check may have scored only some events
        ev = self.window.events()
        recent = ev > recent_from
        before = ev < alarm
        verdicts = {name: self._worse(losses[: len(ev)], before, recent)
                    for name, losses in (("raw", self.window.loss_raw), ("averaged", self.window.loss_avg))}
        if verdicts["averaged"]["worse"]:
            model.restart()
            self.window.drop_before(alarm)
            m[R.S_G2], m[R.S_STREAK], m[R.S_HEALTHY], m[R.S_ALERT] = math.inf, 0.0, 0.0, 0.0
            self._trusted = self._trusted_event = None  # a copy from the old world must not come back
            record["action"] = "restart"
            v = verdicts["averaged"]
            self._incident("restart", event, ts,
                           f"after event {alarm} the averaged iterate's held-out loss rose from "
                           f"{v['before']:.4g} to {v['recent']:.4g} (medians; {v['above']} of {v['n']} recent "
                           f"events above the old median, p = {v['p']:.2g}): the feed changed",
                           {"alarm_event": alarm, "checks": int(m[R.S_ALARM_CHECKS]), **{
                               f"{k}_{name}": val for name, d in verdicts.items() for k, val in d.items()}})
        m[R.S_ALARM] = -1.0
        R.ph_reset(m)
        if self._detector is not None:
            self._detector.reset()

    def _worse(self, losses: np.ndarray, before: np.ndarray, recent: np.ndarray) -> dict:
        """Whether ``losses`` of the recent events exceed those of the pre-alarm events (sign test)."""
        n = int(np.count_nonzero(recent))
        if n < 10 or np.count_nonzero(before) < 10:
            return {"worse": False, "n": n, "above": 0, "p": 1.0, "before": math.nan, "recent": math.nan}
        ref = float(np.median(losses[before]))
        now = float(np.median(losses[recent]))
        above = int(np.count_nonzero(losses[recent] > ref))
        p = sign_test_pvalue(above, n)
        worse = p <= self.cfg.drift_level and now > (1.0 + self.cfg.rollback_margin) * ref
        return {"worse": bool(worse), "n": n, "above": above, "p": p, "before": ref, "recent": now}

    def _incident(self, kind: str, event: int, ts, reason: str, evidence: dict) -> None:
        self.incidents.append({"kind": kind, "event": int(event), "ts": ts, "reason": reason,
                               "evidence": {k: (float(v) if isinstance(v, (float, np.floating)) else v)
                                            for k, v in evidence.items()}})

    def manual_rollback(self, model: LinearModel, event: int, reason: str = "operator request") -> None:
        model.rollback(self.cfg.rollback_shrink)
        self._m[R.S_STREAK] = 0.0
        self._incident("rollback", event, None, reason, {"step_scale": model.step_scale})

    # ---------------------------------------------------------------- state
    def to_bytes(self) -> bytes:
        state = {k: v for k, v in self.__dict__.items() if k not in ("cfg", "_trusted", "_restored")}
        state["_trusted"] = self._trusted.to_bytes() if self._trusted is not None else None
        return pickle.dumps(state, protocol=5)

    def load_bytes(self, blob: bytes) -> None:
        """Restore a state :meth:`to_bytes` wrote; a state of another layout (an older trimtab's) is
        refused with ``ValueError`` before anything changes (recovery then uses an older checkpoint
        or replays the journal)."""
        state = pickle.loads(blob)
        mine = self._mon.shape, self.window._g.shape
        theirs = (getattr(state.get("_mon"), "shape", None), getattr(getattr(state.get("window"), "_g", None), "shape",
                                                                      None))
        if theirs != mine:
            raise ValueError(f"monitor state of another layout (arrays {theirs}, this version's {mine}): it was "
                             "written by another trimtab version")
        trusted = state.pop("_trusted")
        self.__dict__.update(state)
        self._trusted = LinearModel.from_bytes(trusted) if trusted is not None else None
        self._restored = None
