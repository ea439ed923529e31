"""What happened and how the model fares, for operators and the page: ``GET /v1/incidents`` (with
``limit`` and ``since``) and ``GET /v1/health`` (what the page at ``/`` draws). Read-only routes over the
learner's state; the common request helpers live in :mod:`service.http.handlers`."""

from __future__ import annotations

import asyncio
import math
import time

from aiohttp import web

from models import InvalidInput
from service.http.handlers import CAUTION, SERVICE, _auth, _json, _ready
from service.http.health import model_health
from service.http.pulse import PULSE

__all__ = ["health", "incidents", "merge_incidents"]

_INCIDENTS_MAX = 100_000  # a limit above any list the service keeps (the engine's and 1,000 of its own)


def _query_number(request: web.Request, name: str, kind: type, low: float, high: float):
    """Query parameter ``name`` as ``kind`` within ``[low, high]``, or ``None`` when absent."""
    text = request.query.get(name)
    if text is None:
        return None
    try:
        value = kind(text)
    except ValueError:
        value = None
    if value is None or not (low <= value <= high):  # also refuses nan and inf
        raise InvalidInput(f"{text!r} is not {'an integer' if kind is int else 'a number'} from {low:g} to {high:g}",
                           where=f"query.{name}")
    return value


def merge_incidents(engine: list[dict], service: list[dict]) -> list[dict]:
    """The engine's and the service's incidents in one list, oldest first, by ``ts``.

    The engine's keep their order (they are in event order); one without a time (an operator's
    rollback, a feed without timestamps) sorts with the one before it.
    """
    keyed, last = [], -math.inf
    for k, inc in enumerate(engine):
        last = inc["ts"] if inc.get("ts") is not None else last
        keyed.append((last, 0, k, dict(inc, source="engine")))
    for k, inc in enumerate(service):
        keyed.append((inc["ts"] if inc.get("ts") is not None else -math.inf, 1, k, dict(inc, source="service")))
    keyed.sort(key=lambda t: t[:3])
    return [t[3] for t in keyed]


async def incidents(request: web.Request) -> web.Response:
    """``GET /v1/incidents[?limit=N][&since=T]``: oldest first; ``since`` (Unix seconds) keeps those with
    ``ts >= T`` (an incident without a time is left out), ``limit`` keeps the newest ``N`` of them."""
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    limit = _query_number(request, "limit", int, 1, _INCIDENTS_MAX)
    since = _query_number(request, "since", float, 0.0, 1e11)
    ing = svc.ingestor
    if ing is None:
        out = []
    else:
        with ing.lock:
            engine = ing.engine.incidents if ing.engine else []
        out = merge_incidents(engine, list(ing.incidents))
    if since is not None:
        out = [i for i in out if i.get("ts") is not None and i["ts"] >= since]
    if limit is not None:
        out = out[-limit:]
    return _json({"incidents": out})


async def health(request: web.Request) -> web.Response:
    """``GET /v1/health``: what the page at ``/`` draws (:func:`service.http.health.model_health` with
    its series, the pulse of the last minutes, the published version)."""
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    ing = _ready(svc)
    pulse = request.app[PULSE]
    model = await asyncio.to_thread(model_health, ing, series=True)
    cfg = svc.config.service
    resp = _json({"name": svc.config.name, "now": time.time(), "started": svc.started, "model": model,
                  "version": pulse.version(ing), "pulse": dict(pulse.series(), period_s=pulse.period),
                  "queue_limit": cfg.queue_limit, "service_incidents": len(ing.incidents),
                  "open_writes": svc.token is None, "caution": CAUTION})
    resp.enable_compression()  # up to ~100 KB of numbers every 2 s per open page; about a third gzipped
    return resp
