"""The stability monitor: held-out loss, rollback to the averaged model, restart after a real change.

The convergence guarantees of projected SGD hold in expectation on a stationary feed; live feeds
change and labels are sometimes wrong. The monitor keeps the newest ``window`` held-out events
(never learned) and every ``check_every`` learned events scores them with both iterates in one
compiled pass. Losses over the window leave out the events whose loss under *both* iterates exceeds
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
of the newly held-out events whose averaged-iterate loss exceeds the median of (a fixed quarter of)
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
from collections import deque

import numba
import numpy as np
from river import drift

from models import LinearModel, Rows

from .config import MonitorConfig

__all__ = ["ChangeDetector", "HoldoutWindow", "Monitor", "sign_test_pvalue"]

_LOSS_CODES = {"squared": 0, "huber": 1, "logistic": 2}
# layouts of the arrays the compiled passes share: statistics out, scalars in, per-slot metadata
(ST_MEDIAN, ST_RAW, ST_AVG, ST_KEPT, ST_NEW, ST_NEW_ABOVE, ST_REC_RAW, ST_REC_AVG, ST_REC_N, ST_DIST,
 N_STATS) = range(11)
P_BRAW, P_BAVG, P_CODE, P_DELTA, P_LAST, P_RECENT, P_CUT, P_UNSCALED, N_PRM = range(9)
M_LEN, M_Y, M_EVENT, M_SCALED, N_META = range(5)

_jit = numba.njit(cache=True, nogil=True)
_NO_EVENTS = np.zeros(0, dtype=np.int64)


@_jit
def _loss(code, delta, m, y):
    """The losses of ``models.losses`` (the reference the tests compare with), for one event."""
    r = m - y
    if code == 0:
        return 0.5 * r * r
    if code == 1:
        r = abs(r)
        return 0.5 * r * r if r <= delta else delta * (r - 0.5 * delta)
    if m > 0:
        return m + math.log1p(math.exp(-m)) - y * m
    return math.log1p(math.exp(m)) - y * m


@_jit
def _put(idx, val, meta, nxt, indptr, indices, values, mode, y, events, lo, hi, first, scaling):
    """Keep the rows ``r`` in ``lo..hi`` with ``mode[r] == 2`` in the ring from slot ``nxt`` on
    (event index ``events[r]``, or ``first + r`` when ``events`` is empty), scaled when ``scaling``
    is known. Return ``(next slot, rows kept)``, or ``(-width, 0)`` when a row is wider than the
    ring (nothing is kept then)."""
    width, size = idx.shape
    nnum = scaling.shape[1] if scaling.shape[0] == 2 else -1
    for r in range(lo, hi):
        if mode[r] == 2 and indptr[r + 1] - indptr[r] > width:
            return -(indptr[r + 1] - indptr[r]), 0
    kept = 0
    for r in range(lo, hi):
        if mode[r] != 2:
            continue
        a, b = indptr[r], indptr[r + 1]
        for p in range(width):
            j = indices[a + p] if p < b - a else 0
            x = values[a + p] if p < b - a else 0.0
            if p < b - a and j < nnum:
                x = (x - scaling[0, j]) / scaling[1, j]
            idx[p, nxt] = j
            val[p, nxt] = x
        meta[M_LEN, nxt] = b - a
        meta[M_Y, nxt] = y[r]
        meta[M_EVENT, nxt] = events[r] if events.shape[0] else first + r
        meta[M_SCALED, nxt] = 1.0 if nnum >= 0 else 0.0
        nxt = (nxt + 1) % size
        kept += 1
    return nxt, kept


@_jit
def _window_stats(idx, val, meta, n, w_raw, w_avg, scaling, prm, work, out):
    """Score the ``n`` kept events with both iterates and fill ``out`` (layout ``ST_*``).

    ``scaling`` holds the frozen numeric means and standard deviations (or is empty before they
    are frozen); ``prm`` the scalars (layout ``P_*``; the absurd-loss cut comes from the previous
    check's median, one pass fewer); ``work`` rows: raw loss, averaged loss, scratch.
    """
    b_raw, b_avg, code, delta = prm[P_BRAW], prm[P_BAVG], int(prm[P_CODE]), prm[P_DELTA]
    last_event, recent_from, cut = prm[P_LAST], prm[P_RECENT], prm[P_CUT]
    nnum = scaling.shape[1]
    loss_raw, loss_avg, scratch = work[0], work[1], work[2]
    if prm[P_UNSCALED] > 0.0 and scaling.shape[0] == 2:  # rows kept before the scaling froze, once
        for i in range(n):
            if meta[M_SCALED, i] == 0.0:
                for p in range(int(meta[M_LEN, i])):
                    j = idx[p, i]
                    if j < nnum:
                        val[p, i] = (val[p, i] - scaling[0, j]) / scaling[1, j]
                meta[M_SCALED, i] = 1.0
    width = idx.shape[0]
    i = 0
    while i + 4 <= n:  # four rows at a time: independent sums keep the pipeline full (padding adds 0)
        r0 = r1 = r2 = r3 = b_raw
        a0 = a1 = a2 = a3 = b_avg
        for p in range(width):
            j0, j1, j2, j3 = idx[p, i], idx[p, i + 1], idx[p, i + 2], idx[p, i + 3]
            x0, x1, x2, x3 = val[p, i], val[p, i + 1], val[p, i + 2], val[p, i + 3]
            r0 += w_raw[j0] * x0
            r1 += w_raw[j1] * x1
            r2 += w_raw[j2] * x2
            r3 += w_raw[j3] * x3
            a0 += w_avg[j0] * x0
            a1 += w_avg[j1] * x1
            a2 += w_avg[j2] * x2
            a3 += w_avg[j3] * x3
        loss_raw[i], loss_raw[i + 1], loss_raw[i + 2], loss_raw[i + 3] = r0, r1, r2, r3
        loss_avg[i], loss_avg[i + 1], loss_avg[i + 2], loss_avg[i + 3] = a0, a1, a2, a3
        i += 4
    for i in range(i, n):
        r0, a0 = b_raw, b_avg
        for p in range(width):
            r0 += w_raw[idx[p, i]] * val[p, i]
            a0 += w_avg[idx[p, i]] * val[p, i]
        loss_raw[i], loss_avg[i] = r0, a0
    for s in range(N_STATS):
        out[s] = 0.0
    k_old = k_new = 0
    for i in range(n):
        lr = _loss(code, delta, loss_raw[i], meta[M_Y, i])
        la = _loss(code, delta, loss_avg[i], meta[M_Y, i])
        loss_raw[i] = lr
        loss_avg[i] = la
        ev = meta[M_EVENT, i]
        if ev > last_event:
            scratch[n - 1 - k_new] = la  # new events from the top, a sample of the older ones from the bottom
            k_new += 1
        elif i % 4 == 0:
            # a new event exceeds the median of any sample of the older events with probability 1/2
            # just the same; every 4th costs a quarter of the work
            scratch[k_old] = la
            k_old += 1
        if lr > cut and la > cut:
            continue
        out[ST_RAW] += lr
        out[ST_AVG] += la
        out[ST_KEPT] += 1.0
        if ev > recent_from:
            out[ST_REC_RAW] += lr
            out[ST_REC_AVG] += la
            out[ST_REC_N] += 1.0
    med = np.median(scratch[:k_old]) if k_old > 0 else math.nan
    out[ST_MEDIAN] = med
    out[ST_NEW] = k_new
    for k in range(n - k_new, n):
        if scratch[k] > med:
            out[ST_NEW_ABOVE] += 1.0
    d2 = (b_raw - b_avg) ** 2
    for j in range(w_raw.shape[0]):
        d2 += (w_raw[j] - w_avg[j]) ** 2
    out[ST_DIST] = math.sqrt(d2)


def _copy_model(model: LinearModel) -> LinearModel:
    """An independent copy of ``model``, in a few microseconds: the learned state of a model lives in
    numpy arrays ("state lives in plain arrays so that a snapshot is a byte copy", models/kernels.py),
    which are copied; the rest (frozen spec, the mapper's growing cache of categorical names, the
    empty warm-up buffer of a frozen model) is shared. The tests check it against ``to_bytes``."""
    twin = copy.copy(model)
    twin.__dict__.update({k: v.copy() for k, v in vars(model).items() if isinstance(v, np.ndarray)})
    return twin


def sign_test_pvalue(above: int, n: int) -> float:
    """One-sided sign test: ``P(Binomial(n, 1/2) >= above)``."""
    return sum(math.comb(n, i) for i in range(above, n + 1)) / 2.0**n if n else 1.0


class ChangeDetector:
    """A river drift detector (``"page_hinkley"`` or ``"adwin"``) behind ``update(x) -> bool``.

    ``params`` go to the river class unchanged (none: river's defaults), so that this wrapper
    reproduces river's documented detections.
    """

    KINDS = ("adwin", "page_hinkley")

    def __init__(self, kind: str, **params) -> None:
        if kind not in self.KINDS:
            raise ValueError(f"Invalid detector {kind!r}. Valid values are: {', '.join(self.KINDS)}")
        self.kind = kind
        self.params = dict(params)
        self._det = self._make()

    def _make(self):
        return (drift.PageHinkley if self.kind == "page_hinkley" else drift.ADWIN)(**self.params)

    @classmethod
    def for_monitor(cls, cfg: MonitorConfig) -> ChangeDetector | None:
        """The detector ``cfg`` asks for (``None`` for ``"off"``): Page-Hinkley on the per-check
        exceedance share, tuned by ``drift_*``; ADWIN on per-event exceedances, river's defaults
        but ``adwin_delta``."""
        if cfg.drift == "page_hinkley":
            return cls("page_hinkley", min_instances=cfg.drift_min_checks, delta=cfg.drift_delta,
                       threshold=cfg.drift_threshold, mode="up")
        if cfg.drift == "adwin":
            return cls("adwin", delta=cfg.adwin_delta)
        return None

    def update(self, x: float) -> bool:
        """Feed one value; ``True`` when the detector signals a change at this value."""
        self._det.update(float(x))
        return bool(self._det.drift_detected)

    def update_many(self, xs) -> bool:
        """Feed values in order; ``True`` when the detector signals a change at any of them."""
        fired = False
        for x in xs:
            fired = self.update(x) or fired
        return fired

    def reset(self) -> None:
        self._det = self._make()


class HoldoutWindow:
    """The newest ``size`` held-out events as a ring of padded rows, scored by a compiled pass.

    Rows are stored position-major (``idx[p, slot]``) with their numeric values scaled once the
    model's warm-up scaling is frozen, so that scoring is a plain sparse product.
    """

    def __init__(self, size: int, width: int = 1) -> None:
        self.size = size
        self._idx = np.zeros((width, size), dtype=np.int32)
        self._val = np.zeros((width, size))
        self._meta = np.zeros((N_META, size))
        self._next = 0
        self._count = 0
        self._work = np.zeros((3, size))
        self._scaling = np.zeros((0, 0))
        self._unscaled = False

    def __len__(self) -> int:
        return self._count

    @property
    def unscaled(self) -> bool:
        """Whether rows kept before the scaling froze still wait to be scaled (at the next check)."""
        return self._unscaled or (self._count > 0 and self._scaling.shape[0] == 0)

    @property
    def loss_raw(self) -> np.ndarray:
        """Per-slot losses of the raw iterate at the last scoring (slots ``0..len-1``)."""
        return self._work[0, : self._count]

    @property
    def loss_avg(self) -> np.ndarray:
        return self._work[1, : self._count]

    def new_above(self, n_new: int, median: float) -> list:
        """1.0 / 0.0 per newly kept event of the last scoring: its averaged loss exceeds ``median``."""
        return (self._work[2, self._count - n_new: self._count] > median).astype(np.float64).tolist()

    def events(self) -> np.ndarray:
        """Event indices of the kept events, slot order (matching ``loss_raw`` / ``loss_avg``)."""
        return self._meta[M_EVENT, : self._count].astype(np.int64)

    def add(self, rows: Rows, y: np.ndarray, mode: np.ndarray, start: int, stop: int, first: int,
            events: np.ndarray | None = None) -> None:
        """Keep the rows ``start..stop`` of ``rows`` whose ``mode`` is 2 (held out), with targets ``y``
        and event indices ``events`` (or ``first`` + row), all indexed by row."""
        events = _NO_EVENTS if events is None else events
        args = (rows.indptr, rows.indices, rows.values, mode, y, events, start, stop, first)
        nxt, kept = _put(self._idx, self._val, self._meta, self._next, *args, self._scaling)
        if nxt < 0:  # a wider row than any before: widen the ring (rare) and copy again
            grow = ((0, -nxt - self._idx.shape[0]), (0, 0))
            self._idx, self._val = np.pad(self._idx, grow), np.pad(self._val, grow)
            nxt, kept = _put(self._idx, self._val, self._meta, self._next, *args, self._scaling)
        if kept and self._scaling.shape[0] == 0:
            self._unscaled = True
        self._next = nxt
        self._count = min(self._count + kept, self.size)

    def drop_before(self, event: int) -> None:
        """Forget the events held out before ``event`` (after a real change), keeping their order."""
        order = np.arange(self._count) if self._count < self.size else (np.arange(self.size) + self._next) % self.size
        keep = order[self._meta[M_EVENT, order] >= event]
        k = len(keep)
        for name in ("_idx", "_val", "_meta", "_work"):
            old = getattr(self, name)
            new = np.zeros_like(old)
            new[:, :k] = old[:, keep]
            setattr(self, name, new)
        self._count, self._next = k, k % self.size

    def stats(self, model: LinearModel, prm: np.ndarray, out: np.ndarray, work: np.ndarray | None = None) -> None:
        """Score every kept event with both iterates (see :func:`_window_stats`; fills ``prm``'s weights).

        With ``work`` given (a reader outside the check, perhaps on another thread) the ring is left
        untouched: it must hold no unscaled rows then.
        """
        w_raw, prm[P_BRAW] = model.weights("raw")
        w_avg, prm[P_BAVG] = model.weights("averaged")
        prm[P_UNSCALED] = 0.0
        if work is None:
            work = self._work
            if self._scaling.shape[0] == 0 and model.scaling_frozen:  # frozen once, for good
                self._scaling = np.stack(model.scaling)
            if self._unscaled and self._scaling.shape[0]:
                prm[P_UNSCALED], self._unscaled = 1.0, False
        _window_stats(self._idx, self._val, self._meta, self._count, w_raw, w_avg, self._scaling, prm, work, out)


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
        self.window = HoldoutWindow(cfg.window)
        self._prm = np.zeros(N_PRM)
        self._prm[P_CODE] = _LOSS_CODES[spec.loss]
        self._prm[P_DELTA] = spec.huber_delta
        # a logistic loss is bounded by the margin, so a wrong label cannot be absurd: keep every event
        self._absurd = math.inf if spec.loss == "logistic" else cfg.absurd_factor
        self._prm[P_CUT] = math.inf
        self._stats = np.zeros(N_STATS)
        self._detector = ChangeDetector.for_monitor(cfg)
        # event indices of the last checks (bounded: a patience set out of reach must not grow it)
        self._bounds: deque = deque([-1], maxlen=min(max(cfg.rollback_patience, cfg.confirm_recent), 64) + 1)
        self._worse_streak = 0
        self._healthy = 0
        self._alert = False
        self._refused_since = 0
        self._g2 = math.inf
        self._alarm_event: int | None = None
        self._alarm_checks = 0
        self._trusted: LinearModel | None = None
        self._trusted_event: int | None = None
        self._restored: LinearModel | None = None
        self._serving = "raw" if cfg.serve == "raw" else "averaged"
        self._last: dict = {}
        self.incidents: list[dict] = []
        self._rejects: list[tuple[int, int]] = []
        self._reject_open = False

    # ---------------------------------------------------------------- inputs
    @property
    def serving(self) -> str:
        """The iterate the model serves now: ``"raw"`` or ``"averaged"``."""
        return self._serving

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
        self._refused_since += count

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
        self.window.stats(model, prm, st, np.zeros((3, self.window.size)))
        kept = st[ST_KEPT]
        return {"raw": st[ST_RAW] / kept, "averaged": st[ST_AVG] / kept} if kept else {"raw": None, "averaged": None}

    def check(self, model: LinearModel, event: int, ts: float | None = None) -> dict:
        """Evaluate both iterates on the window, act if needed; return the check's record."""
        cfg, st, prm, bounds = self.cfg, self._stats, self._prm, self._bounds
        prm[P_LAST] = bounds[-1]
        prm[P_RECENT] = bounds[-min(cfg.rollback_patience, len(bounds))]
        self.window.stats(model, prm, st)
        if st[ST_MEDIAN] > 0:
            prm[P_CUT] = self._absurd * st[ST_MEDIAN]
        n, kept = len(self.window), int(st[ST_KEPT])
        raw = st[ST_RAW] / kept if kept else math.nan
        avg = st[ST_AVG] / kept if kept else math.nan
        distance = float(st[ST_DIST])
        g = model.grad_bound
        if g is not None and 0 < g * g < self._g2:
            self._g2 = g * g
        allowance = cfg.noise_allowance * model.last_step * self._g2 / 4.0 if self._g2 < math.inf else 0.0
        record = {"event": int(event), "holdout_raw": raw, "holdout_avg": avg, "held_out": n, "excluded": n - kept,
                  "action": None, "distance": distance, "allowance": allowance}
        limit = cfg.divergence_radii * (self._radius or max(model.norm("averaged"), 1.0))
        reason, by_loss = None, False
        if self._refused_since:
            reason = f"{self._refused_since} update(s) refused as non-finite"
        elif distance > limit:
            reason = f"raw iterate {distance:.3g} from the average (limit {limit:.3g})"
        elif kept >= cfg.min_holdout:
            worse = raw > (1.0 + cfg.rollback_margin) * avg + allowance
            if worse and st[ST_REC_N] >= 10 and st[ST_REC_RAW] < st[ST_REC_AVG]:
                worse = False
                record["following"] = True
            self._worse_streak = self._worse_streak + 1 if worse else 0
            # right after a rollback the fault has shown itself: one worse check is enough then
            if self._worse_streak >= (1 if self._alert else cfg.rollback_patience):
                by_loss = True
                reason = (f"held-out loss of the raw iterate {raw:.4g} vs averaged {avg:.4g} (worse by more "
                          f"than {cfg.rollback_margin:.0%} plus its noise allowance {allowance:.3g} on "
                          f"{self._worse_streak} checks in a row)")
        if reason:
            model = self._rollback(model, event, ts, reason, by_loss, {
                "holdout_raw": raw, "holdout_avg": avg, "distance": distance, "allowance": allowance,
                "held_out": kept})
            record["action"] = "rollback"
        elif self._worse_streak:
            self._healthy = 0
        else:
            self._healthy += 1
            self._alert = self._alert and self._healthy < cfg.rollback_patience
            if self._healthy % cfg.snapshot_every == 0 and model.scaling_frozen:
                self._trusted, self._trusted_event = _copy_model(model), int(event)
        self._refused_since = 0
        if self._detector is not None:
            self._drift(model, st, event, ts, record)
        if cfg.serve == "better" and kept:
            self._serving = "raw" if raw < avg else "averaged"
        record["serving"] = self._serving
        bounds.append(int(event))
        self._last = record
        return record

    def _rollback(self, model: LinearModel, event: int, ts, reason: str, by_loss: bool,
                  evidence: dict) -> LinearModel:
        """Go back to the last trusted copy (not after a refused update: nothing was learned then),
        set raw := averaged and shrink the steps; return the model now in use. After a rollback by
        the loss rule, the next worse check is enough for another (``_alert``)."""
        restore = self._trusted is not None and not self._refused_since
        if restore:
            model = self._restored = _copy_model(self._trusted)
        model.rollback(self.cfg.rollback_shrink)
        self._worse_streak = self._healthy = 0
        self._alert = by_loss
        self._incident("rollback", event, ts, reason, {**evidence, "step_scale": model.step_scale,
                                                      "restored_from": self._trusted_event if restore else None})
        return model

    def take_restored(self) -> LinearModel | None:
        """The model a rollback restored from the last trusted check, once (the engine adopts it)."""
        model, self._restored = self._restored, None
        return model

    def _drift(self, model: LinearModel, st: np.ndarray, event: int, ts, record: dict) -> None:
        if self._alarm_event is None:
            old = len(self.window) - st[ST_NEW]
            if st[ST_NEW] > 0 and old >= 10 and st[ST_MEDIAN] > 0:
                share = st[ST_NEW_ABOVE] / st[ST_NEW]
                record["exceedance"] = share
                if self._detector.kind == "adwin":  # ADWIN's bound counts inputs: one per event
                    fired = self._detector.update_many(self.window.new_above(int(st[ST_NEW]), st[ST_MEDIAN]))
                else:
                    fired = self._detector.update(share)
                if fired:
                    self._alarm_event = self._bounds[-1] + 1
                    self._alarm_checks = 0
                    record["alarm"] = self._alarm_event
            return
        self._alarm_checks += 1
        if self._alarm_checks < self.cfg.drift_confirm:
            return
        ev = self.window.events()
        recent = ev > self._bounds[-min(self.cfg.confirm_recent, len(self._bounds))]
        before = ev < self._alarm_event
        verdicts = {name: self._worse(losses[: len(ev)], before, recent)
                    for name, losses in (("raw", self.window.loss_raw), ("averaged", self.window.loss_avg))}
        if verdicts["averaged"]["worse"]:
            model.restart()
            self.window.drop_before(self._alarm_event)
            self._g2 = math.inf
            self._worse_streak = self._healthy = 0
            self._alert = False
            self._trusted = self._trusted_event = None  # a copy from the old world must not come back
            record["action"] = "restart"
            v = verdicts["averaged"]
            self._incident("restart", event, ts,
                           f"after event {self._alarm_event} the averaged iterate's held-out loss rose from "
                           f"{v['before']:.4g} to {v['recent']:.4g} (medians; {v['above']} of {v['n']} recent "
                           f"events above the old median, p = {v['p']:.2g}): the feed changed",
                           {"alarm_event": self._alarm_event, "checks": self._alarm_checks, **{
                               f"{k}_{name}": val for name, d in verdicts.items() for k, val in d.items()}})
        self._alarm_event = None
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
        self._worse_streak = 0
        self._incident("rollback", event, None, reason, {"step_scale": model.step_scale})

    # ---------------------------------------------------------------- state
    def to_bytes(self) -> bytes:
        state = {k: v for k, v in self.__dict__.items() if k not in ("cfg", "_trusted", "_restored")}
        state["_trusted"] = self._trusted.to_bytes() if self._trusted is not None else None
        return pickle.dumps(state, protocol=5)

    def load_bytes(self, blob: bytes) -> None:
        state = pickle.loads(blob)
        trusted = state.pop("_trusted")
        self.__dict__.update(state)
        self._trusted = LinearModel.from_bytes(trusted) if trusted is not None else None
        self._restored = None
