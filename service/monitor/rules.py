"""The monitor's rules, one named function each: what it watches, its threshold, its source.

``Monitor.check`` computes the :class:`CheckFigures` of a check, runs the rules in the order they
appear here and acts on what they return; the rules themselves change only :class:`RuleState`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from service.monitor.detectors import ChangeDetector

if TYPE_CHECKING:
    from service.config import MonitorConfig

__all__ = ["CheckFigures", "RuleState", "boundary_pinned", "change_confirmed", "feed_detector",
           "non_finite_update", "raw_persistently_worse", "rejected_burst", "sign_test_pvalue", "too_far_from_average",
           "welch_pvalue"]

#: fewest usable events a comparison is made on (a sign test at level 0.001 needs 10 of 10 above)
MIN_EVENTS = 10
#: fewest fresh events a change is confirmed on: more than one check's worth at the default hold-out, so
#: that a few minutes of misfit (a defrost cycle in the demo feed) cannot restart the model on their own
MIN_FRESH = 15


@dataclass
class RuleState:
    """What the rules remember between checks (saved with the monitor)."""

    worse_streak: int = 0  # checks in a row with the raw iterate worse than the average
    healthy: int = 0  # checks in a row with no rollback trigger
    alert: bool = False  # right after a rollback by the loss rule: one worse check is enough
    refused: int = 0  # updates refused as non-finite since the last check
    g2_min: float = math.inf  # the smallest G**2 seen since the last restart
    ignored: int = 0  # rollback triggers seen while rollbacks are switched off
    raw_served: bool = False
    alarm_from: int = -1  # first event of the stretch whose held-out events raised the open alarm
    alarm_check: int = -1  # the event of the check that raised it (-1: no alarm open)
    alarm_checks: int = 0  # checks since
    boundary_open: bool = False  # a boundary incident is open (it closes when the iterate leaves)
    restarted_at: int = -1  # the event of the last restart
    checks: list = field(default_factory=list)  # event of each of the last checks, oldest first
    on_boundary: list = field(default_factory=list)  # 1/0 per recent check: the raw iterate on the boundary
    rejects: list = field(default_factory=list)  # [rejected, total] per report of rejected input, newest last
    reject_open: bool = False  # a rejected-burst incident is open


@dataclass
class CheckFigures:
    """The window's figures at one check. The window is in event order: ``events[:n_old]`` were held
    out before the last check, the rest (``above``'s events) since."""

    losses: np.ndarray  # (2, n): raw and averaged loss of each window event, oldest first
    events: np.ndarray
    usable: np.ndarray  # not garbage: under at least one iterate within ``absurd_factor`` references
    n_usable: int
    n_old: int
    above: np.ndarray  # per new event, 1.0 or 0.0: its averaged-iterate loss is above the median of the older ones
    n_above: int
    raw: float  # mean loss over the usable events, raw iterate
    averaged: float
    distance: float  # ||w_raw - w_avg||
    allowance: float  # the raw iterate's noise allowance (see raw_persistently_worse)

    def after(self, event: int) -> int:
        """Index of the first window event held out after ``event``."""
        return int(self.events.searchsorted(event, "right"))


def non_finite_update(state: RuleState) -> str | None:
    """**Non-finite update** -> rollback. Watches updates the learning kernel refused because they would
    have made the state non-finite (an overflowing gradient, say). Threshold: one. Nothing was learned
    from them, but the raw iterate that produced them is distrusted: raw := averaged."""
    return f"{state.refused} update(s) refused as non-finite" if state.refused else None


def too_far_from_average(fig: CheckFigures, limit: float) -> str | None:
    """**Distance** -> rollback. Watches ``||w_raw - w_avg||``. Threshold: ``divergence_radii`` times
    the constraint's radius (without one: times the averaged iterate's norm, at least 1). The average
    moves slowly, so a raw iterate this far from it has been thrown off by a few events."""
    return f"raw iterate {fig.distance:.3g} from the average (limit {limit:.3g})" if fig.distance > limit else None


def raw_persistently_worse(fig: CheckFigures, state: RuleState, cfg: MonitorConfig, since: int) -> str | None:
    """**Rollback** (held-out loss). Watches the mean loss of both iterates over the usable window
    events, once ``min_holdout`` are kept. Threshold: ``L_raw > (1 + rollback_margin) L_avg +
    allowance`` on ``rollback_patience`` checks in a row (one, right after a rollback by this rule,
    until ``rollback_patience`` healthy checks have passed). The allowance is the raw iterate's own
    noise, ``noise_allowance * eta * G**2 / 4``: near the optimum the covariance ``C`` of ``w - w*``
    under steps ``eta`` solves ``H C + C H = eta Cov(g)`` to first order, so the excess loss ``tr(H C)
    / 2`` is ``eta E||g||^2 / 4`` whatever the curvature (a derivation, not a citation; the tests
    check it against scikit-learn's optimum). A check does not count when the raw iterate beats the
    average on the usable events held out after event ``since`` (those of the last ``rollback_patience``
    checks): it is then following a change, not diverging."""
    if fig.n_usable < cfg.min_holdout:
        return None
    worse = fig.raw > (1.0 + cfg.rollback_margin) * fig.averaged + fig.allowance
    if worse:
        recent = fig.after(since)
        pick = fig.usable[recent:]
        if np.count_nonzero(pick) >= MIN_EVENTS:
            worse = fig.losses[0, recent:][pick].mean() >= fig.losses[1, recent:][pick].mean()
    state.worse_streak = state.worse_streak + 1 if worse else 0
    if state.worse_streak < (1 if state.alert else cfg.rollback_patience):
        return None
    return (f"held-out loss of the raw iterate {fig.raw:.4g} vs averaged {fig.averaged:.4g} (worse by more than "
            f"{cfg.rollback_margin:.0%} plus its noise allowance {fig.allowance:.3g} on {state.worse_streak} "
            "checks in a row)")


def feed_detector(detector: ChangeDetector, fig: CheckFigures) -> bool:
    """**Change alarm** (the first half of *change confirmed*). Watches, per event held out since the
    last check, whether its averaged-iterate loss exceeds the median of (a regular sample of at most
    500 of) the older window events: on a stationary feed the events are exchangeable and none was
    learned, so this is a fair coin (slightly below 1/2 while the average improves) whatever the loss,
    noise or scale; after an abrupt change nearly every new event lands above. The 0/1 values go, one
    per event, to river's Page-Hinkley test (Page 1954; mode "up", ``drift_delta`` tolerated rise,
    ``drift_threshold`` lambda, ``drift_min_events``) or ADWIN (Bifet and Gavaldà 2007,
    ``adwin_delta``). With delta 0.05 and lambda 10 a fair coin crosses lambda about once in 3,000
    values (Siegmund's approximation of the average run length: some 60,000 events at a 5% hold-out),
    9 in 10 above in about 30 values, 6 in 10 in about 200. Garbage counts too: an alarm only opens
    the question that :func:`change_confirmed` answers."""
    return detector.feed(fig.above.tolist())


def change_confirmed(fig: CheckFigures, state: RuleState, cfg: MonitorConfig) -> dict | None:
    """**Change confirmed** -> restart. Watches, once an alarm is open, the events held out *after* the
    check that raised it (fresh evidence). Threshold: at least ``MIN_FRESH`` of them usable, fewer
    than half garbage (a burst of absurd labels is a rollback matter: it ends, a change does not), and
    the averaged iterate worse on them than on the pre-alarm events, by more than ``rollback_margin``
    and at level ``drift_level`` in either of two one-sided tests: the exact sign test against the
    pre-alarm median (robust; the stronger when most events get worse) or, from 30 fresh events on,
    Welch's test of the means (B. L. Welch, 1947, "The generalization of Student's problem when several
    different population variances are involved", Biometrika 34; the stronger when a minority gets
    much worse, as when a linear model misfits a nonlinear feed). Only the average must be worse: it
    is what a restart replaces. Returns the evidence, or ``None`` (the caller dismisses the alarm after
    ``drift_confirm`` checks)."""
    fresh = fig.after(state.alarm_check)
    early = int(fig.events.searchsorted(state.alarm_from))  # events[:early]: before the alarm
    pick, before = fig.usable[fresh:], fig.usable[:early]
    n, garbage = int(np.count_nonzero(pick)), int(np.count_nonzero(~pick))
    if n < MIN_FRESH or garbage * 2 >= n + garbage or np.count_nonzero(before) < MIN_EVENTS:
        return None
    raw, avg = fig.losses
    old, new = avg[:early][before], avg[fresh:][pick]
    rise = 1.0 + cfg.rollback_margin
    ref, now = float(np.median(old)), float(np.median(new))
    above = int(np.count_nonzero(new > ref))
    p_sign = sign_test_pvalue(above, n) if now > rise * ref else 1.0
    p_mean = welch_pvalue(new, old) if n >= 30 and new.mean() > rise * old.mean() else 1.0
    if min(p_sign, p_mean) > cfg.drift_level:
        return None
    test, centre = ("sign", np.median) if p_sign <= p_mean else ("means", np.mean)
    ref, now = float(centre(old)), float(centre(new))
    return {"alarm_event": state.alarm_from, "checks": state.alarm_checks, "n": n, "above": above,
            "p": min(p_sign, p_mean), "test": test, "before_averaged": ref, "recent_averaged": now,
            "before_raw": float(centre(raw[:early][before])), "recent_raw": float(centre(raw[fresh:][pick])),
            "garbage": garbage}


def sign_test_pvalue(above: int, n: int) -> float:
    """One-sided sign test: ``P(Binomial(n, 1/2) >= above)``."""
    return sum(math.comb(n, i) for i in range(above, n + 1)) / 2.0**n if n else 1.0


def welch_pvalue(new: np.ndarray, old: np.ndarray) -> float:
    """One-sided Welch test that ``new`` has the larger mean (normal approximation of the statistic)."""
    se = math.sqrt(new.var(ddof=1) / len(new) + old.var(ddof=1) / len(old))
    return 0.5 * math.erfc((new.mean() - old.mean()) / se / math.sqrt(2.0)) if se > 0 else 1.0


def boundary_pinned(state: RuleState, on_boundary: bool, cfg: MonitorConfig) -> bool | None:
    """**Boundary pinned** -> incident and warning. Watches whether the raw iterate lies on the ball's
    boundary (its norm within 0.1% of the radius) at each check, where projected SGD keeps it when the
    unconstrained optimum lies outside. Threshold: a share ``boundary_share`` of the last
    ``boundary_checks`` checks. The certificate then speaks of the best point *in the ball*, which may
    be a poor model. Returns ``True`` when a pinned stretch begins, ``False`` when it ends (share
    below half the threshold), else ``None``."""
    kept = state.on_boundary
    kept.append(int(on_boundary))
    del kept[:-cfg.boundary_checks]
    share = sum(kept) / cfg.boundary_checks
    if not state.boundary_open and share >= cfg.boundary_share:
        state.boundary_open = True
        return True
    if state.boundary_open and share < cfg.boundary_share / 2:
        state.boundary_open = False
        return False
    return None


def rejected_burst(state: RuleState, rejected: int, total: int, cfg: MonitorConfig) -> tuple[str, dict] | None:
    """**Rejected burst** -> incident. Watches the share of input rejected before it reached the model
    (malformed or invalid events) over the newest reports that cover ``reject_window`` events.
    Threshold: above ``reject_burst_share`` on at least ``min(reject_window, 50)`` events, one incident
    per burst (it closes below half that share); common practice, no published source. Returns the
    incident's reason and evidence when a burst begins."""
    if total <= 0:
        return None
    state.rejects.append([rejected, total])
    while len(state.rejects) > 1 and sum(t for _, t in state.rejects[1:]) >= cfg.reject_window:
        state.rejects.pop(0)  # the newest reports that cover ``reject_window`` events are enough
    bad, n = (sum(col) for col in zip(*state.rejects))
    share = bad / n
    if share < cfg.reject_burst_share / 2:
        state.reject_open = False
    if share <= cfg.reject_burst_share or n < min(cfg.reject_window, 50) or state.reject_open:
        return None
    state.reject_open = True
    return f"{bad} of the last {n} events were rejected ({share:.0%})", {"share": share}


def step_scale_change(old: float, new: float, cause: str, shrink: float) -> tuple[str, dict]:
    """The reason and evidence of a ``step_scale`` incident: the factor on later steps went from ``old``
    to ``new`` because of a ``"rollback"`` (times ``shrink``) or a ``"restart"`` (back to full size)."""
    why = (f"a rollback multiplies every later step by {shrink:g}" if cause == "rollback"
           else "a restart re-warms the step schedule at full size")
    return f"step scale {old:.6g} -> {new:.6g}: {why}", {"old": old, "new": new, "cause": cause}
