"""Helpers for the scorer-process tests: a ``trimtab serve`` with scorers, HTTP to its address and to
the learner's local socket, and the processes it runs (read with psutil, from outside)."""

from __future__ import annotations

import http.client
import re
import socket
import struct
import time

import orjson
import psutil

from tests.service.servicekit import AUTH, ServeProcess, make_config, toml_text

__all__ = ["Conn", "bits", "learner_socket", "scorer_pids", "start_serve", "wait_for"]


def start_serve(tmp_path, **service) -> tuple:
    """``trimtab serve`` on a fresh data dir with ``[service]`` overrides; ``(config, server)`` once ready."""
    tmp_path.mkdir(parents=True, exist_ok=True)
    cfg = make_config(tmp_path / "data", **service)
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(cfg))
    server = ServeProcess(conf)
    server.wait_ready()
    return cfg, server


class _UnixHTTPConnection(http.client.HTTPConnection):
    def __init__(self, name: str, timeout: float = 60.0) -> None:
        super().__init__("learner", timeout=timeout)
        self._name = name

    def connect(self) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        self.sock.settimeout(self.timeout)
        self.sock.connect(self._name)


class Conn:
    """One keep-alive HTTP connection (to the address, or to the learner's local socket with ``unix``)."""

    def __init__(self, url: str | None = None, *, unix: str | None = None, timeout: float = 60.0) -> None:
        if unix is not None:
            self.conn = _UnixHTTPConnection(unix, timeout)
        else:
            host, port = url.removeprefix("http://").split(":")
            self.conn = http.client.HTTPConnection(host, int(port), timeout=timeout)

    def call(self, method: str, path: str, body=None, *, ndjson: bool = False) -> tuple[int, dict]:
        headers = dict(AUTH)
        data = None
        if body is not None:
            data = b"\n".join(orjson.dumps(e) for e in body) if ndjson else orjson.dumps(body)
            headers["Content-Type"] = "application/x-ndjson" if ndjson else "application/json"
        self.conn.request(method, path, body=data, headers=headers)
        r = self.conn.getresponse()
        raw = r.read()
        return r.status, (orjson.loads(raw) if raw and r.getheader("Content-Type", "").startswith("application/json")
                          else {"text": raw.decode(errors="replace")})

    def close(self) -> None:
        self.conn.close()


def learner_socket(server: ServeProcess) -> str:
    """The learner's local socket name, as its log states it."""
    for line in server.log:
        m = re.search(r"learner on local socket unix:@(\S+);", line)
        if m:
            return "\0" + m.group(1)
    raise AssertionError("the learner did not log its local socket:\n" + "".join(server.log))


def scorer_pids(server: ServeProcess) -> list[int]:
    """Process ids of the serve's live scorer children (zombies do not count)."""
    out = []
    for p in psutil.Process(server.proc.pid).children():
        try:
            if p.status() != psutil.STATUS_ZOMBIE and "service.http.scorer" in " ".join(p.cmdline()):
                out.append(p.pid)
        except psutil.NoSuchProcess:
            continue
    return out


def bits(x: float) -> int:
    """The IEEE 754 bit pattern of a float (equal bits: the same number, signs of zero included)."""
    return struct.unpack("<Q", struct.pack("<d", x))[0]


def wait_for(check, timeout: float = 30.0, every: float = 0.05):
    """Poll ``check()`` until it returns something truthy; that value."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = check()
        if got:
            return got
        time.sleep(every)
    raise AssertionError("condition not met in time")
