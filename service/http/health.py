"""The model's health at one moment: the figures ``/metrics`` exports and the page at ``GET /`` draws.

:func:`model_health` reads the engine under the learner's lock (call it from a worker thread, never
the event loop) and returns plain numbers and words: held-out loss of both iterates and of the
baseline, progressive loss, the serving iterate, rollbacks and restarts by reason, the distance
between the raw and the averaged iterate, the step size, events since the last restart, the
certificate (with its meaning in plain words, :func:`certificate_words`), whether the constraint is
binding, and for binary tasks accuracy at 0.5, ROC AUC and Brier score over the held-out window
(:mod:`models.binary_metrics`). It reuses what the engine and its monitor already keep; nothing here
changes learned state.

The series of the page come from the engine's check records (``Engine.trace``, one per monitor check,
bounded and saved in checkpoints), thinned to a fixed number of points by the report's own
:func:`service.replay.plotdata.thin_trace`.
"""

from __future__ import annotations

import math

import numpy as np

from models.binary_metrics import binary_metrics
from service.replay.plotdata import NUMERIC_KEYS, thin_trace

__all__ = ["PAGE_KEYS", "RESTART_REASONS", "ROLLBACK_REASONS", "certificate_words", "incident_reason", "model_health"]

#: label values of the rollback counter: the monitor's rules (``service/monitor/rules.py``) and operators
ROLLBACK_REASONS = ("non_finite_update", "too_far_from_average", "raw_persistently_worse", "operator")
#: label values of the restart counter (one rule restarts: a change confirmed on held-out loss)
RESTART_REASONS = ("change_confirmed",)

#: points per series sent to the page: two per stretch (its low and its high), 240 stretches (a chart
#: is at most about 900 pixels wide)
PAGE_BUCKETS = 240
#: the check-record columns the page draws
PAGE_KEYS = ("holdout_raw", "holdout_avg", "baseline_holdout", "progressive_loss", "baseline_progressive", "step",
             "distance")
_MARKS = 500  # rollbacks and restarts marked on the page's event axis (the newest)

# the start of each rule's reason text in service/monitor/rules.py, for the counters' reason label
_RULE_WORDS = (("non_finite_update", "update(s) refused as non-finite"),
               ("too_far_from_average", "from the average (limit"),
               ("raw_persistently_worse", "held-out loss of the raw iterate"))


def incident_reason(incident: dict) -> str:
    """The short reason label of an engine incident (a rule's name, ``operator`` or the restart rule).

    A rollback the monitor decided carries ``restored_from`` in its evidence (``None`` when there was
    no trusted copy to restore); an operator's rollback does not.
    """
    if incident["kind"] == "restart":
        return "change_confirmed"
    if "restored_from" not in incident.get("evidence", {}):
        return "operator"
    reason = incident.get("reason", "")
    for label, words in _RULE_WORDS:
        if words in reason:
            return label
    return "raw_persistently_worse"


def certificate_words(cert: dict, *, binding: bool = False) -> str:
    """The certificate in one or two plain sentences (for the page and the model card's readers)."""
    if not cert.get("applicable"):
        why = cert.get("reason") or "its conditions are not met"
        return f"No guarantee applies now: {why}."
    scope = cert.get("scope") or "the whole feed"
    words = (f"If the events of {scope} come from one unchanging distribution, the averaged model's expected "
             f"loss is within {cert['bound']:.3g} (loss units) of the best model inside the constraint set, after "
             f"{cert['T']:,} updates (step rule {cert['rule']}).")
    if cert.get("G_estimated"):
        words += " The gradient bound G is estimated from the feed, so the figure is indicative, not proven."
    if binding:
        words += " The constraint is binding: the best model may lie outside it."
    return words + " A drifting feed voids it."


def _finite(x) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None


def _window_binary(engine) -> dict | None:
    """Accuracy at 0.5, ROC AUC and Brier score of both iterates over the held-out window (binary only)."""
    mon = engine.monitor
    if engine.config.model.task != "binary" or mon is None or len(mon.window) == 0:
        return None
    rows, labels, _ = mon.window.view()
    margins = engine.model.score_rows_both(rows)
    out = {}
    for k, iterate in enumerate(("raw", "averaged")):
        p = 0.5 * (1.0 + np.tanh(0.5 * margins[k]))  # the model's own link (LinearModel.predict_rows)
        out[iterate] = binary_metrics(labels, p).to_dict()
    return out


def _columns(trace: list[dict]) -> dict:
    cols = {"event": [r["event"] for r in trace], "serving": [r.get("serving") for r in trace]}
    for key in NUMERIC_KEYS:
        cols[key] = [math.nan if r.get(key) is None else r[key] for r in trace]
    return cols


def model_health(ing, *, series: bool = False) -> dict | None:
    """The model's health now (``None`` before recovery has loaded an engine).

    Parameters
    ----------
    ing
        The service's :class:`service.ingest.Ingestor`; its lock is taken while the engine is read.
    series
        Also return the check records thinned for drawing (``checks``) and the engine's incidents.
    """
    if ing is None or ing.engine is None:
        return None
    with ing.lock:
        eng = ing.engine
        model = eng.model
        holdout = eng.holdout_losses()
        mon = eng.monitor
        binding = bool(mon is not None and mon.state.boundary_open)
        cert = eng.certificate()
        restarted = mon.restarted_at if mon is not None else None
        incidents = eng.incidents
        out = {
            "task": eng.config.model.task, "loss": eng.config.model.loss, "serving": eng.serving,
            "events": eng.events, "learned": eng.learned, "held_out": eng.held_out, "rejected": eng.rejected,
            "refused": eng.refused, "updates": model.n_updates,
            "events_since_restart": eng.events - (restarted or 0), "restarted_at": restarted,
            "holdout_loss": {"raw": _finite(holdout["raw"]), "averaged": _finite(holdout["averaged"]),
                             "baseline": _finite(eng.baseline.holdout_loss())},
            "progressive_loss": {"model": _finite(eng.progressive_loss),
                                 "baseline": _finite(eng.baseline.progressive_loss)},
            "distance": _finite(model.distance()), "step": _finite(model.last_step), "step_scale": model.step_scale,
            "certificate": {**cert, "words": certificate_words(cert, binding=binding)},
            "constraint_binding": binding, "binary": _window_binary(eng), "warnings": eng.warnings,
            "applied_seq": ing.applied_seq,
        }
        trace = list(eng.trace) if series else None
    reasons = {"rollback": dict.fromkeys(ROLLBACK_REASONS, 0), "restart": dict.fromkeys(RESTART_REASONS, 0)}
    for inc in incidents:
        if inc["kind"] in reasons:
            label = incident_reason(inc)
            reasons[inc["kind"]][label] = reasons[inc["kind"]].get(label, 0) + 1
    out["rollbacks"], out["restarts"] = reasons["rollback"], reasons["restart"]
    if series:
        thinned = thin_trace(_columns(trace), PAGE_BUCKETS)
        out["checks"] = {key: {"event": thinned[key][0].tolist(), "value": thinned[key][1].tolist()}
                         for key in PAGE_KEYS}
        out["marks"] = [{"kind": i["kind"], "event": i["event"], "reason": i["reason"],
                         "label": incident_reason(i)} for i in incidents if i["kind"] in reasons][-_MARKS:]
    return out
