"""Connections of ``trimtab serve``: a cap on open connections, a deadline for the first request
head, and aiohttp's own refusals (bad request line, bad headers, bad chunking) in the error shape.

aiohttp bounds the request line, header fields and header count, closes idle keep-alive connections
and lingers over unread bodies (its ``RequestHandler`` options, set by the app factory); it has no
deadline for a head that never completes and no bound on open connections. This module adds both:

* ``service.header_timeout_s``: a connection that has not delivered a complete request head this
  long after it opened gets a 408 in the error shape and is closed (a client that sends a few bytes
  now and then cannot keep a descriptor forever). Between requests, ``keepalive_timeout_s`` applies.
* ``service.max_connections``: a connection past the cap closes the oldest open connection that has
  no request in progress (idle keep-alive, or a head still arriving); if every connection is busy
  with a request, the new one is answered 503 with ``Retry-After`` and closed. Open descriptors stay
  within the cap plus one, whatever the clients do.

The subclasses below override public methods of aiohttp's ``RequestHandler`` and ``Server``
(``handle_error``, ``finish_response``, ``connection_made``, ``connection_lost``, ``__call__``) and
the runner's ``_make_server`` hook; they read the server's handler options and loop (``_kwargs``,
``_loop``), which aiohttp 3.9 to 3.14 keep under those names.
"""

from __future__ import annotations

import asyncio
import logging
from http import HTTPStatus

import orjson
from aiohttp import web
from aiohttp.http_exceptions import LineTooLong
from aiohttp.web_protocol import RequestHandler

from service.config import ServiceConfig
from service.errors import error_body

__all__ = ["GuardedRunner", "handler_options"]

log = logging.getLogger("trimtab.service")


def handler_options(cfg: ServiceConfig) -> dict:
    """aiohttp ``RequestHandler`` options from the config (the app factory passes them as ``handler_args``).

    ``auto_decompress`` is off: :mod:`service.http.bodies` undoes ``Content-Encoding`` itself, within
    the body limit, and refuses the encodings it cannot undo.
    """
    return {"keepalive_timeout": cfg.keepalive_timeout_s, "max_line_size": cfg.max_header_bytes,
            "max_field_size": cfg.max_header_bytes, "max_headers": cfg.max_headers, "auto_decompress": False,
            "lingering_time": min(5.0, cfg.body_timeout_s)}


def canned(status: int, code: str, message: str, where: str) -> bytes:
    """A whole HTTP/1.1 error answer in the error shape, for a connection no handler will serve."""
    body = orjson.dumps(error_body(code, message, where))
    retry = "Retry-After: 1\r\n" if status == 503 else ""
    head = (f"HTTP/1.1 {status} {HTTPStatus(status).phrase}\r\nContent-Type: application/json\r\n"
            f"Content-Length: {len(body)}\r\n{retry}Connection: close\r\n\r\n")
    return head.encode("ascii") + body


def _shaped(exc: web.HTTPException) -> web.Response:
    """aiohttp's plain-text refusal as the same status in the error shape."""
    code = HTTPStatus(exc.status).phrase.lower().replace(" ", "_").replace("-", "_")
    resp = web.Response(status=exc.status, body=orjson.dumps(error_body(code, exc.text or exc.reason, "request")),
                        content_type="application/json")
    resp.force_close()
    return resp


