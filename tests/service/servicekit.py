"""Shared helpers for the live-service tests: configs, demo events, a server in a thread, a
``trimtab serve`` subprocess. Every server listens on 127.0.0.1 with a port chosen by the OS.

Servers run with a real token (``service.auth = "token"``, the default): ``TOKEN`` in the variable
``TRIMTAB_TEST_TOKEN`` that :func:`make_config` names; clients send ``AUTH``."""

from __future__ import annotations

import asyncio
import gzip
import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import orjson

from service.http.app import create_app
from service.config import config_from_dict

__all__ = ["AUTH", "FEATURES", "TOKEN", "TOKEN_ENV", "ServeProcess", "ServerThread", "demo_events", "free_port",
           "journal_positions", "make_config", "toml_text", "wait_ready"]

ROOT = Path(__file__).resolve().parents[2]
FEED = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
TOKEN_ENV = "TRIMTAB_TEST_TOKEN"
TOKEN = "test-token-7c1e0f9a2b"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
FEATURES = {"numeric": ["ambient_c", "compressor_duty", "door_open_s", "load_kg"], "categorical": ["van", "route"],
            "hash_bits": 10, "scaling": "warmup", "warmup_events": 200}


def journal_positions(db) -> list[tuple[int, int, object]]:
    """``(position, kind, content)`` for every position of a journal file (a ``sqlite3`` connection),
    read with orjson only: an event row (kind 0) gives its decoded payload ``[id, ts, features,
    target]``; a row of an NDJSON body's lines (kind 3, ``seq`` its last position) gives each of its
    lines as kind 3 with the line's decoded JSON object; notes and rollbacks their decoded payload."""
    out = []
    for seq, kind, payload in db.execute("SELECT seq, kind, payload FROM journal ORDER BY seq"):
        if kind == 3:
            lines = payload.split(b"\n")[:-1]
            out += [(seq - len(lines) + 1 + k, 3, orjson.loads(line)) for k, line in enumerate(lines)]
        else:
            out.append((seq, kind, orjson.loads(payload)))
    return out


