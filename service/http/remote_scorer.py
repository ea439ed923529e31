"""A scorer on another machine: ``trimtab serve -c CONFIG --role scorer`` serves the model a learner
publishes to Redis (``[publish]``, :mod:`service.publish.redis_channel`).

It never opens the journal and holds no state of its own but the newest model it has read:

* a follower thread (:class:`ModelFollower`) waits for a publication notice or ``[publish] poll_ms``,
  then reads the hash's version and the learner's last sign of life in one round trip, and fetches
  and decodes a new version before swapping it in (one assignment: a request scores with one whole
  version); a lost connection is retried with a doubling wait up to ``[publish] reconnect_max_s``,
  and the last good version keeps being served meanwhile;
* ``POST /v1/score`` scores with the learner's own parsing, validation and compiled scorer, and its
  answer's ``version`` names the publication (``published``), journal position, update count and
  state digest; ``"remember": true`` is refused (remembered features are the learner's state);
* ``GET /v1/model/serving``: the version served (no coefficients), its age and staleness;
* ``GET /readyz``: 503 until a model is read, and while the model is *stale*: not published or
  confirmed by the learner for ``[publish] max_model_age_s`` (a learner down, the Redis server out of
  reach); scores are still answered, from the last good version;
* ``GET /metrics``: this scorer's own exposition (``trimtab_remote_*``, the model's age and
  staleness among them); ``/healthz``; ``/v1/openapi.json``, which lists only the routes above;
* anything else (writes, operator actions, the model card) is answered 404 naming the learner as
  the place to send it.

Staleness compares the learner's clock (when it published or confirmed) with this machine's: keep
the clocks synchronised (NTP); a skew adds to or subtracts from the age shown.
"""

from __future__ import annotations

import asyncio
import gc
import logging
import signal
import sys
import threading
import time

import orjson
from aiohttp import web
from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

from models import InvalidInput

from service.errors import NotReady, ServiceError
from service.events import EventValidator
from service.backoff import Backoff
from service.http import handlers as h
from service.http.bodies import BodyReader
from service.http.handlers import SERVICE, Service
from service.http.metrics import CONTENT_TYPE, RequestCounts
from service.http.schemas import openapi_document
from service.http.transport import GuardedRunner, handler_options
from service.publish.redis_channel import RedisReader
from service.publish.snapshot import ServingSnapshot

__all__ = ["ModelFollower", "create_remote_scorer_app", "remote_scorer_main"]

log = logging.getLogger("trimtab.scorer")

_BUCKETS = (0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)


class LearnerRoute(ServiceError):
    status, code = 404, "learner_route"


class ModelFollower:
    """The newest version published to Redis, kept by a thread of its own.

    Parameters
    ----------
    reader : RedisReader
        The channel's reading end (blocking: used on this object's thread only).
    poll_s : float
        Longest wait between two checks of the hash.
    reconnect_max_s : float
        Longest wait between reconnection attempts.
    """

    def __init__(self, reader: RedisReader, poll_s: float, reconnect_max_s: float) -> None:
        self.reader = reader
        self.poll_s = poll_s
        self.snapshot: ServingSnapshot | None = None
        #: Unix time (learner's clock) of the newest publication or confirmation seen
        self.vouched_at = float("nan")
        self.connected = False
        self.reconnects = 0
        self.error: str | None = None
        self.on_swap = None  # called with each new snapshot (metrics)
        self._backoff = Backoff(reconnect_max_s)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="trimtab-model-follower", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(15)
        self.reader.close()

    @property
    def version(self) -> int:
        return self.snapshot.version if self.snapshot is not None else 0

    def staleness(self, now: float | None = None) -> float:
        """Seconds since the learner last published or confirmed the model (NaN before the first)."""
        return (time.time() if now is None else now) - self.vouched_at

    def _run(self) -> None:
        first = True
        while not self._stop.is_set():
            try:
                if not first:
                    self.reader.wait(self.poll_s)
                first = False
                self._check()
                self.connected, self.error = True, None
                self._backoff.reset()
            except Exception as exc:  # the server away or a broken connection: keep serving, retry
                self.error = f"{type(exc).__name__}: {exc}"
                if self.connected or self._backoff.failures == 0:
                    log.warning("Redis %s: %s; serving version %d meanwhile", self.reader.key, self.error,
                                self.version)
                self.connected = False
                self.reconnects += 1
                self.reader.reset()
                self._stop.wait(self._backoff.next_wait())

    def _check(self) -> None:
        version, beat = self.reader.signs()
        held = self.snapshot
        if version and (held is None or version != held.version):
            snap = self.reader.latest()
            # a lower number on the server means its data was lost and the learner began again at 1:
            # take it if it is newer by the learner's clock (never an older model)
            if snap is not None and (held is None or snap.version > held.version
                                     or snap.published_at > held.published_at):
                if held is None:  # load the compiled scorer now, not in the first request (about 1 s)
                    snap.score([{}])
                self.snapshot = snap
                if self.on_swap is not None:
                    self.on_swap(snap)
        if self.snapshot is not None:
            self.vouched_at = max(self.snapshot.published_at, beat / 1e6 if beat else 0.0)


