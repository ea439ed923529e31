"""A local scorer process: answers ``/v1/score`` from the newest published model, hands the rest to the learner.

Started by the learner (:mod:`service.http.fleet`), never by hand: ``python -m service.http.scorer``
reads its setup from the environment. It accepts connections on the listening socket of the
configured address, shared with the other scorers (whichever process is idle takes the next
connection), and:

* answers ``POST /v1/score`` itself, from the newest version in the publication file
  (:mod:`service.publish.shared`), checked at every request and every few milliseconds; the answer's
  ``version`` names the publication (``published``), its journal position, update count and digest.
  It parses, validates and scores with the learner's own code (:func:`service.http.handlers._score_body`),
  so answers and refusals are the learner's. A score with ``"remember": true`` keeps state: it goes
  to the learner;
* answers ``GET /v1/model/serving`` (the published version, no coefficients), ``/healthz`` and
  ``/v1/openapi.json`` itself;
* ``GET /readyz``: 503 until a model is published, then the learner's readiness with the scorer's
  version and its age added; ``GET /metrics``: the learner's exposition followed by this scorer's
  own (``trimtab_scorer_*``, labelled with the scorer's index);
* forwards every other request (writes, operator actions, the model card, unknown paths) to the
  learner over the learner's local socket: body read within the same limits, then passed on as
  bytes with its headers, never parsed here; the learner's answer is passed back as it is. The
  scorer never opens the journal.
"""

from __future__ import annotations

import asyncio
import ctypes
import gc
import logging
import os
import signal
import socket
import sys
import time

import orjson
from aiohttp import ClientSession, ClientTimeout, UnixConnector, web
from aiohttp.client_exceptions import ClientConnectorError, ClientError, ServerDisconnectedError
from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest

from service.config import config_from_dict
from service.errors import NotReady, ServiceError, error_body
from service.events import EventValidator
from service.http import handlers as h
from service.http.bodies import BodyReader
from service.http.fleet import SETUP_ENV, ScorerSetup
from service.http.handlers import SERVICE, Service
from service.http.metrics import CONTENT_TYPE, RequestCounts
from service.http.schemas import openapi_document
from service.http.transport import GuardedRunner, handler_options
from service.publish.shared import SharedReader
from service.publish.snapshot import ServingSnapshot

__all__ = ["ScorerState", "create_scorer_app", "scorer_main"]

log = logging.getLogger("trimtab.service")

_POLL_S = 0.005  # how often the publication file is checked between requests (each request checks too)
_EXIT_S = 5.0  # longest a stopping scorer waits for answers in progress
#: hop-by-hop headers, not passed on (an answer's Content-Encoding is end to end: gzip bytes stay labelled)
_HOP = frozenset({"connection", "keep-alive", "transfer-encoding", "content-length", "host",
                  "expect", "te", "trailer", "upgrade", "proxy-authorization", "proxy-connection", "date", "server"})
_BUCKETS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 1.0)


class LearnerUnreachable(ServiceError):
    status, code = 503, "learner_unreachable"


class ScorerMetrics:
    """This scorer's own metrics (``trimtab_scorer_*``), labelled with its index."""

    def __init__(self, index: int, state: ScorerState) -> None:
        r = self.registry = CollectorRegistry()
        lab = {"scorer": str(index)}
        self.observe = RequestCounts(
            Counter("trimtab_scorer_http_requests", "Requests this scorer answered or forwarded, by route and status",
                    ["scorer", "route", "status"], registry=r),
            Histogram("trimtab_scorer_http_request_seconds", "Time to answer, by route", ["scorer", "route"],
                      buckets=_BUCKETS, registry=r), fixed=(str(index),)).observe
        self.publish_to_serve = Histogram("trimtab_scorer_publish_to_serve_seconds", "From the learner taking a "
                                          "version to this scorer serving it", ["scorer"], buckets=_BUCKETS,
                                          registry=r).labels(**lab)
        Gauge("trimtab_scorer_published_version", "Publication number this scorer serves (0: none yet)",
              ["scorer"], registry=r).labels(**lab).set_function(lambda: state.version)
        Gauge("trimtab_scorer_model_age_seconds", "Seconds since the learner took the version served here",
              ["scorer"], registry=r).labels(**lab).set_function(state.age)
        Gauge("trimtab_scorer_torn_reads", "Copies of the publication file refused because the learner was "
              "writing that slot (each retried)", ["scorer"], registry=r).labels(**lab).set_function(
                  lambda: state.reader.torn)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)