class _Connection(RequestHandler):
    """aiohttp's protocol, knowing whether a request is in progress, with a first-head deadline."""

    def __init__(self, manager: _GuardedServer, **kwargs) -> None:
        super().__init__(manager, **kwargs)
        self.in_flight = 0
        self.head_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport) -> None:
        super().connection_made(transport)
        self.head_timer = self._loop.call_later(self._guard.header_timeout, self._head_overdue)

    @property
    def _guard(self) -> _GuardedServer:
        return self._manager

    def began(self) -> None:
        """A complete request head arrived and its handling starts."""
        self.in_flight += 1
        if self.head_timer is not None:
            self.head_timer.cancel()
            self.head_timer = None

    async def finish_response(self, request, resp, start_time):
        if isinstance(resp, web.HTTPException) and resp.status >= 400:
            resp = _shaped(resp)  # raised where no middleware runs (an expect handler of an unknown path)
        try:
            return await super().finish_response(request, resp, start_time)
        finally:
            self.in_flight -= 1

    def refuse(self, status: int, code: str, message: str, where: str) -> None:
        """Answer ``status`` on a connection no handler serves, and close it."""
        if self.transport is not None and not self.transport.is_closing():
            self.transport.write(canned(status, code, message, where))
        self.force_close()

    def _head_overdue(self) -> None:
        self.head_timer = None
        if self.in_flight == 0 and self.transport is not None:
            self.refuse(408, "request_timeout", f"no complete request head within {self._guard.header_timeout:g} s "
                        "of connecting (service.header_timeout_s)", "headers")

    def connection_lost(self, exc) -> None:
        if self.head_timer is not None:
            self.head_timer.cancel()
            self.head_timer = None
        super().connection_lost(exc)

    def handle_error(self, request, status: int = 500, exc: BaseException | None = None,
                     message: str | None = None) -> web.StreamResponse:
        """aiohttp's refusals of a request it could not parse, in the service's error shape."""
        if request.writer.output_size > 0:
            raise ConnectionError("an answer was already being sent")
        if status >= 500:
            log.error("unexpected error while answering a request", exc_info=exc)
            body = error_body("internal", "internal error (logged by the service)", "service")
        else:
            if isinstance(exc, LineTooLong):
                status = 431
            text = getattr(exc, "message", None) or message or str(exc) or "bad request"
            body = error_body("bad_request", f"the request could not be read: {text}", "request")
        resp = web.Response(status=status, body=orjson.dumps(body), content_type="application/json")
        resp.force_close()
        return resp


class _GuardedServer(web.Server):
    """aiohttp's server making :class:`_Connection` protocols and holding them to the connection cap."""

    def __init__(self, plain: web.Server, cfg: ServiceConfig, options: dict) -> None:
        super().__init__(plain.request_handler, request_factory=self._began(plain.request_factory),
                         handler_cancellation=plain.handler_cancellation, **options)
        self.header_timeout = cfg.header_timeout_s
        self.max_connections = cfg.max_connections
        self._open: dict[_Connection, None] = {}  # insertion order is age
        self.shed = 0
        self.refused = 0

    @staticmethod
    def _began(factory):
        def make(message, payload, protocol, writer, task):
            protocol.began()
            return factory(message, payload, protocol, writer, task)
        return make

    def __call__(self) -> _Connection:
        return _Connection(self, loop=self._loop, **self._kwargs)

    def connection_made(self, handler, transport) -> None:
        super().connection_made(handler, transport)
        self._open[handler] = None
        if len(self._open) <= self.max_connections:
            return
        idle = next((c for c in self._open if c.in_flight == 0 and c is not handler), None)
        if idle is not None:
            self.shed += 1
            self._open.pop(idle, None)
            idle.force_close()
        else:
            self.refused += 1
            self._open.pop(handler, None)
            handler.refuse(503, "busy", f"{self.max_connections} connections open, all busy "
                           "(service.max_connections); retry shortly", "connection")

    def connection_lost(self, handler, exc=None) -> None:
        self._open.pop(handler, None)
        super().connection_lost(handler, exc)

    @property
    def open_connections(self) -> int:
        return len(self._open)


class GuardedRunner(web.AppRunner):
    """An ``AppRunner`` whose server applies the connection cap and the first-head deadline."""

    def __init__(self, app: web.Application, cfg: ServiceConfig, **kwargs) -> None:
        super().__init__(app, **kwargs)
        self._cfg = cfg

    async def _make_server(self) -> web.Server:
        plain = await super()._make_server()
        return _GuardedServer(plain, self._cfg, plain._kwargs)
