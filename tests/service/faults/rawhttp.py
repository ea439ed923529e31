"""Raw HTTP/1.1 over a socket, for requests that aiohttp's client would refuse to send (bad framing,
control characters in headers, a ``Content-Encoding`` that does not match the body), and a
``trimtab serve`` subprocess for the fault tests. Only ever 127.0.0.1."""

from __future__ import annotations

import socket
import time
from dataclasses import dataclass
from pathlib import Path

import orjson

from tests.service.servicekit import ServeProcess, toml_text

__all__ = ["Answer", "TOKEN", "exchange", "request_bytes", "serve"]

TOKEN = "fault-test-token"


@dataclass
class Answer:
    """A parsed answer: status, lower-cased headers, body; ``status`` 0 if the server sent nothing."""

    status: int
    headers: dict[str, str]
    body: bytes
    seconds: float

    def error(self) -> dict:
        """The ``error`` object of the body (raises if the body is not the service's error shape)."""
        return orjson.loads(self.body)["error"]


def request_bytes(method: str, path: str, body: bytes = b"", headers: dict | None = None, *,
                  token: bool = True, length: bool = True) -> bytes:
    """A well-formed request head (plus ``headers``, which may be malformed on purpose) and ``body``."""
    lines = [f"{method} {path} HTTP/1.1", "Host: 127.0.0.1", "Connection: close"]
    if token:
        lines.append(f"Authorization: Bearer {TOKEN}")
    if length:
        lines.append(f"Content-Length: {len(body)}")
    head = "\r\n".join(lines).encode() + b"\r\n"
    for k, v in (headers or {}).items():
        head += (k if isinstance(k, bytes) else k.encode("latin-1")) + b": " + (
            v if isinstance(v, bytes) else v.encode("latin-1")) + b"\r\n"
    return head + b"\r\n" + body


def exchange(url: str, data: bytes, timeout: float = 20.0) -> Answer:
    """Send ``data`` on a fresh connection and read one answer (until its length, or the close)."""
    host, port = url.removeprefix("http://").split(":")
    assert host == "127.0.0.1"
    start = time.perf_counter()
    with socket.create_connection((host, int(port)), timeout=timeout) as s:
        try:
            s.sendall(data)
        except (BrokenPipeError, ConnectionResetError):
            pass  # the server may answer and close before reading everything: read what it said
        buf = b""
        while b"\r\n\r\n" not in buf:
            try:
                chunk = s.recv(65536)
            except ConnectionResetError:
                chunk = b""
            if not chunk:
                return Answer(0, {}, buf, time.perf_counter() - start)
            buf += chunk
        head, _, body = buf.partition(b"\r\n\r\n")
        status_line, *header_lines = head.decode("latin-1").split("\r\n")
        headers = {}
        for line in header_lines:
            k, _, v = line.partition(":")
            headers[k.strip().lower()] = v.strip()
        want = int(headers.get("content-length", "-1"))
        while want < 0 or len(body) < want:
            try:
                chunk = s.recv(65536)
            except ConnectionResetError:
                break
            if not chunk:
                break
            body += chunk
    return Answer(int(status_line.split()[1]), headers, body, time.perf_counter() - start)


def serve(tmp: Path, config) -> ServeProcess:
    """``trimtab serve`` on ``config`` with the test token in the variable the config names."""
    path = tmp / "serve.toml"
    path.write_text(toml_text(config))
    proc = ServeProcess(path, env={config.service.token_env: TOKEN})
    proc.wait_ready()
    proc.config = config
    return proc