class ScorerState:
    """The newest published model this scorer has, and its way to the learner."""

    def __init__(self, reader: SharedReader, learner: str, index: int, parent: int) -> None:
        self.reader = reader
        self.learner = learner
        self.parent = parent
        self.index = index
        self.snapshot: ServingSnapshot | None = None
        self.version = 0
        self.metrics: ScorerMetrics | None = None
        self.session: ClientSession | None = None

    def age(self) -> float:
        return time.time() - self.snapshot.published_at if self.snapshot is not None else float("nan")

    def current(self) -> ServingSnapshot | None:
        """The newest published version (decoded here the first time it is seen; the swap is one assignment)."""
        if self.reader.version() != self.version:
            snap = self.reader.latest()
            if snap is not None and snap.version > self.version:
                snap.model  # noqa: B018 (decode now, before the swap, not in a request later)
                first = self.snapshot is None  # published before this scorer started: not a publication delay
                self.snapshot, self.version = snap, snap.version
                if self.metrics is not None and not first:
                    self.metrics.publish_to_serve.observe(max(0.0, time.time() - snap.published_at))
        return self.snapshot

    async def poll(self) -> None:
        while True:
            self.current()
            await asyncio.sleep(_POLL_S)


SCORER = web.AppKey("scorer", ScorerState)


# -------------------------------------------------------------------- handlers
def _published(request: web.Request, why: str = "") -> tuple:
    """``(service, scorer state, newest snapshot)`` for a reader with the token; 503 before the first model."""
    svc, st = request.app[SERVICE], request.app[SCORER]
    h._auth(svc, request, write=False)
    snap = st.current()
    if snap is None:
        raise NotReady(f"not ready: no model published yet{why}", where="startup")
    return svc, st, snap


async def score(request: web.Request) -> web.Response:
    svc, st, snap = _published(request, " (the learner is recovering)")
    h._content_type(request, ("application/json",))
    body = await svc.bodies.read(request)
    snap = st.current()  # the newest once the body is in
    view = (snap.model, snap.serving, snap.seq, snap.updates)
    req, _events, _where, preds, used, _ = await h._off_loop(body, h._score_body, body, svc.validator, view,
                                                             svc.config.service.max_batch)
    if req.remember:  # remembered features are the learner's state
        return await _forward(request, body)
    out = {"scores": preds.tolist(), "iterate": used, "remembered": 0, "version": snap.answer_version}
    if req.features is not None:
        out["score"] = out["scores"][0]
    return h._json(out)


async def serving_model(request: web.Request) -> web.Response:
    _svc, st, snap = _published(request)
    return h._json(dict(snap.describe(), scorer=st.index, pid=os.getpid()))


async def readyz(request: web.Request) -> web.Response:
    st = request.app[SCORER]
    status, body, headers = await _ask_learner(request, "GET", "/readyz", b"", {})
    if status != 200:  # the learner's reason (recovering, recovery refused, storage fault)
        return web.Response(status=status, body=body, headers=headers)
    snap = st.current()
    if snap is None:
        raise NotReady("not ready: the learner is ready but no model reached this scorer yet", where="startup")
    out = orjson.loads(body)
    out["scorer"] = {"index": st.index, "version": snap.version, "age_s": st.age()}
    return h._json(out)


async def metrics(request: web.Request) -> web.Response:
    svc, st = request.app[SERVICE], request.app[SCORER]
    h._auth(svc, request, write=False)
    status, body, headers = await _ask_learner(request, "GET", "/metrics", b"", _passed(request.headers))
    if status != 200:
        return web.Response(status=status, body=body, headers=headers)
    return web.Response(body=body + st.metrics.exposition(), headers={"Content-Type": CONTENT_TYPE})


async def forward(request: web.Request) -> web.StreamResponse:
    svc = request.app[SERVICE]
    body = await svc.bodies.read(request) if request.can_read_body else b""
    return await _forward(request, body)


async def _forward(request: web.Request, body: bytes) -> web.Response:
    status, data, headers = await _ask_learner(request, request.method, request.raw_path, body,
                                               _passed(request.headers))
    resp = web.Response(status=status, body=data if request.method != "HEAD" else None, headers=headers)
    return resp


def _passed(headers) -> dict:
    # the scorer has already undone the request body's Content-Encoding (to hold it to the size limits)
    return {k: v for k, v in headers.items() if k.lower() not in _HOP and k.lower() != "content-encoding"}


async def _ask_learner(request: web.Request, method: str, path: str, body: bytes, headers: dict):
    """The learner's answer ``(status, body, headers)`` to a request passed on as bytes.

    A learner that cannot be reached is a 503 (nothing was sent: retrying is safe). A learner that
    goes away after the request was sent leaves its outcome unknown, as it would be to a client
    connected to the learner itself: the client's connection is cut without an answer (a retry
    with the same ids is safe, duplicates are recognised)."""
    st = request.app[SCORER]
    for attempt in (1, 2):
        try:
            async with st.session.request(method, "http://learner" + path, data=body or None, headers=headers,
                                          allow_redirects=False, auto_decompress=False) as r:
                data = await r.read()
                out = {k: v for k, v in r.headers.items() if k.lower() not in _HOP}
                return r.status, data, out
        except ClientConnectorError as exc:
            raise LearnerUnreachable(f"the learner process does not answer ({exc.__class__.__name__}); retry "
                                     "shortly", where="learner") from None
        except ServerDisconnectedError:
            # the learner closes only connections with no request in progress: while it lives, this was a
            # pooled connection it had just closed as idle, and the request never reached it
            if attempt == 1 and os.getppid() == st.parent:
                continue
            break
        except (ClientError, OSError):
            break
    if request.transport is not None:
        request.transport.abort()  # the answer below goes nowhere: the client sees its connection cut
    return 503, orjson.dumps(error_body("learner_gone", "the learner went away while answering", "learner")), {}


