"""The aiohttp app: the app factory, the error middleware, the lifecycle and ``trimtab serve``.

``create_app(config)`` builds the app; its ``cleanup_ctx`` opens the journal and the label store,
starts recovery (``/readyz`` answers 503 until the newest good checkpoint is loaded and the journal
after it is re-applied), and on shutdown drains the queue and writes a final checkpoint. The
handlers are in :mod:`service.http.handlers`; the ingestion loop in :mod:`service.ingest`; body
limits in :mod:`service.http.bodies`; connection limits and timeouts in :mod:`service.http.transport`.
"""

from __future__ import annotations

import asyncio
import gc
import ipaddress
import logging
import os
import resource
import secrets
import signal
import socket
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from contextlib import suppress
from importlib.metadata import PackageNotFoundError, version

import orjson
from aiohttp import web

from service.http import handlers as h
from service.http import timeline
from service.http.modelmetrics import ModelHealthCollector
from service.http.pulse import PULSE, Pulse, pulse_context
from service.http.bodies import BodyReader
from service.http.fleet import PolicyGuard, ScorerFleet, ScorerSetup, auto_scorers, lower_learner_priority
from service.http.looplag import LoopLag
from service.http.transport import GuardedRunner, handler_options
from service.config import Config, ConfigError, load_config
from service.errors import error_response, from_http_exception
from service.events import EventValidator
from service.http.handlers import SERVICE, Service
from service.ingest import Ingestor, background_thread
from service.storage.journal import Journal, fingerprint
from service.storage.labels import LabelStore
from service.http.metrics import Metrics
from service.http.schemas import openapi_document
from service.publish.fanout import publisher_for
from service.publish.shared import SharedPublisher, capacity_for

__all__ = ["SERVICE", "Service", "create_app", "error_middleware", "resolve_token", "serve_main", "version_text"]

log = logging.getLogger("trimtab.service")

@web.middleware
async def _errors(request: web.Request, handler) -> web.StreamResponse:
    """The one place where exceptions become answers (error shape), and requests are counted."""
    svc = request.app[SERVICE]
    start = time.perf_counter()
    try:
        resp = await handler(request)
    except web.HTTPException as exc:
        if exc.status < 400:
            raise
        resp = error_response(from_http_exception(exc, request, svc.config.service.max_body_bytes))
    except Exception as exc:
        resp = error_response(exc)
    finally:
        svc.bodies.release(request)
    if resp.status in (408, 413):  # the rest of the body is not read: the connection cannot be reused
        resp.force_close()
    resource = request.match_info.route.resource
    svc.metrics.observe(resource.canonical if resource is not None else "unmatched", resp.status,
                        time.perf_counter() - start)
    return resp


#: the error middleware, shared with the scorer processes' app (:mod:`service.http.scorer`)
error_middleware = _errors


