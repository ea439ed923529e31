"""Helpers for the storage fault tests: a ``trimtab serve`` subprocess with a token, a client that
sends it, and the outside reference: an offline :class:`Engine` replay of the events that the
SQLite journal file holds, read with the standard ``sqlite3`` module."""

from __future__ import annotations

import sqlite3
import time
import urllib.error
import urllib.request
from pathlib import Path

import orjson

from service.engine import Engine
from service.events import EventValidator
from service.storage.journal import EVENT, LINES, ROLLBACK
from tests.service.servicekit import ServeProcess, make_config, toml_text

__all__ = ["STARTED", "TOKEN", "Client", "journal_replay", "start", "write_config"]

TOKEN = "fault-test-token"
ENV = {"TRIMTAB_TEST_TOKEN": TOKEN}


def write_config(tmp_path: Path, data_dir: Path, *, hash_bits: int | None = None, **service):
    """A config for ``data_dir`` written as TOML (``hash_bits`` overrides the demo features' own);
    returns ``(config, path)``."""
    cfg = make_config(data_dir, **service)
    if hash_bits is not None:
        cfg = cfg.model_copy(update={"features": cfg.features.model_copy(update={"hash_bits": hash_bits})})
    path = tmp_path / f"serve-{data_dir.name}.toml"
    path.write_text(toml_text(cfg))
    return cfg, path


#: every server started by :func:`start`; the faults package's conftest kills those still running
STARTED: list[ServeProcess] = []


def start(conf: Path, ready: bool = True) -> ServeProcess:
    """``trimtab serve`` on ``conf`` with the token in its environment (waits for /readyz if ``ready``)."""
    server = ServeProcess(conf, env=ENV)
    STARTED.append(server)
    if ready:
        server.wait_ready()
    return server


class Client:
    """JSON over HTTP to one server; writes carry ``Authorization: Bearer <token>``."""

    def __init__(self, url: str) -> None:
        self.url = url

    def call(self, method: str, path: str, body=None, *, ndjson: bool = False, timeout: float = 60.0):
        """``(status, json)``; error statuses are answers too."""
        headers = {"Authorization": f"Bearer {TOKEN}"}
        data = None
        if body is not None:
            data = b"\n".join(orjson.dumps(e) for e in body) if ndjson else orjson.dumps(body)
            headers["Content-Type"] = "application/x-ndjson" if ndjson else "application/json"
        req = urllib.request.Request(self.url + path, data=data, headers=headers, method=method)
        try:
            with urllib.request.urlopen(req, timeout=timeout) as r:
                return r.status, orjson.loads(r.read())
        except urllib.error.HTTPError as err:
            return err.code, orjson.loads(err.read())

    def events(self, events: list[dict], ndjson: bool = False) -> dict:
        status, got = self.call("POST", "/v1/events", events, ndjson=ndjson)
        assert status == 200, got
        return got

    def card(self) -> dict:
        status, got = self.call("GET", "/v1/model")
        assert status == 200, got
        return got

    def incidents(self) -> list[dict]:
        return self.call("GET", "/v1/incidents")[1]["incidents"]

    def wait(self, check, timeout: float = 30.0):
        """Poll ``check()`` until it returns something truthy."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            got = check()
            if got:
                return got
            time.sleep(0.05)
        raise AssertionError("condition not met in time")


def journal_replay(config, db_path: Path, upto: int | None = None) -> tuple[str, int, list[str], int]:
    """Replay the journal file offline: ``(state_digest, updates, event ids in order, last position)``;
    ``upto``: only the rows at positions up to it (a checkpoint's position ends a row).

    The rows are read with ``sqlite3`` and applied in position order to a fresh :class:`Engine`
    (events in chunks, operator rollbacks between them), which is what a restart must reproduce. The
    lines of an NDJSON body's row go through :meth:`EventValidator.parse_line` and ``Engine.prepare``,
    not the service's columnar reader.
    """
    db = sqlite3.connect(db_path)
    try:
        rows = db.execute("SELECT seq, kind, payload FROM journal WHERE seq <= ? ORDER BY seq",
                          (upto if upto is not None else 2**62,)).fetchall()
    finally:
        db.close()
    v = EventValidator(config)
    engine = Engine(config)
    ids, chunk, seqs = [], [], []
    for seq, kind, payload in rows:
        if kind == EVENT:
            obj = orjson.loads(payload)
            ids.append(obj[0])
            chunk.append(v.validate({"id": obj[0], "ts": obj[1], "features": obj[2], "target": obj[3]}))
            seqs.append(seq)
            continue
        if kind == LINES:  # an NDJSON body's accepted lines, ending at position seq: through the validator
            lines = payload.split(b"\n")[:-1]
            chunk += [v.parse_line(line, "journal") for line in lines]
            ids += [e.id for e in chunk[len(chunk) - len(lines):]]
            seqs += range(seq - len(lines) + 1, seq + 1)
            continue
        seqs.append(seq)
        engine.apply_events(chunk)
        chunk = []
        if kind == ROLLBACK:
            engine.rollback(orjson.loads(payload)["reason"])
    engine.apply_events(chunk)
    assert seqs == list(range(1, len(seqs) + 1)), "the journal must hold the whole history"
    return engine.state_digest, engine.model.n_updates, ids, len(seqs)