# -------------------------------------------------------------------- app and process
def create_scorer_app(config, token: str | None, state: ScorerState) -> web.Application:
    """The scorer's app: the learner's middleware, body limits and transport guards, its own routes."""
    from service.http.app import error_middleware, version_text  # the learner's app module: one middleware

    svc = Service(config=config, data_dir=config.service.data_dir, token=token, validator=EventValidator(config),
                  metrics=None, bodies=BodyReader(config.service))
    state.metrics = svc.metrics = ScorerMetrics(state.index, state)
    svc.openapi = orjson.dumps(openapi_document(config, version_text()))
    app = web.Application(middlewares=[error_middleware], client_max_size=config.service.max_body_bytes,
                          handler_args=handler_options(config.service))
    app[SERVICE] = svc
    app[SCORER] = state
    expect = svc.bodies.expect
    app.router.add_post("/v1/score", score, expect_handler=expect)
    app.router.add_get("/v1/model/serving", serving_model, expect_handler=expect)
    app.router.add_get("/readyz", readyz, expect_handler=expect)
    app.router.add_get("/healthz", h.healthz, expect_handler=expect)
    app.router.add_get("/v1/openapi.json", h.openapi, expect_handler=expect)
    app.router.add_get("/metrics", metrics, expect_handler=expect)
    app.router.add_route("*", "/{tail:.*}", forward, expect_handler=expect)

    async def lifecycle(app: web.Application):
        # pooled connections are dropped well before the learner closes them as idle (keepalive_timeout_s)
        keep = min(5.0, config.service.keepalive_timeout_s / 2)
        state.session = ClientSession(connector=UnixConnector(path=state.learner, limit=256, keepalive_timeout=keep),
                                      timeout=ClientTimeout(total=None, connect=5.0), auto_decompress=False)
        poll = asyncio.create_task(state.poll(), name="trimtab-scorer-poll")
        yield
        poll.cancel()
        await state.session.close()

    app.cleanup_ctx.append(lifecycle)
    return app


def _die_with_parent(parent: int) -> None:
    """SIGTERM when the learner exits (Linux ``PR_SET_PDEATHSIG``); exit now if it already has."""
    if sys.platform.startswith("linux"):
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGTERM, 0, 0, 0)  # 1 = PR_SET_PDEATHSIG
    if os.getppid() != parent:
        raise SystemExit(0)


async def _run(setup: ScorerSetup) -> None:
    from service.http.app import resolve_token

    config = config_from_dict(setup.config)
    state = ScorerState(SharedReader(setup.model_fd), setup.learner, setup.index, setup.parent)
    app = create_scorer_app(config, resolve_token(config), state)
    runner = GuardedRunner(app, config.service, access_log=None, handle_signals=False)
    await runner.setup()
    sock = socket.socket(fileno=setup.listen_fd)
    site = web.SockSite(runner, sock, backlog=1024)
    await site.start()
    gc.collect()  # as the learner does: long-lived objects out of the collector's sight
    gc.freeze()
    gc.set_threshold(20_000, 20, 50)
    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)

    def learner_gone() -> None:
        if not os.read(setup.life_fd, 64):  # end of file: the learner's end of the pipe closed
            log.warning("scorer %d: the learner is gone; exiting", setup.index)
            loop.remove_reader(setup.life_fd)
            stop.set()

    loop.add_reader(setup.life_fd, learner_gone)
    await stop.wait()
    try:  # answers in progress may finish; an orphan never lingers for long
        await asyncio.wait_for(runner.cleanup(), _EXIT_S)
    except TimeoutError:
        log.warning("scorer %d: requests still open after %.0f s; exiting anyway", setup.index, _EXIT_S)


def scorer_main() -> int:
    setup = ScorerSetup.from_env(os.environ[SETUP_ENV])
    _die_with_parent(setup.parent)
    logging.basicConfig(level=logging.INFO, stream=sys.stderr,
                        format=f"%(asctime)s %(levelname)s [scorer {setup.index}] %(message)s")
    sys.setswitchinterval(0.0005)
    asyncio.run(_run(setup))
    return 0


if __name__ == "__main__":
    sys.exit(scorer_main())