async def _lifecycle(app: web.Application):
    svc = app[SERVICE]
    cfg = svc.config.service
    journal = await asyncio.to_thread(Journal, svc.data_dir, sync=cfg.journal_sync)
    await asyncio.to_thread(journal.claim, fingerprint(svc.config))
    svc.labels = await asyncio.to_thread(LabelStore, svc.data_dir, ttl=cfg.remember_ttl_s,
                                         limit=cfg.remember_limit, sync=cfg.journal_sync)
    ing = svc.ingestor = Ingestor(svc.config, journal, svc.metrics)
    ing.publisher = svc.publisher
    m = svc.metrics
    m.watch("trimtab_queue_events", lambda: ing.queued_events)
    m.watch("trimtab_applied_seq", lambda: ing.applied_seq)
    m.watch("trimtab_model_updates", lambda: ing.engine.model.n_updates if ing.engine else 0)
    m.watch("trimtab_ready", lambda: 1.0 if ing.ready else 0.0)
    m.watch("trimtab_remembered", lambda: len(svc.labels))
    lag = svc.loop_lag = LoopLag()
    m.watch("trimtab_loop_lag_max_seconds", lambda: lag.max_s)  # since ready
    m.watch("trimtab_loop_busy_max_seconds", lambda: lag.busy_max_s)
    m.watch("trimtab_body_bytes_in_flight", lambda: svc.bodies.held)
    m.watch("trimtab_published_version", lambda: ing.published_version)
    m.watch("trimtab_published_age_seconds",
            lambda: time.time() - ing.published_wall if ing.published_version else float("nan"))

    async def recover():
        try:
            await ing.recover()
        except Exception as exc:
            svc.recovery_error = f"recovery failed: {exc}"
            log.exception("recovery failed")
            return
        lag.reset()
        if svc.config.feed is not None:  # a broker stream besides HTTP, once the journal is replayed
            from service.feeds.redis_stream import StreamFeed

            svc.feed = StreamFeed(svc.config.feed, svc.validator, ing)
            await svc.feed.run()

    async def sweep():
        while True:
            await asyncio.sleep(max(1.0, min(60.0, cfg.remember_ttl_s / 4)))
            await asyncio.to_thread(svc.labels.sweep)

    async def publish_pending():  # a state held back by service.publish_every_ms follows within it
        every = cfg.publish_every_ms / 1000.0
        while True:
            await asyncio.sleep(every)
            if ing.unpublished and ing.ready:
                await ing.learn(ing.publish_pending)

    tasks = [asyncio.create_task(recover(), name="trimtab-recovery"), asyncio.create_task(sweep()),
             asyncio.create_task(lag.run(), name="trimtab-loop-lag")]
    if svc.publisher is not None and cfg.publish_every_ms > 0:
        tasks.append(asyncio.create_task(publish_pending(), name="trimtab-publish"))
    yield
    if not tasks[0].done():
        tasks[0].cancel()
    for t in tasks[1:]:
        t.cancel()
    for t in tasks:
        with suppress(asyncio.CancelledError):
            await t
    await ing.close(final_checkpoint=svc.recovery_error is None)
    journal.close()
    svc.labels.close()


def version_text() -> str:
    """The installed package's version ("0" when run from a checkout)."""
    try:
        return version("trimtab")
    except PackageNotFoundError:
        return "0"


def resolve_token(config: Config, token: str | None = None) -> str | None:
    """The bearer token writes need, or ``None`` when ``service.auth = "none"``.

    ``token`` overrides the environment variable (tests, embedding). With ``auth = "token"`` a
    missing or empty token (or one of only spaces) is a :class:`ConfigError` that names the
    variable and the ``auth = "none"`` escape: the service never starts with writes open by accident.
    """
    cfg = config.service
    if cfg.auth == "none":
        return None
    if token is None:
        token = os.environ.get(cfg.token_env)
    escape = ('set it to a secret shared with the producers, or set service.auth = "none" to run with '
              "writes open to anyone who reaches the port")
    if token is None:
        raise ConfigError(f"the token variable ${cfg.token_env} (service.token_env) is not set; {escape}",
                          where="service.auth")
    if not token.strip() or token != token.strip():
        what = "empty" if not token.strip() else "padded with whitespace"
        raise ConfigError(f"the token in ${cfg.token_env} (service.token_env) is {what}; {escape}",
                          where="service.auth")
    return token


#: the API's routes (README "HTTP API"): method, path, handler in :mod:`service.http.handlers`
_ROUTES = (
    ("POST", "/v1/score", "score"), ("POST", "/v1/events", "post_events"), ("POST", "/v1/labels", "post_labels"),
    ("GET", "/v1/model", "model_card"), ("GET", "/v1/model/serving", "serving_model"),
    ("POST", "/v1/model/rollback", "rollback"),
    ("GET", "/v1/checkpoints", "get_checkpoints"), ("POST", "/v1/checkpoints", "post_checkpoint"),
    ("GET", "/v1/incidents", "incidents"), ("GET", "/v1/openapi.json", "openapi"), ("GET", "/metrics", "metrics"),
    ("GET", "/healthz", "healthz"), ("GET", "/readyz", "readyz"), ("GET", "/v1/health", "health"),
    ("GET", "/", "page"), ("GET", "/page/{name}", "page_asset"),
)


