"""The model card's figures through a real server on a loopback port and a real SQLite file: binary
metrics, the divergence verdict and step-scale incidents.

The outside reference for the figures is an uninterrupted in-process :class:`Engine` over the same
events (whose binary metrics are themselves checked against scikit-learn in
``tests/service/test_engine_figures.py``).
"""

from __future__ import annotations

import gzip
from pathlib import Path

import orjson
import pytest

from models import InvalidInput
from service.config import config_from_dict
from service.engine import Engine
from service.events import EventValidator
from service.http.app import create_app
from tests.service.servicekit import AUTH, FEATURES, TOKEN, TOKEN_ENV, demo_events, wait_ready

pytestmark = pytest.mark.asyncio

ROOT = Path(__file__).resolve().parents[3]
BINARY_FEED = ROOT / "replay_data" / "coldchain-demo-binary.ndjson.gz"


def _config(data_dir, **sections):
    svc = {"host": "127.0.0.1", "port": 0, "data_dir": str(data_dir), "token_env": TOKEN_ENV}
    return config_from_dict({"name": "card", "features": FEATURES, "monitor": {"check_every": 100, "window": 500},
                             "service": svc, **sections})


def _lines(n: int) -> list[bytes]:
    with gzip.open(BINARY_FEED) as f:
        return f.read().split(b"\n")[:n]


def _parsed(line: bytes):
    """The line's JSON, or ``None`` for the feed's deliberately broken lines."""
    try:
        return orjson.loads(line)
    except orjson.JSONDecodeError:
        return None


def _valid(validator: EventValidator, event) -> bool:
    try:
        validator.validate(event)
    except InvalidInput:
        return False
    return True


async def _card(client) -> dict:
    r = await client.get("/v1/model")
    assert r.status == 200
    return await r.json()


async def _post(client, events: list[dict]) -> None:
    for k in range(0, len(events), 1000):
        r = await client.post("/v1/events", json=events[k:k + 1000])
        assert r.status == 200, await r.text()


async def test_card_shows_the_binary_metrics_of_its_engine(aiohttp_client, tmp_path):
    config = _config(tmp_path, model={"task": "binary", "loss": "logistic"})
    v = EventValidator(config)
    events = [e for e in map(_parsed, _lines(2500)) if _valid(v, e)]
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    await _post(client, events)
    card = await _card(client)
    ref = Engine(config)
    ref.apply_events([v.validate(e) for e in events])
    assert card["binary_metrics"] == ref.binary_metrics()
    assert card["binary_metrics"]["progressive"]["count"] == card["counters"]["learned"] > 1000
    assert card["diverged"] is None


async def test_card_says_diverged_and_lists_step_scale_changes(aiohttp_client, tmp_path):
    """A constant step of 5 without a constraint blows up (see test_engine_figures): the card says
    so, and every rollback's halving of the step scale is an incident with the old and new factor."""
    config = _config(tmp_path, constraint={"set": "none"}, steps={"rule": "constant", "base": 5.0})
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    await _post(client, demo_events(4000, tag="d"))
    card = await _card(client)
    assert card["diverged"] and any(w.startswith("diverged: ") for w in card["warnings"])
    assert card["binary_metrics"] is None
    incidents = (await (await client.get("/v1/incidents")).json())["incidents"]
    changes = [i["evidence"] for i in incidents if i["kind"] == "step_scale"]
    assert changes and changes[-1]["new"] == card["step_scale"]
    assert all(c["new"] == pytest.approx(c["old"] * 0.5) or c["cause"] == "restart" for c in changes)


async def test_operator_rollback_records_the_step_scale(aiohttp_client, tmp_path):
    config = _config(tmp_path)
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    await _post(client, demo_events(600, tag="o"))
    before = (await _card(client))["step_scale"]
    r = await client.post("/v1/model/rollback", json={"reason": "drill"})
    assert r.status == 200
    incidents = (await (await client.get("/v1/incidents")).json())["incidents"]
    last = [i for i in incidents if i["kind"] == "step_scale"][-1]
    assert (last["evidence"]["old"], last["evidence"]["new"]) == (before, before * 0.5)
    assert (await _card(client))["step_scale"] == before * 0.5


async def test_operator_rollback_with_the_monitor_off_is_an_incident_that_outlives_a_restart(aiohttp_client, tmp_path):
    """With the monitor off nothing else records an operator rollback: the service keeps the rollback
    and its step-scale change in the journal, once, across a restart (the journal's replay adds none)."""
    config = _config(tmp_path, monitor={"enabled": False})
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    await _post(client, demo_events(300, tag="m"))
    before = (await _card(client))["step_scale"]
    assert (await client.post("/v1/model/rollback", json={"reason": "drill, monitor off"})).status == 200

    def kinds(incidents):
        return [(i["kind"], i["reason"]) for i in incidents if i["kind"] in ("rollback", "step_scale")]

    first = (await (await client.get("/v1/incidents")).json())["incidents"]
    assert [k for k, _ in kinds(first)] == ["rollback", "step_scale"]
    assert kinds(first)[0][1] == "drill, monitor off"
    change = [i for i in first if i["kind"] == "step_scale"][0]["evidence"]
    assert (change["old"], change["new"], change["cause"]) == (before, before * 0.5, "rollback")
    await client.close()

    again = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(again)
    after = (await (await again.get("/v1/incidents")).json())["incidents"]
    assert kinds(after) == kinds(first)
    assert (await _card(again))["step_scale"] == before * 0.5