class RemoteMetrics:
    """This scorer's metrics (``trimtab_remote_*``) in its own registry."""

    def __init__(self, follower: ModelFollower) -> None:
        r = self.registry = CollectorRegistry()
        self.observe = RequestCounts(
            Counter("trimtab_remote_http_requests", "Requests answered, by route and status", ["route", "status"],
                    registry=r),
            Histogram("trimtab_remote_http_request_seconds", "Time to answer, by route", ["route"],
                      buckets=_BUCKETS, registry=r)).observe
        self.publish_to_serve = Histogram("trimtab_remote_publish_to_serve_seconds", "From the learner taking a "
                                          "version to this scorer serving it (learner's and this machine's clocks)",
                                          buckets=_BUCKETS, registry=r)
        Gauge("trimtab_remote_published_version", "Publication number served (0: none yet)",
              registry=r).set_function(lambda: follower.version)
        Gauge("trimtab_remote_model_age_seconds", "Seconds since the learner took the version served",
              registry=r).set_function(lambda: time.time() - follower.snapshot.published_at
                                       if follower.snapshot is not None else float("nan"))
        Gauge("trimtab_remote_model_staleness_seconds", "Seconds since the learner last published or confirmed "
              "the version served; /readyz answers 503 past publish.max_model_age_s",
              registry=r).set_function(follower.staleness)
        Gauge("trimtab_remote_redis_connected", "1 while the last check of the Redis hash succeeded",
              registry=r).set_function(lambda: 1.0 if follower.connected else 0.0)
        Gauge("trimtab_remote_reconnects", "Failed checks of the Redis hash (each followed by a wait and a retry)",
              registry=r).set_function(lambda: follower.reconnects)
        Gauge("trimtab_remote_refused_copies", "Copies of the model that did not decode (each re-read later)",
              registry=r).set_function(lambda: follower.reader.refused)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)


FOLLOWER = web.AppKey("follower", ModelFollower)


def _model(request: web.Request) -> ServingSnapshot:
    snap = request.app[FOLLOWER].snapshot
    if snap is None:
        raise NotReady("not ready: no model read from Redis yet (none published, or the server is out of reach)",
                       where="startup")
    return snap


