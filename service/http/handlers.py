"""The route handlers of the HTTP API (docs/http.md) (the app factory is in :mod:`service.http.app`).

Every route that changes state (``/v1/events``, ``/v1/labels``, ``/v1/score`` with ``"remember":
true``, ``/v1/model/rollback``, ``POST /v1/checkpoints``) needs ``Authorization: Bearer <token>``;
a missing or a wrong token is answered 401 (RFC 6750: both are an authentication failure, the
message says which). The app factory refuses to build an app without a token unless
``service.auth = "none"``, which opens writes and says so on the model card. Reads need the token
too when ``service.token_for_reads`` is true (``/v1/health``, what the page at ``/`` draws, is a
read); ``/healthz``, ``/readyz``, ``/v1/openapi.json`` and the page's files never do. Bodies are read through :class:`service.http.bodies.BodyReader` (size limit per route,
in-flight budget, deadline, ``Content-Encoding``); those over 16 KiB are parsed on a worker thread, so
``/v1/score`` keeps answering while a large batch is validated. Scoring never adds to the model's
categorical values.
"""

from __future__ import annotations

import asyncio
import hmac
import time
from dataclasses import dataclass, field

import orjson
from aiohttp import web

from models import InvalidInput

from service.config import Config
from service.http.bodies import BodyReader
from service.errors import (JournalUnavailable, NotReady, PayloadTooLarge, Unauthorized, UnsupportedMediaType,
                            error_response)
from service.events import Event, EventValidator, Rejection, check_id, parse_ndjson
from service.ingest import Ingestor, encode_event
from service.publish import take_snapshot
from service.warmup import STARTING
from service.storage.labels import LabelStore
from service.http.metrics import CONTENT_TYPE, Metrics
from service.http.page import page, page_asset
from service.http.schemas import EventIn, EventsBody, LabelIn, LabelsBody, RollbackRequest, ScoreRequest, envelope, parse_json

__all__ = [
    "OPEN_WRITES", "SERVICE", "Service", "get_checkpoints", "healthz",
    "metrics", "model_card", "openapi", "page", "page_asset", "post_checkpoint", "post_events", "post_labels",
    "readyz", "rollback", "score", "serving_model",
]

_INLINE_BYTES = 16 * 1024  # bodies parsed on the loop itself (~100 events, < 1 ms); larger ones on a thread


@dataclass
class Service:
    """Everything the handlers share (one per app)."""

    config: Config
    data_dir: str
    token: str | None  # None only with service.auth = "none"
    validator: EventValidator
    metrics: Metrics
    ingestor: Ingestor | None = None
    labels: LabelStore | None = None
    recovery_error: str | None = None
    feed: object | None = None  # service.feeds.redis_stream.StreamFeed when [feed] is configured
    publisher: object | None = None  # service.publish.SnapshotPublisher when scorer processes run
    fleet: object | None = None  # service.http.fleet.ScorerFleet when scorer processes run
    bodies: BodyReader | None = None  # set by the app factory
    loop_lag: object | None = None  # service.http.looplag.LoopLag, sampling the event loop once started
    card_lock: asyncio.Lock = field(default_factory=asyncio.Lock)
    card_cache: tuple | None = None  # (state key, serialized model card)
    openapi: bytes = b""
    started: float = field(default_factory=time.time)


SERVICE = web.AppKey("service", Service)


def _json(data, status: int = 200) -> web.Response:
    return web.Response(body=orjson.dumps(data, option=orjson.OPT_SERIALIZE_NUMPY), status=status,
                        content_type="application/json")