def free_port() -> int:
    """A TCP port on 127.0.0.1 that the OS says is free now."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def make_config(data_dir, *, monitor: dict | None = None, **service):
    """A config for the demo features with ``data_dir`` and any ``[service]`` overrides."""
    svc = {"host": "127.0.0.1", "port": 0, "data_dir": str(data_dir), "token_env": TOKEN_ENV, **service}
    mon = {"check_every": 100, "window": 500, **(monitor or {})}
    return config_from_dict({"name": "test", "features": FEATURES, "monitor": mon, "service": svc})


def toml_text(config) -> str:
    """The config as TOML (flat sections of scalars and lists), for a ``trimtab serve`` subprocess."""
    out = [f'name = "{config.name}"']
    for section, values in config.resolved().items():
        if not isinstance(values, dict):
            continue
        out.append(f"[{section}]")
        for k, v in values.items():
            if v is None:  # TOML has no null: an unset key takes its default
                continue
            out.append(f"{k} = {orjson.dumps(v).decode()}")
    return "\n".join(out) + "\n"


_DEMO: list[dict] = []
_DECLARED = set(FEATURES["numeric"]) | set(FEATURES["categorical"])


def demo_events(n: int, tag: str = "e", start: int = 0) -> list[dict]:
    """``n`` valid demo events (the invented cold-chain feed) with fresh ids ``<tag><k>``."""
    if not _DEMO:
        for line in gzip.open(FEED).read().split(b"\n"):
            try:
                obj = orjson.loads(line)
            except orjson.JSONDecodeError:
                continue
            if (isinstance(obj, dict) and set(obj) == {"id", "ts", "features", "target"}
                    and isinstance(obj["target"], float) and set(obj["features"]) <= _DECLARED
                    and all(isinstance(v, (int, float, str)) for v in obj["features"].values())):
                _DEMO.append(obj)
    out = []
    for k in range(start, start + n):
        e = dict(_DEMO[k % len(_DEMO)])
        e["features"] = dict(e["features"])  # a test that edits its events must not edit the next test's
        e["id"] = f"{tag}{k}"
        out.append(e)
    return out


async def wait_ready(client, timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        r = await client.get("/readyz")
        if r.status == 200:
            return
        await asyncio.sleep(0.02)
    raise AssertionError(f"service did not become ready: {await r.text()}")


class ServerThread:
    """The app served from a thread with its own event loop (for synchronous clients and hypothesis);
    writes need ``Authorization: Bearer <token>`` (``TOKEN`` unless given)."""

    def __init__(self, config, token: str = TOKEN) -> None:
        self.config = config
        self.token = token
        self.loop = asyncio.new_event_loop()
        self._started = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self.url = ""

    def _run(self) -> None:
        from aiohttp import web

        asyncio.set_event_loop(self.loop)
        self.app = create_app(self.config, token=self.token)
        self.runner = web.AppRunner(self.app, access_log=None, handle_signals=False)
        self.loop.run_until_complete(self.runner.setup())
        site = web.TCPSite(self.runner, "127.0.0.1", 0)
        self.loop.run_until_complete(site.start())
        self.url = "http://127.0.0.1:%d" % self.runner.addresses[0][1]
        self._started.set()
        self.loop.run_forever()

    def call(self, fn):
        """Run ``fn()`` on the server's loop and return its result (to read state consistently)."""
        async def run():
            return fn()
        return asyncio.run_coroutine_threadsafe(run(), self.loop).result(30)

    def __enter__(self) -> ServerThread:
        self._thread.start()
        assert self._started.wait(60)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(self.url + "/readyz"):
                    return self
            except OSError:
                time.sleep(0.02)
        raise AssertionError("server thread did not become ready")

    def __exit__(self, *exc) -> None:
        asyncio.run_coroutine_threadsafe(self.runner.cleanup(), self.loop).result(60)
        self.loop.call_soon_threadsafe(self.loop.stop)
        self._thread.join(30)
        self.loop.close()


class ServeProcess:
    """``trimtab serve -c CONFIG --port 0 [ARGS]`` in a subprocess; ``url`` once it logs where it listens.

    The subprocess has ``TOKEN`` in ``TRIMTAB_TEST_TOKEN`` unless ``env`` says otherwise; ``args`` are
    more ``trimtab serve`` options.
    """

    def __init__(self, config_path: Path, env: dict | None = None, args: tuple[str, ...] = ()) -> None:
        self.proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "-c", str(config_path),
                                      "--port", "0", *args], stderr=subprocess.PIPE, cwd=ROOT,
                                     env={**os.environ, TOKEN_ENV: TOKEN, **(env or {})})
        self.log: list[str] = []
        self.url = None
        for raw in self.proc.stderr:
            line = raw.decode(errors="replace")
            self.log.append(line)
            m = re.search(r"listening on (http://\S+)", line)
            if m:
                self.url = m.group(1)
                break
        if self.url is None:
            self.proc.kill()
            self.proc.wait(30)
            self.proc.stderr.close()
            raise AssertionError("trimtab serve did not start:\n" + "".join(self.log))
        self._reader = threading.Thread(target=self._drain, daemon=True)
        self._reader.start()

    def _drain(self) -> None:
        for raw in self.proc.stderr:
            self.log.append(raw.decode(errors="replace"))

    def wait_ready(self, timeout: float = 120.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                with urllib.request.urlopen(self.url + "/readyz", timeout=5):
                    return
            except OSError:
                time.sleep(0.05)
        raise AssertionError("trimtab serve did not become ready:\n" + "".join(self.log))

    def _reap(self) -> int:
        code = self.proc.wait(60)
        self._reader.join(30)
        self.proc.stderr.close()
        return code

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self._reap()

    def stop(self) -> int:
        self.proc.send_signal(signal.SIGTERM)
        return self._reap()
