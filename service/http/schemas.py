"""Request and response models (pydantic): they validate request envelopes and generate the OpenAPI 3.1
document served at ``/v1/openapi.json``.

The event rules themselves live in one place, :class:`service.events.EventValidator`. :class:`EventIn`
describes an event for the document and, when validated with ``context={"validator": v, "where":
...}``, hands the raw object to ``v.validate`` and nothing else: a JSON-array body (validated here,
item by item) and an NDJSON body (``events.parse_ndjson``) therefore accept and reject exactly the
same events with the same messages.
"""

from __future__ import annotations

from typing import Any, Literal

import orjson
from pydantic import BaseModel, ConfigDict, Field, RootModel, ValidationError, model_validator
from pydantic.json_schema import models_json_schema

from models import InvalidInput

from service.errors import MalformedBody
from service.events import CONTROL_CHARS, MAX_ID_BYTES

__all__ = [
    "ID_RULE", "EventIn", "EventsBody", "IngestResponse", "LabelIn", "LabelsBody", "RollbackRequest", "ScoreRequest",
    "ScoreResponse", "envelope", "openapi_document", "parse_json",
]

_STRICT = ConfigDict(extra="forbid", strict=True)
ID_RULE = f"1 to {MAX_ID_BYTES} bytes of UTF-8, no control characters (U+0000-U+001F, U+007F-U+009F)"
#: JSON Schema counts characters, not bytes: the byte limit is in the description, the pattern is exact
_ID_SCHEMA = {"minLength": 1, "maxLength": MAX_ID_BYTES, "pattern": f"^[^{CONTROL_CHARS[1:-1]}]*$"}
Scalar = float | int | str | bool | None


class EventIn(BaseModel):
    """One event (docs/events.md)."""

    model_config = _STRICT
    id: str | None = Field(None, description=f"required when target is present; {ID_RULE}",
                           json_schema_extra=_ID_SCHEMA)
    ts: float | str | None = Field(None, description="epoch seconds or an RFC 3339 string with an offset")
    features: dict[str, Scalar] = Field(description="declared feature name -> number | string | boolean | null")
    target: float | bool | None = Field(None, description="number (regression) or 0/1/true/false (binary)")

    @model_validator(mode="wrap")
    @classmethod
    def _boundary_rules(cls, data, handler, info):
        ctx = info.context or {}
        validator = ctx.get("validator")
        if validator is None:
            return handler(data)
        # the validator is the single source of truth: its Event is the result, its errors propagate
        return validator.validate(data, ctx.get("where", ""))


class EventsBody(RootModel[list[Any]]):
    """``POST /v1/events`` as ``application/json``: an array of events (each checked as :class:`EventIn`)."""

    model_config = ConfigDict(strict=True)


class ScoreRequest(BaseModel):
    """``POST /v1/score``: one event's ``features`` (with an optional ``id`` and ``ts``) or ``events``."""

    model_config = _STRICT
    features: dict[str, Any] | None = None
    events: list[Any] | None = None
    id: str | None = None
    ts: float | str | None = None
    remember: bool = Field(False, description="keep the features (needs an id, and the bearer token: it changes "
                                              "state) for a later POST /v1/labels")
    iterate: Literal["raw", "averaged"] | None = Field(None, description="default: the serving iterate")

    @model_validator(mode="after")
    def _one_form(self):
        if (self.features is None) == (self.events is None):
            raise ValueError("give exactly one of 'features' or 'events'")
        if self.events is not None and (self.id is not None or self.ts is not None):
            raise ValueError("'id' and 'ts' go inside each of 'events'")
        return self


class LabelIn(BaseModel):
    """A label for an event scored earlier with ``"remember": true``."""

    model_config = _STRICT
    #: checked by the same rule as an event's id (``service.events.check_id``) in the handler
    id: str = Field(description=ID_RULE, json_schema_extra=_ID_SCHEMA)
    #: checked by the same rule as an event's target (``EventValidator.target``), so the messages agree
    target: Any = Field(json_schema_extra={"type": ["number", "boolean"],
                                           "description": "number (regression) or 0/1/true/false (binary)"})


class LabelsBody(RootModel[list[Any]]):
    model_config = ConfigDict(strict=True)


