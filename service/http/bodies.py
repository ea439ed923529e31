"""Request bodies read within limits: per-route size, a shared in-flight budget, a deadline, encodings.

Every handler that takes a body reads it through :meth:`BodyReader.read`, in this order:

1. ``Content-Encoding``: absent or ``identity``, ``gzip`` (``x-gzip``) and ``deflate`` are read;
   anything else (``br``, ``zstd``, ``compress``, an unknown token, a chain of several) is refused
   with 415 before a byte of the body is read: an encoding the service cannot undo is never taken
   for plain text.
2. ``Content-Length`` over the route's limit: 413 before the body is read.
3. The shared budget (``service.max_inflight_bytes``): a body claims its ``Content-Length`` (or its
   route's whole limit when chunked or compressed, since its size is only known once read) for as
   long as its request is being answered; a claim that does not fit is answered 503 with
   ``Retry-After`` before the body is read. Bodies held at once, and so memory, stay bounded under
   any burst. Claims over 64 KiB fill at most 7/8 of the budget: the rest is kept for small bodies,
   so ordinary scores keep being served while large bodies wait their turn.
4. Reading, under ``service.body_timeout_s`` (408 past it; a plain body that arrived whole with
   its head is taken as it is, with nothing to wait for): a chunked body is cut off with 413 as
   soon as it passes the limit, and a compressed one as soon as its *decompressed* size does (a
   small body that inflates to gigabytes costs at most the limit). A body that does not match its
   encoding, or whose chunked framing is broken, is a 400.

RFC 9110 (Fielding, Nottingham, Reschke, 2022) sections 8.4 (Content-Encoding), 15.5.9 (408),
15.5.14 (413) and 15.5.16 (415); ``deflate`` is the zlib format of RFC 1950, and, as many clients
send it, raw RFC 1951 data is accepted too.
"""

from __future__ import annotations

import asyncio
import zlib
from dataclasses import dataclass

from aiohttp import web
from aiohttp.client_exceptions import ClientPayloadError
from aiohttp.http import HttpVersion11
from aiohttp.http_exceptions import HttpProcessingError
from aiohttp.web_protocol import RequestPayloadError

from service.config import ServiceConfig
from service.errors import (Busy, MalformedBody, PayloadTooLarge, RequestTimeout, ServiceError, UnsupportedMediaType,
                            error_response)

__all__ = ["BodyReader", "RouteLimit"]

_HELD = web.RequestKey("trimtab_body_bytes_held", int)
_WBITS = {"gzip": 16 + zlib.MAX_WBITS, "x-gzip": 16 + zlib.MAX_WBITS}
_READ_CHUNK = 64 * 1024
_SMALL = 64 * 1024  # a claim up to this size may use the budget's last eighth
_PIECE = 512 * 1024  # decompressed bytes produced between two yields to the loop (well under 1 ms)


@dataclass(frozen=True)
class RouteLimit:
    """The largest body a route takes and the config key that sets it (named in the 413)."""

    limit: int
    key: str


class BodyReader:
    """Reads bodies for every route of one app and keeps the shared in-flight budget."""

    def __init__(self, cfg: ServiceConfig) -> None:
        small = (RouteLimit(cfg.max_score_bytes, "service.max_score_bytes") if cfg.max_score_bytes < cfg.max_body_bytes
                 else RouteLimit(cfg.max_body_bytes, "service.max_body_bytes"))
        self._large = RouteLimit(cfg.max_body_bytes, "service.max_body_bytes")
        self._routes = {"/v1/events": self._large, "/v1/labels": self._large}
        self._small = small
        self._budget = cfg.max_inflight_bytes
        self._timeout = cfg.body_timeout_s
        self.held = 0

    def limit_for(self, path: str) -> RouteLimit:
        """The body limit of the route at ``path`` (scoring and operator routes get the small one)."""
        return self._routes.get(path, self._small)

    async def expect(self, request: web.Request) -> web.StreamResponse | None:
        """``Expect: 100-continue``: the size and encoding checks of :meth:`read` come *before* the
        client is told to send its body (so a refused body is never sent); any other expectation is
        a 417. The app factory sets this as every route's expect handler."""
        if request.headers.get("Expect", "").lower() != "100-continue":
            err = ServiceError(f"Expect: {request.headers.get('Expect')!r} not supported (only 100-continue)",
                               where="Expect")
            err.status, err.code = 417, "expectation_failed"
            return _closing(error_response(err))
        if request.version != HttpVersion11:
            return None  # an HTTP/1.0 client does not wait for 100 Continue
        route = self.limit_for(request.path)
        try:
            _encoding(request.headers.getall("Content-Encoding", []))
            if request.content_length is not None and request.content_length > route.limit:
                raise PayloadTooLarge(f"body of {request.content_length} bytes (Content-Length) over the "
                                      f"{route.limit}-byte limit of {request.path} ({route.key})", where="body")
        except ServiceError as exc:
            return _closing(error_response(exc))
        await request.writer.write(b"HTTP/1.1 100 Continue\r\n\r\n")
        request.writer.output_size = 0  # the answer proper has not started (as aiohttp's own handler does)
        return None

    def release(self, request: web.Request) -> None:
        """Give back what ``request``'s body claimed (the error middleware calls this once it answered)."""
        self.held -= request.get(_HELD, 0)
        request[_HELD] = 0

    async def read(self, request: web.Request) -> bytes:
        """The body of ``request``, decoded, or an error naming the limit or the fault."""
        route = self.limit_for(request.path)
        wbits = _encoding(request.headers.getall("Content-Encoding", []))
        length = request.content_length
        if length is not None and length > route.limit:
            raise PayloadTooLarge(f"body of {length} bytes (Content-Length) over the {route.limit}-byte limit of "
                                  f"{request.path} ({route.key})", where="body")
        claim = length if (length is not None and wbits is None) else route.limit
        ceiling = self._budget if claim <= _SMALL else self._budget - self._budget // 8
        if self.held + claim > ceiling:
            raise Busy(f"request bodies in flight are at their limit ({self.held} of {self._budget} bytes, "
                       "service.max_inflight_bytes); retry shortly", where="body")
        self.held += claim
        request[_HELD] = request.get(_HELD, 0) + claim
        try:
            if wbits is None and request.content.is_eof():
                # the whole body came in with its head (a small body does): nothing to wait for, so
                # no deadline to arm (its timer is a measurable part of a single-event score's cost)
                return _buffered(request, route)
            async with asyncio.timeout(self._timeout):
                return await _read_limited(request, route, wbits)
        except TimeoutError:
            request.protocol.close()  # the rest of a slow body is not worth waiting for
            raise RequestTimeout(f"body not received within {self._timeout:g} s (service.body_timeout_s)",
                                 where="body") from None
        except (RequestPayloadError, ClientPayloadError, HttpProcessingError) as exc:
            raise MalformedBody(f"the body's framing is broken: {exc}", where="body") from None


