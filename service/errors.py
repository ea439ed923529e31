"""Service errors and the one place that maps errors to HTTP statuses and the error shape.

Every error answer is ``{"error": {"code": ..., "message": ..., "where": ...}}``; ``where`` names
the part of the request at fault (``events[3].features.ambient_c``, ``line 17``, ``body``,
``Authorization``) or the part of the service that refused (``queue``, ``startup``)::

    TrimtabError                      (models/errors.py)
     +-- InvalidInput                 422 invalid_input: an event or request field breaks a rule
     |    +-- MalformedBody           400 malformed_body: not JSON / not the expected envelope
     +-- ServiceError                 status and code set per class
          +-- Unauthorized            401 unauthorized: token missing or wrong
          +-- NotFound                404 not_found
          +-- MethodNotAllowed        405 method_not_allowed
          +-- RequestTimeout          408 request_timeout: head or body not received in time
          +-- PayloadTooLarge         413 too_large: body or batch over a limit (the limit is named)
          +-- UnsupportedMediaType    415 unsupported_media_type
          +-- Overloaded              429 overloaded (with Retry-After)
          +-- Busy                    503 busy: request bodies in flight or open connections at their limit
          +-- NotReady                503 not_ready: recovery still running or shutting down
          +-- JournalUnavailable      503 journal_unavailable: the durable write failed; retry
"""

from __future__ import annotations

import logging

import orjson
from aiohttp import web

from models import InvalidInput, InvalidSettings, SnapshotError, TrimtabError

__all__ = [
    "Busy", "JournalUnavailable", "MalformedBody", "MethodNotAllowed", "NotFound", "NotReady", "Overloaded",
    "PayloadTooLarge", "RequestTimeout", "ServiceError", "Unauthorized", "UnsupportedMediaType", "error_body",
    "error_response", "from_http_exception",
]

log = logging.getLogger("trimtab.service")


class MalformedBody(InvalidInput):
    """The body is not JSON (or NDJSON), or not the envelope the route expects."""


class ServiceError(TrimtabError):
    """An error the service raises on purpose, with its HTTP status and code."""

    status = 500
    code = "internal"

    def headers(self) -> dict[str, str]:
        return {}


class Unauthorized(ServiceError):
    status, code = 401, "unauthorized"

    def headers(self) -> dict[str, str]:
        return {"WWW-Authenticate": 'Bearer realm="trimtab"'}


class NotFound(ServiceError):
    status, code = 404, "not_found"


class MethodNotAllowed(ServiceError):
    status, code = 405, "method_not_allowed"


class RequestTimeout(ServiceError):
    status, code = 408, "request_timeout"


class PayloadTooLarge(ServiceError):
    status, code = 413, "too_large"


class UnsupportedMediaType(ServiceError):
    status, code = 415, "unsupported_media_type"


class Overloaded(ServiceError):
    """The ingest queue is full; the producer should retry after ``retry_after`` seconds."""

    status, code = 429, "overloaded"

    def __init__(self, message: str, *, where: str = "queue", retry_after: int = 1) -> None:
        super().__init__(message, where=where)
        self.retry_after = retry_after

    def headers(self) -> dict[str, str]:
        return {"Retry-After": str(self.retry_after)}


class Busy(ServiceError):
    """A shared transport budget (body bytes in flight, open connections) is used up; retry soon."""

    status, code = 503, "busy"

    def headers(self) -> dict[str, str]:
        return {"Retry-After": "1"}


class NotReady(ServiceError):
    status, code = 503, "not_ready"

    def headers(self) -> dict[str, str]:
        return {"Retry-After": "1"}


class JournalUnavailable(ServiceError):
    status, code = 503, "journal_unavailable"

    def headers(self) -> dict[str, str]:
        return {"Retry-After": "1"}


def error_body(code: str, message: str, where: str, **extra) -> dict:
    """The error shape every route answers with."""
    return {"error": {"code": code, "message": message, "where": where or "request", **extra}}


def _status_of(exc: BaseException) -> tuple[int, str]:
    if isinstance(exc, ServiceError):
        return exc.status, exc.code
    if isinstance(exc, MalformedBody):
        return 400, "malformed_body"
    if isinstance(exc, InvalidInput):
        return 422, "invalid_input"
    if isinstance(exc, (InvalidSettings, SnapshotError)):
        return 500, "internal"
    return 500, "internal"


def error_response(exc: BaseException, **extra) -> web.Response:
    """Map any exception to its status and the error shape (unexpected ones are logged, not shown)."""
    status, code = _status_of(exc)
    if isinstance(exc, TrimtabError) and status < 500:
        message, where = exc.message, exc.where
    elif isinstance(exc, ServiceError):
        message, where = exc.message, exc.where
    else:
        log.exception("unexpected error while answering a request", exc_info=exc)
        message, where = "internal error (logged by the service)", "service"
    headers = exc.headers() if isinstance(exc, ServiceError) else {}
    return web.Response(status=status, body=orjson.dumps(error_body(code, message, where, **extra)),
                        content_type="application/json", headers=headers)


def from_http_exception(exc: web.HTTPException, request: web.Request,
                        max_body_bytes: int) -> ServiceError | InvalidInput:
    """aiohttp's own refusals (no route, wrong method, body over ``client_max_size``) in our terms."""
    if exc.status == 404:
        return NotFound(f"no route {request.path}", where="path")
    if exc.status == 405:
        allowed = ", ".join(sorted(getattr(exc, "allowed_methods", ()) or ()))
        return MethodNotAllowed(f"method {request.method} not allowed (allowed: {allowed})", where="method")
    if exc.status == 413:
        return PayloadTooLarge(f"body over the {max_body_bytes}-byte limit (service.max_body_bytes)",
                               where="body")
    if exc.status == 400:
        return MalformedBody(exc.text or "bad request", where="request")
    err = ServiceError(exc.reason or "error", where="request")
    err.status, err.code = exc.status, "http_error"
    return err