class RollbackRequest(BaseModel):
    model_config = _STRICT
    reason: str = Field("operator request", max_length=500)


class Rejection(BaseModel):
    where: str
    reason: str


class ErrorDetail(BaseModel):
    code: str
    message: str
    where: str


class ErrorResponse(BaseModel):
    error: ErrorDetail


class IngestResponse(BaseModel):
    accepted: int = Field(description="events journaled and applied by this request")
    duplicates: list[int] = Field(description="positions (from 0: the array index, or the NDJSON line number minus 1) "
                                              "of events whose id was ever accepted before (not re-applied)")
    rejected: list[Rejection]
    seq: list[int] | None = Field(description="first and last journal position of the accepted events")
    applied_seq: int = Field(description="journal position the model has applied when this answer was sent")
    expired: list[str] = []
    unknown: list[str] = []


class Version(BaseModel):
    seq: int = Field(description="journal position the model had applied when it scored")
    updates: int = Field(description="SGD updates the model had made")
    published: int | None = Field(None, description="publication number of the model a scorer process used "
                                  "(absent when the learner answered)")
    digest: str | None = Field(None, description="state digest of that published model (scorer processes)")


class ScoreResponse(BaseModel):
    scores: list[float]
    score: float | None = None
    iterate: Literal["raw", "averaged"]
    version: Version
    remembered: int = 0


def parse_json(body: bytes):
    """Parse a JSON body, refusing it (400) with the reason if it is not JSON."""
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        msg = str(exc)
        reason = "invalid UTF-8" if "utf-8" in msg.lower() else msg.split(":")[0][:120]
        raise MalformedBody(f"not valid JSON: {reason}", where="body") from None


_UNION_TAGS = frozenset(("float", "int", "str", "bool", "none", "function-after", "literal"))


def _where(loc, prefix: str) -> str:
    out = prefix
    for k, part in enumerate(loc):
        if k and isinstance(part, str) and (part in _UNION_TAGS or "[" in part):
            continue  # pydantic names the union member it tried; the request has no such field
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "body"


def envelope(model: type[BaseModel], obj, prefix: str = "", context: dict | None = None):
    """Validate ``obj`` as ``model``; a failure becomes :class:`InvalidInput` naming the field."""
    try:
        return model.model_validate(obj, context=context)
    except ValidationError as exc:
        err = exc.errors(include_url=False)[0]
        kind = err["type"]
        if kind == "extra_forbidden":
            msg = "unknown key"
        elif kind == "missing":
            msg = "required"
        elif kind in ("list_type", "dict_type", "model_type", "model_attributes_type") and not err["loc"]:
            raise MalformedBody(f"expected {_expected(model)}, got {_kind(obj)}", where=prefix or "body") from None
        else:
            msg = err["msg"].replace("Value error, ", "")
        raise InvalidInput(msg, where=_where(err["loc"], prefix)) from None


def _expected(model) -> str:
    return "a JSON array" if issubclass(model, RootModel) else "a JSON object"


def _kind(v) -> str:
    return {dict: "an object", list: "an array", str: "a string", bool: "a boolean", type(None): "null"}.get(
        type(v), "a number")


_BEARER = [{"bearer": []}]


def _op(summary: str, req: str | None, resp: str, write: bool, codes=(400, 401, 408, 413, 415, 422, 429, 503),
        ndjson: bool = False) -> dict:
    ref = {"$ref": f"#/components/schemas/{resp}"}
    err = {"description": "error", "content": {"application/json": {"schema": {
        "$ref": "#/components/schemas/ErrorResponse"}}}}
    op: dict = {"summary": summary, "responses": {"200": {"description": "ok", "content": {
        "application/json": {"schema": ref}}}, **{str(c): err for c in codes}}}
    if req is not None:
        content = {"application/json": {"schema": {"$ref": f"#/components/schemas/{req}"}}}
        if ndjson:
            content["application/x-ndjson"] = {"schema": {"type": "string", "description": "one event per line"}}
        op["requestBody"] = {"required": req != "RollbackRequest", "content": content}
    if write:
        op["security"] = _BEARER
    return op


