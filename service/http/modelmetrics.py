"""The model-health families of ``/metrics``: a Prometheus collector read at every scrape.

Names follow the exposition format's conventions: a ``trimtab_`` prefix, the unit as a suffix where
there is one (``_seconds``, ``_ratio``), ``_total`` on counters. Losses are in the loss's own unit
(``squared`` is half the squared error, in the target's unit squared; ``logistic`` in nats), distances
and steps in the model's scaled coordinates. A figure that is not defined yet (a held-out loss before
the window has events, the bound of a void certificate) is exported as ``NaN``.

==========================================  =======  ==============================================
family                                      type     what
==========================================  =======  ==============================================
``trimtab_holdout_loss{iterate}``           gauge    mean loss over the held-out window, raw/averaged
``trimtab_baseline_loss{over}``             gauge    the baseline's loss, ``holdout`` / ``progressive``
``trimtab_progressive_loss``                gauge    mean loss of each event before it was learned
``trimtab_serving_iterate{iterate}``        gauge    1 for the iterate that scores serve, else 0
``trimtab_rollbacks_total{reason}``         counter  rollbacks by rule (or ``operator``)
``trimtab_restarts_total{reason}``          counter  restarts after a confirmed change
``trimtab_iterate_distance``                gauge    ``||w_raw - w_avg||`` (scaled coordinates)
``trimtab_step_size``                       gauge    the last step length
``trimtab_events_since_restart``            gauge    events applied since the last restart
``trimtab_certificate_bound``               gauge    the certificate's bound at the current T
``trimtab_certificate_applicable``          gauge    1 when a published bound applies, else 0
``trimtab_constraint_binding``              gauge    1 while the raw iterate is pinned to the boundary
``trimtab_model_version``                   gauge    journal position of the published model
``trimtab_model_age_seconds``               gauge    time since that model was published
``trimtab_holdout_accuracy_ratio{iterate}`` gauge    binary tasks: accuracy at 0.5 on the window
``trimtab_holdout_roc_auc_ratio{iterate}``  gauge    binary tasks: ROC AUC on the window
``trimtab_holdout_brier_score{iterate}``    gauge    binary tasks: Brier score on the window
==========================================  =======  ==============================================

The learner publishes the model this process scores, so there is one version per process; where
scorer processes exist, each exports its own.
"""

from __future__ import annotations

import math

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily

from service.http.health import model_health

__all__ = ["BINARY_FAMILIES", "FAMILIES", "ModelHealthCollector"]

#: every family exported once the model is loaded (name as written before a counter's ``_total``)
FAMILIES = ("trimtab_holdout_loss", "trimtab_baseline_loss", "trimtab_progressive_loss", "trimtab_serving_iterate",
            "trimtab_rollbacks", "trimtab_restarts", "trimtab_iterate_distance", "trimtab_step_size",
            "trimtab_events_since_restart", "trimtab_certificate_bound", "trimtab_certificate_applicable",
            "trimtab_constraint_binding", "trimtab_model_version", "trimtab_model_age_seconds")
#: exported for binary tasks only
BINARY_FAMILIES = ("trimtab_holdout_accuracy_ratio", "trimtab_holdout_roc_auc_ratio", "trimtab_holdout_brier_score")


def _num(x) -> float:
    return math.nan if x is None else float(x)


def _gauge(name: str, doc: str, value=None, labels: dict | None = None) -> GaugeMetricFamily:
    if labels is None:
        return GaugeMetricFamily(name, doc, value=_num(value))
    fam = GaugeMetricFamily(name, doc, labels=[next(iter(labels))])
    for label, v in labels[next(iter(labels))].items():
        fam.add_metric([label], _num(v))
    return fam


class ModelHealthCollector:
    """Reads :func:`service.http.health.model_health` and the app's pulse at every scrape.

    Parameters
    ----------
    service
        The app's :class:`service.http.handlers.Service` (its ingestor appears after start-up).
    pulse
        The app's :class:`service.http.pulse.Pulse` (the published version and its age).
    """

    def __init__(self, service, pulse) -> None:
        self._service, self._pulse = service, pulse

    def describe(self):
        return []  # families appear once recovery has loaded a model: nothing to reserve before

    def collect(self):
        h = model_health(self._service.ingestor)
        if h is None:
            return
        hold, cert = h["holdout_loss"], h["certificate"]
        yield _gauge("trimtab_holdout_loss", "Mean loss over the held-out window (loss units), by iterate",
                     labels={"iterate": {"raw": hold["raw"], "averaged": hold["averaged"]}})
        yield _gauge("trimtab_baseline_loss", "The baseline's mean loss (loss units): over the held-out window or "
                     "progressive", labels={"over": {"holdout": hold["baseline"],
                                                      "progressive": h["progressive_loss"]["baseline"]}})
        yield _gauge("trimtab_progressive_loss", "Mean loss of each learned event scored before it was learned",
                     h["progressive_loss"]["model"])
        yield _gauge("trimtab_serving_iterate", "1 for the iterate scores are served from, 0 for the other",
                     labels={"iterate": {it: float(h["serving"] == it) for it in ("raw", "averaged")}})
        for kind, doc in (("rollbacks", "Rollbacks of the raw iterate, by rule (or operator)"),
                          ("restarts", "Restarts of the average after a confirmed change, by rule")):
            fam = CounterMetricFamily(f"trimtab_{kind}", doc, labels=["reason"])
            for reason, n in h[kind].items():
                fam.add_metric([reason], n)
            yield fam
        yield _gauge("trimtab_iterate_distance", "Distance between the raw and the averaged iterate (scaled "
                     "coordinates)", h["distance"])
        yield _gauge("trimtab_step_size", "Length of the last step (scaled coordinates)", h["step"])
        yield _gauge("trimtab_events_since_restart", "Events applied since the last restart of the average",
                     h["events_since_restart"])
        yield _gauge("trimtab_certificate_bound", "The certificate's bound on expected suboptimality at the current "
                     "T (NaN when no bound applies)", cert["bound"] if cert["applicable"] else None)
        yield _gauge("trimtab_certificate_applicable", "1 when a published bound applies to this run now",
                     float(bool(cert["applicable"])))
        yield _gauge("trimtab_constraint_binding", "1 while the raw iterate sits on the constraint's boundary",
                     float(h["constraint_binding"]))
        version = self._pulse.version(self._service.ingestor)
        yield _gauge("trimtab_model_version", "Journal position of the model this process scores with",
                     version["seq"] if version else h["applied_seq"])
        yield _gauge("trimtab_model_age_seconds", "Seconds since the model this process scores with was published "
                     "(to within one sampling period)", version["age_s"] if version else None)
        if h["binary"] is not None:
            b = h["binary"]
            for name, key, doc in (("trimtab_holdout_accuracy_ratio", "accuracy", "Accuracy at 0.5"),
                                   ("trimtab_holdout_roc_auc_ratio", "roc_auc", "ROC AUC"),
                                   ("trimtab_holdout_brier_score", "brier", "Brier score")):
                yield _gauge(name, f"{doc} over the held-out window, by iterate",
                             labels={"iterate": {it: b[it][key] for it in ("raw", "averaged")}})