async def score(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    h._auth(svc, request, write=False)
    snap = _model(request)  # one version for the whole request
    h._content_type(request, ("application/json",))
    body = await svc.bodies.read(request)
    view = (snap.model, snap.serving, snap.seq, snap.updates)
    req, _events, _where, preds, used, _ = await h._off_loop(body, h._score_body, body, svc.validator, view,
                                                             svc.config.service.max_batch)
    if req.remember:
        raise InvalidInput("a scorer started with --role scorer keeps no features: send scores with "
                           "\"remember\": true to the learner", where="remember")
    out = {"scores": preds.tolist(), "iterate": used, "remembered": 0, "version": snap.answer_version}
    if req.features is not None:
        out["score"] = out["scores"][0]
    return h._json(out)


def _freshness(request: web.Request) -> dict:
    f, cfg = request.app[FOLLOWER], request.app[SERVICE].config.publish
    return {"version": f.version, "staleness_s": round(f.staleness(), 3), "max_model_age_s": cfg.max_model_age_s,
            "redis_connected": f.connected, "error": f.error}


async def serving_model(request: web.Request) -> web.Response:
    h._auth(request.app[SERVICE], request, write=False)
    snap = _model(request)
    return h._json(dict(snap.describe(), remote=_freshness(request)))


async def readyz(request: web.Request) -> web.Response:
    _model(request)
    fresh = _freshness(request)
    if not fresh["staleness_s"] <= fresh["max_model_age_s"]:
        raise NotReady(f"not ready: the model served (version {fresh['version']}) was last published or confirmed "
                       f"by the learner {fresh['staleness_s']:.1f} s ago, over publish.max_model_age_s = "
                       f"{fresh['max_model_age_s']:g} (scores are still answered from it)", where="publish")
    return h._json({"ready": True, "role": "scorer", "remote": fresh})


async def metrics(request: web.Request) -> web.Response:
    h._auth(request.app[SERVICE], request, write=False)
    return web.Response(body=request.app[SERVICE].metrics.exposition(), headers={"Content-Type": CONTENT_TYPE})


async def learner_only(request: web.Request) -> web.Response:
    raise LearnerRoute(f"{request.method} {request.path} is not served by a scorer (--role scorer): send it to the "
                       "learner", where="path")


def create_remote_scorer_app(config, token: str | None, follower: ModelFollower) -> web.Application:
    """The remote scorer's app for ``config`` (which must have ``[publish]``), reading through ``follower``
    (started and stopped with the app)."""
    from service.http import app as learner_app  # one error middleware and version for both roles

    svc = Service(config=config, data_dir=config.service.data_dir, token=token, validator=EventValidator(config),
                  metrics=None, bodies=BodyReader(config.service))
    svc.metrics = RemoteMetrics(follower)
    follower.on_swap = lambda snap: svc.metrics.publish_to_serve.observe(max(0.0, time.time() - snap.published_at))
    app = web.Application(middlewares=[learner_app.error_middleware], client_max_size=config.service.max_body_bytes,
                          handler_args=handler_options(config.service))
    app[SERVICE] = svc
    app[FOLLOWER] = follower
    expect = svc.bodies.expect
    app.router.add_post("/v1/score", score, expect_handler=expect)
    gets = (("/v1/model/serving", serving_model), ("/readyz", readyz), ("/healthz", h.healthz),
            ("/v1/openapi.json", h.openapi), ("/metrics", metrics))
    for path, handler in gets:
        app.router.add_get(path, handler, expect_handler=expect)
    # the document lists what this role answers, not the learner's routes (those are refused here)
    served = {"/v1/score": ("post",), **{path: ("get",) for path, _ in gets}}
    svc.openapi = orjson.dumps(openapi_document(config, learner_app.version_text(), served=served))
    app.router.add_route("*", "/{tail:.*}", learner_only, expect_handler=expect)

    async def lifecycle(app: web.Application):
        follower.start()
        yield
        await asyncio.to_thread(follower.stop)

    app.cleanup_ctx.append(lifecycle)
    return app


async def _serve(app: web.Application, host: str, port: int) -> None:
    runner = GuardedRunner(app, app[SERVICE].config.service, access_log=None, handle_signals=False)
    await runner.setup()
    site = web.TCPSite(runner, host, port, backlog=1024)
    await site.start()
    gc.collect()  # as the learner does: long-lived objects out of the collector's sight
    gc.freeze()
    gc.set_threshold(20_000, 20, 50)
    bound = runner.addresses[0]
    log.info("scorer listening on http://%s:%d (model from Redis %s)", bound[0], bound[1],
             app[FOLLOWER].reader.key)
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    await stop.wait()
    await runner.cleanup()


def remote_scorer_main(config, token: str | None) -> int:
    """Run a remote scorer for ``config`` (host and port overrides applied) until SIGTERM or SIGINT."""
    from service.config import ConfigError

    pub = config.publish
    if pub is None:
        raise ConfigError("--role scorer reads the model a learner publishes to Redis: add a [publish] section "
                          "with source = \"redis://...\" (the learner's too)", where="publish")
    follower = ModelFollower(RedisReader(pub.source, config.publish_key()), pub.poll_ms / 1000.0,
                             pub.reconnect_max_s)
    sys.setswitchinterval(0.0005)
    asyncio.run(_serve(create_remote_scorer_app(config, token, follower), config.service.host, config.service.port))
    return 0
