"""Prometheus metrics of one app, in its own registry (two apps in one process never share counters).

Exposed at ``GET /metrics`` in the Prometheus text exposition format, written by the standard
client library (``prometheus_client``).
"""

from __future__ import annotations

from collections.abc import Callable

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Gauge, Histogram, generate_latest

__all__ = ["CONTENT_TYPE", "Metrics", "RequestCounts"]

CONTENT_TYPE = CONTENT_TYPE_LATEST

_FAST = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
_SLOW = (0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)


class RequestCounts:
    """Requests counted by route and status, and their time to answer by route: one counter and one
    histogram, with their children cached (``labels()`` is the costly part of counting a request).

    Parameters
    ----------
    requests, latency
        A counter labelled ``[*fixed, "route", "status"]`` and a histogram labelled ``[*fixed, "route"]``.
    fixed
        Values of the leading labels every request shares (a scorer's index), if any.
    """

    def __init__(self, requests: Counter, latency: Histogram, fixed: tuple[str, ...] = ()) -> None:
        self._requests, self._latency, self._fixed = requests, latency, fixed
        self._children: dict = {}

    def observe(self, route: str, status: int, seconds: float) -> None:
        """Count one answered request."""
        pair = self._children.get((route, status))
        if pair is None:
            pair = (self._requests.labels(*self._fixed, route, str(status)), self._latency.labels(*self._fixed, route))
            self._children[(route, status)] = pair
        pair[0].inc()
        pair[1].observe(seconds)


class Metrics:
    """The service's counters, gauges and histograms."""

    def __init__(self) -> None:
        r = self.registry = CollectorRegistry()
        self.requests = RequestCounts(
            Counter("trimtab_http_requests", "HTTP requests answered, by route and status", ["route", "status"],
                    registry=r),
            Histogram("trimtab_http_request_seconds", "Time to answer a request, by route", ["route"],
                      buckets=_FAST, registry=r))
        self.observe = self.requests.observe
        self.events = Counter("trimtab_events", "Events by outcome: accepted (journaled), duplicate, rejected",
                              ["outcome"], registry=r)
        self.commit_seconds = Histogram("trimtab_journal_commit_seconds", "Time to commit one chunk to the journal",
                                        buckets=_SLOW, registry=r)
        self.apply_seconds = Histogram("trimtab_apply_seconds", "Time to apply one slice of events to the model",
                                       buckets=_FAST, registry=r)
        self.checkpoints = Counter("trimtab_checkpoints", "Checkpoints written", registry=r)
        self.overloaded = Counter("trimtab_overload_refusals", "Requests refused with 429 (queue full)", registry=r)
        self.replayed = Counter("trimtab_recovery_rows", "Journal rows re-applied at start", registry=r)
        self._gauges = {
            name: Gauge(name, doc, registry=r) for name, doc in (
                ("trimtab_queue_events", "Events accepted but not yet applied"),
                ("trimtab_applied_seq", "Journal position the model has applied"),
                ("trimtab_model_updates", "SGD updates the model has made"),
                ("trimtab_ready", "1 once recovery has finished"),
                ("trimtab_remembered", "Scored events waiting for their label"),
                ("trimtab_loop_lag_max_seconds", "Longest the event loop was late waking a 10 ms timer since ready"),
                ("trimtab_loop_busy_max_seconds", "Longest CPU time the event loop's thread spent past a 10 ms "
                 "timer since ready (work on the loop itself)"),
                ("trimtab_body_bytes_in_flight", "Request body bytes claimed by requests being answered"),
                ("trimtab_connections_open", "Open client connections (trimtab serve only)"),
                ("trimtab_published_version", "Publication number of the newest model published for the "
                 "scorer processes (0: none, or no scorers)"),
                ("trimtab_published_age_seconds", "Seconds since the newest model was published"),
                ("trimtab_scorers_running", "Scorer processes running"),
                ("trimtab_scorer_restarts", "Scorer processes started to replace one that exited"),
                ("trimtab_learner_behind", "1 while the learner's threads run under SCHED_BATCH because it fell "
                 "behind (service.learner_policy = \"auto\")"),
                ("trimtab_learner_policy_switches", "Switches of the learner's scheduling policy between SCHED_IDLE "
                 "and SCHED_BATCH (service.learner_policy = \"auto\")"),
            )}

    def watch(self, name: str, fn: Callable[[], float]) -> None:
        """Read gauge ``name`` from ``fn`` at every scrape."""
        self._gauges[name].set_function(fn)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)