def openapi_document(config, version: str, served: dict[str, tuple[str, ...]] | None = None) -> dict:
    """The OpenAPI 3.1 document; JSON schemas come from the models above (JSON Schema 2020-12).

    ``served``: path -> methods (lower case) of a role that answers only those (a remote scorer);
    default: every route of the learner."""
    models = [EventIn, LabelIn, ScoreRequest, RollbackRequest, ErrorResponse, IngestResponse, ScoreResponse]
    _, defs = models_json_schema([(m, "validation") for m in models], ref_template="#/components/schemas/{model}")
    schemas = dict(defs["$defs"])
    schemas["EventsBody"] = {"type": "array", "items": {"$ref": "#/components/schemas/EventIn"},
                             "maxItems": config.service.max_batch}
    schemas["LabelsBody"] = {"type": "array", "items": {"$ref": "#/components/schemas/LabelIn"},
                             "maxItems": config.service.max_batch}
    schemas["Object"] = {"type": "object"}
    reads = config.service.token_for_reads
    plain = {"summary": "", "responses": {"200": {"description": "ok"}, "503": {"description": "not ready"}}}
    paths = {
        "/v1/score": {"post": _op("score one event or a list", "ScoreRequest", "ScoreResponse", reads,
                                  (400, 401, 408, 413, 415, 422, 503))},
        "/v1/events": {"post": _op("learn labelled events (JSON array or NDJSON)", "EventsBody", "IngestResponse",
                                   True, ndjson=True)},
        "/v1/labels": {"post": _op("labels for events scored with remember", "LabelsBody", "IngestResponse", True)},
        "/v1/model": {"get": _op("model card", None, "Object", reads, (401, 503))},
        "/v1/model/serving": {"get": _op("the serving model's version, layout, scaling and certificate summary "
                                         "(a scorer process: the version it serves)", None, "Object", reads,
                                         (401, 503))},
        "/v1/model/rollback": {"post": _op("roll the raw iterate back to the average", "RollbackRequest",
                                           "Object", True, (400, 401, 408, 413, 415, 422, 429, 503))},
        "/v1/checkpoints": {"get": _op("stored checkpoints", None, "Object", reads, (401, 503)),
                            "post": _op("write a checkpoint now", None, "Object", True, (401, 429, 503))},
        "/v1/incidents": {"get": _op("rollbacks, restarts, rejected bursts, service incidents", None, "Object",
                                     reads, (401,))},
        "/v1/health": {"get": _op("the model's health and its series (what the page at / draws)", None, "Object",
                                  reads, (401, 503))},
        "/": {"get": {"summary": "the live page (HTML; its data comes from /v1/health)",
                      "responses": {"200": {"description": "ok", "content": {"text/html": {}}}}}},
        "/page/{name}": {"get": {"summary": "the page's script and style sheet", "parameters": [
            {"name": "name", "in": "path", "required": True, "schema": {"type": "string"}}],
            "responses": {"200": {"description": "ok"}, "404": {"description": "no such file"}}}},
        "/metrics": {"get": dict(plain, summary="Prometheus text exposition")},
        "/healthz": {"get": dict(plain, summary="liveness")},
        "/readyz": {"get": dict(plain, summary="readiness: 200 once recovery has finished")},
        "/v1/openapi.json": {"get": dict(plain, summary="this document")},
    }
    paths["/v1/incidents"]["get"]["parameters"] = [
        {"name": "limit", "in": "query", "required": False, "description": "keep the newest N (after since)",
         "schema": {"type": "integer", "minimum": 1, "maximum": 100_000}},
        {"name": "since", "in": "query", "required": False,
         "description": "Unix seconds: keep incidents with ts >= since (those without a time are left out)",
         "schema": {"type": "number", "minimum": 0}}]
    paths["/v1/incidents"]["get"]["responses"]["422"] = paths["/v1/incidents"]["get"]["responses"]["401"]
    if not reads:  # the token is optional for scoring, and required with "remember": true
        paths["/v1/score"]["post"]["security"] = [{}, *_BEARER]
    if served is not None:
        paths = {p: {m: op for m, op in ops.items() if m in served[p]} for p, ops in paths.items() if p in served}
    return {"openapi": "3.1.0", "info": {"title": f"trimtab service ({config.name})", "version": version},
            "paths": paths, "components": {"schemas": schemas, "securitySchemes": {
                "bearer": {"type": "http", "scheme": "bearer"}}}}