def _closing(resp: web.Response) -> web.Response:
    resp.force_close()
    return resp


def _encoding(values: list[str]) -> int | None:
    """zlib ``wbits`` for the request's ``Content-Encoding`` (``None``: none), or 415."""
    tokens = [t.strip().lower() for v in values for t in v.split(",") if t.strip()]
    tokens = [t for t in tokens if t != "identity"]
    if not tokens:
        return None
    if len(tokens) == 1 and tokens[0] in _WBITS:
        return _WBITS[tokens[0]]
    if len(tokens) == 1 and tokens[0] == "deflate":
        return 0  # zlib or raw deflate: decided from the first bytes
    raise UnsupportedMediaType(f"Content-Encoding {', '.join(tokens)!r} not accepted (use gzip, deflate or none)",
                               where="Content-Encoding")


def _buffered(request: web.Request, route: RouteLimit) -> bytes:
    """A plain body already received in full (its limit checked as :func:`_read_limited` does)."""
    body = request.content.read_nowait()
    if len(body) > route.limit:
        raise PayloadTooLarge(f"body over the {route.limit}-byte limit of {request.path} ({route.key})", where="body")
    return body


async def _read_limited(request: web.Request, route: RouteLimit, wbits: int | None) -> bytes:
    out = bytearray()
    wire = 0
    inflate = None
    while True:
        chunk = await request.content.read(_READ_CHUNK)
        if not chunk:
            break
        wire += len(chunk)
        if wire > route.limit:
            raise PayloadTooLarge(f"body over the {route.limit}-byte limit of {request.path} ({route.key})",
                                  where="body")
        if wbits is None:
            out += chunk
            continue
        if inflate is None:
            inflate = zlib.decompressobj(wbits or _deflate_wbits(chunk))
        data = chunk
        while data:
            data = _inflate(inflate, data, out, route, request.path)
            await asyncio.sleep(0)  # a 64 KiB chunk may inflate to megabytes: let the loop breathe
    if wbits is not None:
        while inflate is not None and not inflate.eof:  # output zlib still holds back after the last piece
            held = len(out)
            _inflate(inflate, b"", out, route, request.path)
            if len(out) == held:
                break
        if inflate is None or not inflate.eof:
            raise MalformedBody("the body ends before its compressed stream does (Content-Encoding)",
                                where="Content-Encoding")
        if inflate.unused_data:
            raise MalformedBody("data after the end of the compressed stream (Content-Encoding)",
                                where="Content-Encoding")
    return bytes(out)


def _deflate_wbits(first: bytes) -> int:
    """zlib-wrapped (RFC 1950) when the first two bytes are a valid zlib header, raw deflate otherwise."""
    if len(first) >= 2 and first[0] & 0x0F == 8 and (first[0] << 8 | first[1]) % 31 == 0:
        return zlib.MAX_WBITS
    return -zlib.MAX_WBITS


def _inflate(inflate, data: bytes, out: bytearray, route: RouteLimit, path: str) -> bytes:
    """Decompress part of ``data`` onto ``out`` (at most one piece, never past the limit plus one
    byte); return what is left of ``data``."""
    if inflate.eof:
        raise MalformedBody("data after the end of the compressed stream (Content-Encoding)",
                            where="Content-Encoding")
    try:
        out += inflate.decompress(data, min(_PIECE, route.limit + 1 - len(out)))
    except zlib.error as exc:
        raise MalformedBody(f"the body does not match its Content-Encoding: {exc}",
                            where="Content-Encoding") from None
    if len(out) > route.limit:
        raise PayloadTooLarge(f"body over the {route.limit}-byte limit of {path} ({route.key}) once "
                              "decompressed", where="body")
    return inflate.unconsumed_tail
