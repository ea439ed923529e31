"""A data dir started from a replay's final state (``--start-from``) through a real server on a
loopback port and a real SQLite file: it continues from that state, and when every checkpoint is
damaged it refuses to rebuild from the journal, which lacks the state it started from (a rebuild
would silently drop what the replay learned). The damage is done with the standard ``sqlite3``
module; the reference is an in-process :class:`Engine` over the same events."""

from __future__ import annotations

import asyncio
import sqlite3
import time

import pytest

from service.engine import Engine
from service.events import EventValidator
from service.http.app import create_app
from service.storage.promote import start_from, write_run_state
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready

pytestmark = pytest.mark.asyncio


async def _incident(client, kind: str, timeout: float = 60.0) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        found = [i for i in (await (await client.get("/v1/incidents")).json())["incidents"] if i["kind"] == kind]
        if found:
            return found[-1]
        await asyncio.sleep(0.05)
    raise AssertionError(f"no {kind} incident")


async def test_a_started_data_dir_never_rebuilds_from_its_journal_alone(aiohttp_client, tmp_path):
    data_dir = tmp_path / "live"
    cfg = make_config(data_dir)
    v = EventValidator(cfg)
    run = Engine(cfg, trace_limit=None)
    run.apply_events([v.validate(e) for e in demo_events(800, tag="r")])
    folder = tmp_path / "out" / "test"
    write_run_state(folder, run.to_bytes(), {"state_digest": run.state_digest, "events": run.events}, cfg)
    started = start_from(cfg, data_dir, folder)
    assert started["state_digest"] == run.state_digest and started["events"] == 800

    live = demo_events(200, tag="l")
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    assert (await (await client.post("/v1/events", json=live)).json())["applied_seq"] == 200
    run.apply_events([v.validate(e) for e in live])
    assert (await (await client.get("/v1/model")).json())["state_digest"] == run.state_digest
    await client.close()  # clean stop: a final checkpoint at 200 beside the start at 0

    db = sqlite3.connect(data_dir / "trimtab.sqlite")
    assert [r[0] for r in db.execute("SELECT seq FROM checkpoints ORDER BY seq")] == [0, 200]
    assert db.execute("SELECT count(*) FROM journal").fetchone()[0] == 200  # the whole live history
    db.execute("UPDATE checkpoints SET blob = zeroblob(64)")
    db.commit()
    db.close()

    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    refused = await _incident(client, "history_incomplete")
    assert "started from" in refused["reason"] and refused["evidence"]["started_from"] == str(folder)
    assert (await client.get("/readyz")).status == 503
