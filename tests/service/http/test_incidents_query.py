"""``GET /v1/incidents`` with ``limit`` and ``since``: the newest N, those at or after a time, bad
values refused with the parameter named (and nothing changed), the token still needed where reads
need it. Outside reference: the wall clock read by the test around the requests that cause each
incident (a burst of rejected lines carries the time it was noted)."""

from __future__ import annotations

import time
from urllib.parse import urlencode

import pytest
from aiohttp.test_utils import make_mocked_request
from hypothesis import given, settings
from hypothesis import strategies as st

from models import InvalidInput
from service.http.app import create_app
from service.http.timeline import _query_number, merge_incidents
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready


def _ndjson(events: list[dict], bad: int) -> bytes:
    import orjson

    return b"\n".join([orjson.dumps(e) for e in events] + [b'{"id": "x%d", "features": 3}' % k for k in range(bad)])


@pytest.mark.asyncio
async def test_limit_keeps_the_newest_and_since_keeps_the_later_ones(aiohttp_client, tmp_path):
    client = await aiohttp_client(create_app(make_config(tmp_path), token=TOKEN), headers=AUTH)
    await wait_ready(client)
    assert (await client.post("/v1/events", json=demo_events(600))).status == 200
    for k in range(3):  # operator rollbacks: engine incidents without a time
        assert (await client.post("/v1/model/rollback", json={"reason": f"query test {k}"})).status == 200
    t0 = time.time()
    body = _ndjson(demo_events(40, tag="b"), bad=60)  # 60% of 100 lines rejected: a burst (share > 0.2)
    r = await client.post("/v1/events", data=body, headers={"Content-Type": "application/x-ndjson"})
    assert r.status == 200
    t1 = time.time()

    every = (await (await client.get("/v1/incidents")).json())["incidents"]
    kinds = [i["kind"] for i in every]
    # each operator rollback shrinks the step scale: a step_scale incident follows it
    assert kinds == ["rollback", "step_scale"] * 3 + ["rejected_burst"], kinds
    assert t0 <= every[-1]["ts"] <= t1
    newest = (await (await client.get("/v1/incidents?limit=2")).json())["incidents"]
    assert newest == every[-2:]
    later = (await (await client.get(f"/v1/incidents?since={t0}")).json())["incidents"]
    assert [i["kind"] for i in later] == ["rejected_burst"]
    assert (await (await client.get(f"/v1/incidents?since={t1 + 1}")).json())["incidents"] == []
    assert (await (await client.get(f"/v1/incidents?since={t0}&limit=5")).json())["incidents"] == later

    for query, where in (("limit=0", "query.limit"), ("limit=two", "query.limit"), ("limit=1.5", "query.limit"),
                         ("since=nan", "query.since"), ("since=-1", "query.since"), ("since=inf", "query.since")):
        r = await client.get(f"/v1/incidents?{query}")
        assert r.status == 422, query
        assert (await r.json())["error"]["where"] == where
    assert (await (await client.get("/v1/incidents")).json())["incidents"] == every  # nothing changed


@pytest.mark.asyncio
async def test_incidents_need_the_token_when_reads_do(aiohttp_client, tmp_path):
    app = create_app(make_config(tmp_path, token_for_reads=True), token=TOKEN)
    client = await aiohttp_client(app)
    await wait_ready(client)
    r = await client.get("/v1/incidents?limit=1")
    assert r.status == 401 and (await r.json())["error"]["where"] == "Authorization"
    assert (await client.get("/v1/incidents?limit=1", headers=AUTH)).status == 200


def test_merge_orders_by_time_and_keeps_the_engine_order_for_incidents_without_one():
    engine = [{"kind": "rollback", "event": 10, "ts": 100.0}, {"kind": "rollback", "event": 20, "ts": None},
              {"kind": "restart", "event": 30, "ts": 300.0}]
    service = [{"kind": "disk_full", "ts": 150.0}, {"kind": "recovered", "ts": 400.0}]
    merged = merge_incidents(engine, service)
    assert [(i["source"], i["kind"]) for i in merged] == [
        ("engine", "rollback"), ("engine", "rollback"), ("service", "disk_full"), ("engine", "restart"),
        ("service", "recovered")]


@settings(max_examples=300, deadline=None)
@given(st.one_of(st.text(max_size=12), st.integers(-10, 10**6).map(str), st.floats(allow_nan=True).map(repr)))
def test_limit_parses_exactly_the_integers_in_range_and_names_itself_otherwise(text):
    """Property: ``limit`` is accepted exactly when Python reads it as an integer from 1 to 100,000
    (the reference is ``int()`` itself); anything else is refused naming ``query.limit``."""
    request = make_mocked_request("GET", "/v1/incidents?" + urlencode({"limit": text}))
    try:
        expected = int(text)
    except ValueError:
        expected = None
    if expected is not None and 1 <= expected <= 100_000:
        assert _query_number(request, "limit", int, 1, 100_000) == expected
    else:
        with pytest.raises(InvalidInput) as err:
            _query_number(request, "limit", int, 1, 100_000)
        assert err.value.where == "query.limit"