def create_app(config: Config, *, data_dir: str | None = None, token: str | None = None,
               publisher=None) -> web.Application:
    """The service app for ``config``; ``token`` overrides the environment variable (tests);
    ``publisher`` (a :class:`service.publish.SnapshotPublisher`) receives every new serving model.

    Raises :class:`ConfigError` when ``service.auth = "token"`` and there is no usable token
    (see :func:`resolve_token`).
    """
    token = resolve_token(config, token)
    if token is None:
        log.warning("%s", h.OPEN_WRITES)
    svc = Service(config=config, data_dir=data_dir or config.service.data_dir, token=token,
                  validator=EventValidator(config), metrics=Metrics(), bodies=BodyReader(config.service),
                  publisher=publisher)
    svc.openapi = orjson.dumps(openapi_document(config, version_text()))
    app = web.Application(middlewares=[_errors], client_max_size=config.service.max_body_bytes,
                          handler_args=handler_options(config.service))
    app[SERVICE] = svc
    expect = svc.bodies.expect  # size and encoding checked before "100 Continue" asks for the body
    for method, path, handler in _ROUTES:  # add_get answers HEAD too, as a GET route should
        add = app.router.add_get if method == "GET" else app.router.add_post
        add(path, getattr(h, handler, None) or getattr(timeline, handler), expect_handler=expect)
    app[PULSE] = Pulse()
    svc.metrics.registry.register(ModelHealthCollector(svc, app[PULSE]))
    app.cleanup_ctx.append(_lifecycle)
    app.cleanup_ctx.append(pulse_context)
    return app


def _descriptors_for(connections: int) -> None:
    """Raise the soft limit on open files to fit ``connections`` plus the service's own files, or warn."""
    want = connections + 256  # the journal, checkpoints, threads' pipes, the listening socket
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft != resource.RLIM_INFINITY and soft < want:
        target = want if hard == resource.RLIM_INFINITY else min(want, hard)
        with suppress(ValueError, OSError):
            resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
        soft = resource.getrlimit(resource.RLIMIT_NOFILE)[0]
        if soft < want:
            log.warning("open-file limit %d is below service.max_connections + 256 = %d: lower "
                        "service.max_connections or raise the limit (ulimit -n)", soft, want)


def _loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _tcp_listener(host: str, port: int) -> socket.socket:
    """The listening socket of the configured address, shared by the scorer processes."""
    family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)[0][0]
    return socket.create_server((host, port), family=family, backlog=1024)