def _auth(svc: Service, request: web.Request, write: bool) -> None:
    if svc.token is None or not (write or svc.config.service.token_for_reads):
        return
    given = request.headers.get("Authorization")
    env = svc.config.service.token_env
    if not given:
        raise Unauthorized(f"this route needs 'Authorization: Bearer <token>' (the token in ${env})",
                           where="Authorization")
    scheme, _, token = given.partition(" ")
    if scheme.lower() != "bearer" or not hmac.compare_digest(token.strip().encode("utf-8", "surrogatepass"),
                                                             svc.token.encode("utf-8", "surrogatepass")):
        raise Unauthorized(f"wrong token (expected 'Bearer <token>' with the token in ${env})", where="Authorization")


def _ready(svc: Service) -> Ingestor:
    ing = svc.ingestor
    if ing is None or not ing.ready:
        if svc.recovery_error or ing is None:
            state = svc.recovery_error or "starting"
        elif ing.recovery["state"] in STARTING:
            state = STARTING[ing.recovery["state"]]
        else:
            r = ing.recovery
            state = (f"{r['state']} (checkpoint at position {r['checkpoint']}, "
                     f"{r['replayed']} journal rows re-applied)")
        raise NotReady(f"not ready: {state}", where="startup")
    return ing


def _content_type(request: web.Request, allowed: tuple[str, ...]) -> str:
    ctype = request.content_type
    if ctype not in allowed and not (ctype.endswith("+json") and "application/json" in allowed):
        raise UnsupportedMediaType(f"content type {ctype!r} not accepted here (use {' or '.join(allowed)})",
                                   where="Content-Type")
    return ctype


async def _off_loop(body: bytes, fn, *args):
    """Parse small bodies inline, large ones on a worker thread (the loop keeps answering scores)."""
    if len(body) < _INLINE_BYTES:
        return fn(*args)
    return await asyncio.to_thread(fn, *args)


def _nonblank_lines(body: bytes) -> int:
    return sum(1 for line in body.split(b"\n") if line.strip())


def _too_many(n: int, limit: int, what: str) -> None:
    if n > limit:
        raise PayloadTooLarge(f"{n} {what} in one request, over the {limit}-item limit (service.max_batch)",
                              where="body")


# -------------------------------------------------------------------- scoring
def _score_body(body: bytes, v: EventValidator, view: tuple, max_batch: int):
    """Parse, validate and score one body (on a worker thread when large)."""
    obj = parse_json(body)
    req = envelope(ScoreRequest, obj)
    if req.events is not None:
        _too_many(len(req.events), max_batch, "events")
    return req, *_score(obj, req, v, view)


def _score(obj: dict, req: ScoreRequest, v: EventValidator, view: tuple):
    if req.features is not None:
        events = [v.validate({k: obj[k] for k in ("id", "ts", "features") if k in obj}, "")]
        where = [""]
    else:
        where = [f"events[{i}]" for i in range(len(req.events))]
        events = [v.validate(e, w) for e, w in zip(req.events, where)]
    model, serving, seq, updates = view
    used = req.iterate or serving
    # scoring never adds a categorical value to the model's values seen (the hash needs no memory)
    preds = model.predict_rows(model.rows([e.features for e in events], remember=False), used)
    return events, where, preds, used, {"seq": seq, "updates": updates}


