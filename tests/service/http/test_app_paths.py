"""The two ways into ``/v1/events`` enforce the same rules: a JSON array (each item validated by the
pydantic :class:`service.http.schemas.EventIn`, whose validator hands the object to ``EventValidator``)
and an NDJSON body (the fast path, ``events.parse_ndjson``). For hypothesis-generated mixes of valid
and broken events, both accept the same events and reject the others at the same place with the
same message. Both are exercised over HTTP against one real server on a loopback port.
"""

from __future__ import annotations

import re

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.events import EventValidator
from service.http.schemas import EventIn
from tests.service.servicekit import ServerThread, make_config
from tests.service.http.test_fuzz_http import bad_event, base, dump, request

COUNTER = {"n": 0}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with ServerThread(make_config(tmp_path_factory.mktemp("paths"), max_line_bytes=4096)) as srv:
        yield srv


def _tag(events: list, tag: str) -> list:
    out = []
    for e in events:
        if isinstance(e, dict) and isinstance(e.get("id"), str) and e["id"]:
            e = {**e, "id": tag + e["id"]}
        out.append(e)
    return out


def _outcome(body: dict | None, status: int, raw: bytes, prefix: str) -> tuple:
    if status == 422:
        body = orjson.loads(raw)["error"]
        body = {"accepted": 0, "duplicates": [], "rejected": body["rejected"]}
    assert status in (200, 422), raw[:300]
    pattern = r"^events\[(\d+)\]" if prefix == "array" else r"^line (\d+)"
    rejected = []
    for r in body["rejected"]:
        m = re.match(pattern, r["where"])
        k = int(m.group(1)) - (prefix == "lines")
        rejected.append((k, r["where"][m.end():], r["reason"]))
    return body["accepted"], body["duplicates"], rejected  # duplicates count from 0 on both paths


@settings(max_examples=150, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(events=st.lists(st.one_of(base, bad_event()), min_size=1, max_size=10))
def test_json_array_and_ndjson_agree(server, events):
    COUNTER["n"] += 1
    n = COUNTER["n"]
    lines = [dump(e) for e in _tag(events, f"a{n}-")]
    status, raw, _ = request(server, "POST", "/v1/events", b"[" + b",".join(lines) + b"]")
    via_array = _outcome(orjson.loads(raw) if status == 200 else None, status, raw, "array")
    lines = [dump(e) for e in _tag(events, f"n{n}-")]
    status, raw, _ = request(server, "POST", "/v1/events", b"\n".join(lines), "application/x-ndjson")
    via_lines = _outcome(orjson.loads(raw) if status == 200 else None, status, raw, "lines")
    assert via_array == via_lines


@settings(max_examples=300, deadline=None, derandomize=True, database=None)
@given(event=st.one_of(base, bad_event()))
def test_pydantic_model_and_validator_are_one_rule(event):
    """In-process, the same check: ``EventIn`` with the validator in its context gives exactly the
    validator's result or exception."""
    v = EventValidator(make_config("/tmp/unused"))
    try:
        want = ("ok", v.validate(event, "events[0]"))
    except Exception as exc:  # the validator's own exception, compared by type, place and message
        want = ("err", type(exc), getattr(exc, "where", None), str(exc))
    try:
        got = ("ok", EventIn.model_validate(event, context={"validator": v, "where": "events[0]"}))
    except Exception as exc:
        got = ("err", type(exc), getattr(exc, "where", None), str(exc))
    assert got == want