async def _serve(config: Config, token: str | None) -> None:
    cfg = config.service
    loop = asyncio.get_running_loop()
    loop.set_default_executor(ThreadPoolExecutor(thread_name_prefix="trimtab-parse", initializer=background_thread))
    scorers = auto_scorers() if cfg.scorers == "auto" else cfg.scorers
    publisher = SharedPublisher(capacity_for(config)) if scorers > 0 else None
    app = create_app(config, token=token, publisher=publisher_for(publisher, config))  # + Redis with [publish]
    svc = app[SERVICE]
    runner = GuardedRunner(app, cfg, access_log=None, handle_signals=False)
    await runner.setup()
    svc.metrics.watch("trimtab_connections_open", lambda: runner.server.open_connections)
    _descriptors_for(cfg.max_connections)
    fleet = None
    if scorers == 0:  # one process: the learner answers the configured address itself
        site = web.TCPSite(runner, cfg.host, cfg.port, backlog=1024)
        await site.start()
        bound = runner.addresses[0]
    else:
        # the learner answers on a local socket only (an abstract Unix name: no file to leave behind);
        # the scorers take the configured address and forward what is not a score (docs/architecture.md)
        listener = _tcp_listener(cfg.host, cfg.port)
        bound = listener.getsockname()
        local = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        name = f"\0trimtab-learner-{os.getpid()}-{secrets.token_hex(6)}"
        local.bind(name)
        site = web.SockSite(runner, local, backlog=1024)
        await site.start()
        fleet = svc.fleet = ScorerFleet(scorers, ScorerSetup(
            config=config.resolved(), listen_fd=listener.fileno(), model_fd=publisher.fd, life_fd=-1,
            learner=name, parent=os.getpid()))
        fleet.start()
        svc.metrics.watch("trimtab_scorers_running", lambda: len(fleet.pids))
        svc.metrics.watch("trimtab_scorer_restarts", lambda: fleet.restarts)
        # after the fleet's thread started, and not for it: replacements keep the scorers' priority
        keep = (fleet.watcher_id(),)
        if cfg.learner_policy == "auto":
            ing, lag = svc.ingestor, svc.loop_lag
            guard = PolicyGuard(lambda: (ing.queued_events, ing.applied_seq, lag.samples), cfg.queue_limit, keep)
            lowered = guard.start()
            fleet.on_tick = guard.tick
            svc.metrics.watch("trimtab_learner_behind", lambda: guard.policy == "batch" and guard.adaptive)
            svc.metrics.watch("trimtab_learner_policy_switches", lambda: guard.switches)
        else:
            lowered = lower_learner_priority(cfg.learner_policy, keep=keep)
        log.info("learner on local socket unix:@%s; %d scorer processes on the address; learner threads: %s",
                 name[1:], scorers, lowered)
    # the objects alive now (modules, the recovered engine) never become garbage: move them out of
    # the collector's sight, and collect less often, so a full collection does not stall scoring for
    # 100+ ms while bodies are parsed (common practice for latency-bound CPython services)
    gc.collect()
    gc.freeze()
    gc.set_threshold(20_000, 20, 50)
    log.info("listening on http://%s:%d (data in %s)", bound[0], bound[1], svc.data_dir)
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)
    await stop.wait()
    if fleet is not None:  # scorers first: what they forward meanwhile is still answered here
        log.info("stopping the scorer processes")
        await asyncio.to_thread(fleet.stop)
        listener.close()
    log.info("stopping: draining the queue and writing a final checkpoint")
    await runner.cleanup()
    if svc.publisher is not None:
        svc.publisher.close()
    log.info("stopped")


def serve_main(args) -> int:
    """``trimtab serve -c CONFIG [--host H] [--port P] [--data-dir D] [--role learner|scorer] [--start-from DIR/NAME]``."""
    config = load_config(args.config)
    upd = {k: v for k, v in (("host", args.host), ("port", args.port), ("data_dir", args.data_dir)) if v is not None}
    if upd:
        config = config.model_copy(update={"service": config.service.model_copy(update=upd)})
    logging.basicConfig(level=logging.INFO, stream=sys.stderr, format="%(asctime)s %(levelname)s %(message)s")
    token = resolve_token(config)  # exits 2 (config error) when writes would be open by accident
    if not _loopback(config.service.host) and token is None:
        log.warning("binding %s (not loopback) with service.auth = \"none\": anyone who can reach it can write",
                    config.service.host)
    if getattr(args, "role", "learner") == "scorer":  # another machine: the model published to Redis
        from service.http.remote_scorer import remote_scorer_main

        return remote_scorer_main(config, token)
    if getattr(args, "start_from", None):
        from service.storage.promote import start_from

        started = start_from(config, config.service.data_dir, args.start_from)
        log.info("data dir %s starts from the replay state %s (state digest %s, %d events)", config.service.data_dir,
                 started["source"], started["state_digest"], started["events"])
    if hasattr(signal, "SIGXFSZ"):  # a file-size limit is then a write error (503 with the reason), not a kill
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    # the journal thread runs some Python (row binding) and hands the GIL back and forth around every
    # SQLite call; a short switch interval keeps any thread from holding it for the default 5 ms while
    # another waits (0.1 ms: 4-6% more ingest than 0.5 ms in three alternating pairs, 0.02 ms no better;
    # benchmarks/README.md)
    sys.setswitchinterval(0.0001)
    asyncio.run(_serve(config, token))
    return 0