async def score(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    ing = _ready(svc)
    _content_type(request, ("application/json",))
    body = await svc.bodies.read(request)
    # the view is a copy published by the learner: no lock, no waiting, safe on a worker thread too
    req, events, where, preds, used, version = await _off_loop(body, _score_body, body, svc.validator, ing.view,
                                                               svc.config.service.max_batch)
    remembered = 0
    if req.remember:  # remembered features are state: another client's label would join them
        _auth(svc, request, write=True)
        for e, w in zip(events, where):
            if e.id is None:
                raise InvalidInput("required when remember is true", where=f"{w}.id" if w else "id")
        await asyncio.to_thread(svc.labels.remember, [(e.id, e.ts, e.features) for e in events])
        remembered = len(events)
    out = {"scores": preds.tolist(), "iterate": used, "remembered": remembered, "version": version}
    if req.features is not None:
        out["score"] = out["scores"][0]
    return _json(out)


# -------------------------------------------------------------------- learning
def _parse_ndjson(body: bytes, v: EventValidator):
    """NDJSON through the validator's fast path (run on a worker thread)."""
    events, rejected, lines = parse_ndjson(body, v)
    # positions count from 0 like array indices (``duplicates``); line numbers count from 1
    return events, [encode_event(e) for e in events], rejected, [n - 1 for n in lines]


def _parse_array(body: bytes, v: EventValidator, limit: int):
    """A JSON array, each item validated as :class:`EventIn` (whose rules are the validator's)."""
    arr = envelope(EventsBody, parse_json(body)).root
    _too_many(len(arr), limit, "events")
    events, payloads, rejected, where = [], [], [], []
    for i, obj in enumerate(arr):
        try:
            e = EventIn.model_validate(obj, context={"validator": v, "where": f"events[{i}]"})
        except InvalidInput as exc:
            rejected.append(Rejection(exc.where, exc.message))
            continue
        events.append(e)
        payloads.append(encode_event(e))
        where.append(i)
    return events, payloads, rejected, where


async def _ingest(svc: Service, events: list[Event] | None, payloads, rejected, where, *, note: bool = True,
                  extra: dict | None = None, known: list | None = None, reserved: int = 0,
                  body=None) -> web.Response:
    """Queue valid events (and a note of the rejected ones), answer once they are journaled and applied.

    ``known``: positions already known to be duplicates (labels for ids learned before);
    ``reserved``: queue room claimed before parsing (see :meth:`Ingestor.reserve`); ``body``: an
    NDJSON body parsed into columns (:class:`service.feeds.ndjson_body.ParsedBody`) in place of
    ``events`` and ``payloads``.
    """
    ing = _ready(svc)
    n = len(body) if body is not None else len(events)
    total = n + len(rejected)
    extra = extra or {}
    svc.metrics.events.labels("rejected").inc(len(rejected))
    if total == 0:
        ing.release(reserved)
        return _json({"accepted": 0, "duplicates": known or [], "rejected": [], "seq": None,
                      "applied_seq": ing.applied_seq, **extra})
    rej = [r.as_dict() for r in rejected]
    item = ing.submit(events, payloads, note=(len(rejected), total, time.time()) if (rejected and note) else None,
                      reserved=reserved, body=body)
    receipt = await item.future
    dups = receipt.duplicates()
    svc.metrics.events.labels("accepted").inc(receipt.accepted)
    svc.metrics.events.labels("duplicate").inc(len(dups))
    out = {"accepted": receipt.accepted, "duplicates": sorted((known or []) + [where[k] for k in dups]),
           "rejected": rej, "seq": receipt.seq_range(), "applied_seq": receipt.applied_seq, **extra}
    if not n and not known:
        first = rejected[0]
        return error_response(InvalidInput(f"all {len(rejected)} item(s) were rejected; first: {first.reason}",
                                           where=first.where), rejected=rej, **extra)
    return _json(out)


async def post_events(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=True)
    ing = _ready(svc)
    ctype = _content_type(request, ("application/json", "application/x-ndjson"))
    body = await svc.bodies.read(request)
    limit = svc.config.service.max_batch
    if ctype == "application/x-ndjson":
        lines = body.count(b"\n") + 1
        if lines > limit:  # counting non-blank lines of a large body is a worker thread's job
            _too_many(await asyncio.to_thread(_nonblank_lines, body), limit, "events")
        reserved = ing.reserve(min(lines, limit))
    else:
        # every event has a "features" key: counting them bounds the batch before parsing
        reserved = ing.reserve(min(body.count(b'"features"'), limit))
    try:
        if ctype == "application/x-ndjson" and ing.parser is not None:
            parsed = await _off_loop(body, ing.parser.parse, body)
        elif ctype == "application/x-ndjson":
            parsed = await _off_loop(body, _parse_ndjson, body, svc.validator)
        else:
            parsed = await _off_loop(body, _parse_array, body, svc.validator, limit)
    except BaseException:
        ing.release(reserved)
        raise
    if not isinstance(parsed, tuple):  # columnar: one journal row of the body's accepted lines
        return await _ingest(svc, None, None, parsed.rejected, parsed.where, reserved=reserved, body=parsed)
    return await _ingest(svc, *parsed, reserved=reserved)


async def post_labels(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=True)
    _ready(svc)
    _content_type(request, ("application/json",))
    body = await svc.bodies.read(request)
    # on a worker thread: each label is a lookup in the label store and maybe the journal, whose
    # locks a commit can hold for a while; the loop never waits on them
    events, payloads, rejected, where, expired, unknown, known = await asyncio.to_thread(_labels, svc, body)
    resp = await _ingest(svc, events, payloads, rejected, where, note=False,
                         extra={"expired": expired, "unknown": unknown}, known=known)
    if events:
        await asyncio.to_thread(svc.labels.forget, [e.id for e in events])
    return resp


def _labels(svc: Service, body: bytes) -> tuple:
    """Parse a labels body and join each label with its remembered features (worker thread)."""
    arr = envelope(LabelsBody, parse_json(body)).root
    _too_many(len(arr), svc.config.service.max_batch, "labels")
    events, payloads, rejected, where, expired, unknown, known = [], [], [], [], [], [], []
    ttl = svc.config.service.remember_ttl_s
    for i, obj in enumerate(arr):
        try:
            lab = envelope(LabelIn, obj, prefix=f"labels[{i}]")
            check_id(lab.id, f"labels[{i}].id")
            target = svc.validator.target(lab.target, f"labels[{i}].target")
        except InvalidInput as exc:
            rejected.append(Rejection(exc.where, exc.message))
            continue
        state, got = svc.labels.lookup(lab.id)
        if state == "ok":
            e = Event(lab.id, got.ts, got.features, target)
            events.append(e)
            payloads.append(encode_event(e))
            where.append(i)
            continue
        if state == "unknown" and svc.ingestor.journaled(lab.id):
            known.append(i)  # learned before (its entry was forgotten then): a retry, not an error
            continue
        (expired if state == "expired" else unknown).append(lab.id)
        reason = (f"expired: scored {time.time() - got.scored_at:.0f} s ago, kept {ttl:g} s (service.remember_ttl_s)"
                  if state == "expired" else "unknown id: never scored with remember, or already forgotten")
        rejected.append(Rejection(f"labels[{i}].id", reason))
    return events, payloads, rejected, where, expired, unknown, known


# -------------------------------------------------------------------- model and operator actions
async def model_card(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    ing = _ready(svc)
    # built and serialized on a worker thread (the card holds up to 65,536 coefficients per iterate and
    # the digest hashes the whole state: 1-2 s of work that must not stall scoring), once per state:
    # requests that arrive meanwhile wait for that build instead of starting their own
    key = (id(ing.engine), ing.applied_seq, ing.checkpoint_seq, ing.engine.events, ing.engine.model.n_updates)
    async with svc.card_lock:
        if svc.card_cache is None or svc.card_cache[0] != key:
            svc.card_cache = (key, await asyncio.to_thread(_card_bytes, svc, ing))
        body = svc.card_cache[1]
    return web.Response(body=body, content_type="application/json")


async def serving_model(request: web.Request) -> web.Response:
    """The serving model's version, layout, scaling and certificate summary (no coefficients): the
    learner's current state here; a scorer answers the same route from the version it serves."""
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    ing = _ready(svc)

    def build() -> dict:
        with ing.lock:
            snap = take_snapshot(ing.engine, ing.applied_seq, ing.published_version)
        out = snap.describe()
        out["unpublished_changes"] = ing.publisher is not None and ing.unpublished
        return out

    return _json(await asyncio.to_thread(build))


def _card_bytes(svc: Service, ing: Ingestor) -> bytes:
    with ing.lock:
        card = _card(svc, ing)
    return orjson.dumps(card, option=orjson.OPT_SERIALIZE_NUMPY)


#: on the model card when ``service.auth = "none"`` (the app factory logs it at start too)
OPEN_WRITES = ('service.auth = "none": writes (events, labels, remember on score, operator actions) are open to '
               "anyone who reaches this port")

#: shown on the model card: what the scores and the certificate are, and are not, good for
CAUTION = ("Scores are decision support. The certificate bounds the expected suboptimality on a stationary "
           "feed only; drift voids it. Where food or medicine temperatures, credit or safety are at stake, keep "
           "the regulated instruments and procedures and follow local regulations and licensed practice.")


def _card(svc: Service, ing: Ingestor) -> dict:
    eng = ing.engine
    m = eng.model
    diverged = eng.divergence()
    return ({
        "name": svc.config.name, "config": svc.config.resolved(), "updates": m.n_updates,
        "updates_since_restart": m.updates_since_restart, "counters": eng.counters(), "serving": eng.serving,
        "norms": {"raw": m.norm("raw"), "averaged": m.norm("averaged")}, "distance": m.distance(),
        "step_scale": m.step_scale, "grad_bound": m.grad_bound, "certificate": eng.certificate(),
        "holdout_loss": eng.holdout_losses(), "baseline_loss": eng.baseline_loss,
        "binary_metrics": eng.binary_metrics(), "diverged": diverged,
        "warnings": eng.warnings + ([f"diverged: {diverged}"] if diverged else []),
        "state_digest": eng.state_digest,
        "journal": {"applied_seq": ing.applied_seq, "checkpoint_seq": ing.checkpoint_seq},
        "coefficients": {"raw": m.coefficients("raw"), "averaged": m.coefficients("averaged")},
        "caution": CAUTION, **({"warning": OPEN_WRITES} if svc.token is None else {})})


async def rollback(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=True)
    ing = _ready(svc)
    body = await svc.bodies.read(request)
    reason = "operator request"
    if body.strip():
        _content_type(request, ("application/json",))
        reason = envelope(RollbackRequest, parse_json(body)).reason
    receipt = await ing.submit([], [], action=("rollback", reason)).future
    with ing.lock:
        return _json({"rolled_back": True, "reason": reason, "applied_seq": receipt.applied_seq,
                      "serving": ing.engine.serving, "state_digest": ing.engine.state_digest})


async def post_checkpoint(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=True)
    receipt = await _ready(svc).submit([], [], action=("checkpoint",)).future
    return _json(receipt.checkpoint)


async def get_checkpoints(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    ing = _ready(svc)
    cps = await ing.db(ing.journal.checkpoints)
    return _json({"checkpoints": [c.as_dict() for c in cps], "kept": svc.config.service.checkpoints_kept})


async def metrics(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    _auth(svc, request, write=False)
    # the model-health families read the engine under the learner's lock: not on the event loop
    body = await asyncio.to_thread(svc.metrics.exposition)
    return web.Response(body=body, headers={"Content-Type": CONTENT_TYPE})


async def healthz(request: web.Request) -> web.Response:
    return _json({"status": "ok", "uptime_s": round(time.time() - request.app[SERVICE].started, 3)})


async def readyz(request: web.Request) -> web.Response:
    svc = request.app[SERVICE]
    ing = _ready(svc)
    if ing.fault is not None:
        raise JournalUnavailable(f"not ready: writes are refused: {ing.fault}", where="storage")
    return _json({"ready": True, "applied_seq": ing.applied_seq, "recovery": ing.recovery,
                  "feed": svc.feed.status() if svc.feed is not None else None,
                  "redis_publication": getattr(svc.publisher, "redis_status", lambda: None)()})


async def openapi(request: web.Request) -> web.Response:
    return web.Response(body=request.app[SERVICE].openapi, content_type="application/json")
