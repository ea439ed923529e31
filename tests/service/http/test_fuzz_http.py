"""Bad input, nothing lost (must-show 3): over 2,000 hypothesis-generated malformed requests against a
real server on a loopback port.

Every answer is a 4xx (never a 5xx) with the error shape ``{"error": {"code", "message", "where"}}``,
and the model's ``state_digest`` and the journal's events are the same afterwards as before. The
malformations follow the event rules of docs/events.md and the JSON grammar of RFC 8259
(Bray, 2017): NaN and Infinity are not JSON, text must be valid UTF-8.
"""

from __future__ import annotations

import http.client
import json
import sqlite3

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.service.servicekit import FEATURES, ServerThread, demo_events, make_config

NUMERIC, CATEGORICAL = FEATURES["numeric"], FEATURES["categorical"]
DECLARED = set(NUMERIC) | set(CATEGORICAL)
SENT = {"n": 0}


def dump(obj) -> bytes:
    """JSON text as a producer might send it (integers of any size; no NaN: that is not JSON)."""
    return json.dumps(obj, allow_nan=False).encode()

FUZZ = settings(deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    cfg = make_config(tmp_path_factory.mktemp("fuzz"), max_body_bytes=256 * 1024, max_batch=500,
                      max_line_bytes=4096)
    with ServerThread(cfg) as srv:
        status, body, _ = request(srv, "POST", "/v1/events", orjson.dumps(demo_events(400)))
        assert status == 200 and orjson.loads(body)["accepted"] == 400
        srv.digest = orjson.loads(request(srv, "GET", "/v1/model")[1])["state_digest"]
        yield srv


def request(srv, method: str, path: str, body: bytes | None = None, ctype: str | None = "application/json"):
    host, port = srv.url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=30)
    try:
        headers = {"Content-Type": ctype} if ctype else {}
        headers["Authorization"] = f"Bearer {srv.token}"
        conn.request(method, path, body=body, headers=headers)
        r = conn.getresponse()
        return r.status, r.read(), r
    finally:
        conn.close()


def assert_refused(srv, method, path, body=None, ctype="application/json"):
    status, raw, _ = request(srv, method, path, body, ctype)
    SENT["n"] += 1
    assert 400 <= status < 500, (status, raw[:300], body[:200] if body else body)
    err = orjson.loads(raw)["error"]
    assert set(err) >= {"code", "message", "where"}
    assert all(isinstance(err[k], str) and err[k] for k in ("code", "message", "where")), err
    return status, err


# ------------------------------------------------------------------ strategies
junk = st.recursive(st.none() | st.booleans() | st.integers(-10**6, 10**6) | st.floats(allow_nan=False,
                    allow_infinity=False) | st.text(max_size=12),
                    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=4), inner, max_size=3),
                    max_leaves=8)
not_a_number = st.one_of(st.text(max_size=8), st.sampled_from(["NaN", "nan", "inf", "-Infinity", "1e999"]),
                         st.lists(junk, max_size=3), st.dictionaries(st.text(max_size=3), junk, max_size=2))
good_features = st.fixed_dictionaries({}, optional={**{n: st.floats(-1e4, 1e4) for n in NUMERIC},
                                                    **{c: st.sampled_from(["V01", "urban", 7]) for c in CATEGORICAL}})
base = st.fixed_dictionaries({"id": st.text(min_size=1, max_size=12), "features": good_features,
                              "target": st.floats(-100, 100)})


@st.composite
def bad_event(draw):
    """An event with at least one defect (and possibly valid parts around it)."""
    e = dict(draw(base))
    kind = draw(st.sampled_from(["numeric", "categorical", "unknown_feature", "features", "top_key", "id",
                                 "target", "no_id", "ts", "not_object"]))
    if kind == "numeric":
        e["features"] = {**e["features"], draw(st.sampled_from(NUMERIC)): draw(not_a_number)}
    elif kind == "categorical":
        bad = st.one_of(st.lists(junk, max_size=2), st.dictionaries(st.text(max_size=2), junk, max_size=2),
                        st.floats(0.1, 0.9))
        e["features"] = {**e["features"], draw(st.sampled_from(CATEGORICAL)): draw(bad)}
    elif kind == "unknown_feature":
        name = draw(st.text(min_size=1, max_size=10).filter(lambda s: s not in DECLARED))
        e["features"] = {**e["features"], name: draw(junk)}
    elif kind == "features":
        if draw(st.booleans()):
            del e["features"]
        else:
            e["features"] = draw(st.one_of(st.lists(junk, max_size=3), st.text(max_size=5), st.integers(), st.none()))
    elif kind == "top_key":
        e[draw(st.text(min_size=1, max_size=8).filter(lambda s: s not in ("id", "ts", "features", "target")))] = 1
    elif kind == "id":
        e["id"] = draw(st.one_of(st.just(""), st.integers(), st.lists(junk, max_size=2), st.just("x" * 257),
                                 st.just("\u00e9" * 129), st.sampled_from(["a\x00b", "\x1f", "id\x7f", "\x85"])))
    elif kind == "target":
        e["target"] = draw(st.one_of(st.text(max_size=6), st.booleans(), st.lists(junk, max_size=2),
                                     st.dictionaries(st.text(max_size=2), junk, max_size=2)))
    elif kind == "no_id":
        del e["id"]
    elif kind == "ts":
        e["ts"] = draw(st.sampled_from(["yesterday", "2026-13-01T00:00:00Z", "2026-12-01T10:00:00", True, [], {}]))
    else:
        return draw(st.one_of(st.lists(junk, max_size=3), st.text(max_size=8), st.integers(), st.none()))
    return e


garbage_lines = st.sampled_from([
    b'{"id": "a", "features": {"ambient_c": NaN}, "target": 1.0}', b'{"features": {"load_kg": Infinity}}',
    b'{"id": "b", "features": {"ambient_c": -Infinity}, "target": 2}', b"\xff\xfe\xfa{}", b'{"id": "u", "f\xc3',
    b'{"id": "x", "features": {', b"[" * 3000 + b"]" * 3000, b'{"features": {"van": "' + b"a" * 5000 + b'"}}',
])
nd_line = st.one_of(bad_event().map(dump), garbage_lines,
                    st.binary(min_size=1, max_size=30).filter(lambda b: b"\n" not in b and b.strip()))


def _invalid_json(b: bytes) -> bool:
    """Not JSON (a blank body is not sent: for the rollback route it means "no body")."""
    try:
        orjson.loads(b)
    except orjson.JSONDecodeError:
        return True
    return False


# ------------------------------------------------------------------ the runs
@settings(FUZZ, max_examples=560)
@given(batch=st.lists(bad_event(), min_size=1, max_size=8))
def test_event_arrays_with_only_bad_items(server, batch):
    status, err = assert_refused(server, "POST", "/v1/events", dump(batch))
    assert status == 422 and err["where"].startswith("events[") and len(err["rejected"]) == len(batch)


@settings(FUZZ, max_examples=460)
@given(lines=st.lists(nd_line, min_size=1, max_size=6))
def test_ndjson_bodies_with_only_bad_lines(server, lines):
    status, err = assert_refused(server, "POST", "/v1/events", b"\n".join(lines), "application/x-ndjson")
    assert status == 422 and err["where"].startswith("line ")


score_bodies = st.one_of(
    st.builds(lambda f: {"features": f}, st.one_of(st.lists(junk, max_size=2), st.text(max_size=4), st.none(),
                                                   st.integers())),
    bad_event().filter(lambda e: isinstance(e, dict) and isinstance(e.get("features"), dict)).map(
        lambda e: {"features": e["features"], "id": e.get("id", 1), "remember": "yes"}),
    st.builds(lambda e: {"events": e}, st.lists(bad_event(), min_size=1, max_size=4)),
    st.builds(lambda f: {"features": f, "events": []}, good_features),
    st.builds(lambda f, it: {"features": f, "iterate": it}, good_features, st.text(max_size=6).filter(
        lambda s: s not in ("raw", "averaged"))),
    st.builds(lambda f, k: {"features": f, k: 1}, good_features, st.text(min_size=1, max_size=6).filter(
        lambda s: s not in ("features", "events", "id", "ts", "remember", "iterate"))),
    st.lists(junk, max_size=3), st.just({}),
)


@settings(FUZZ, max_examples=480)
@given(body=score_bodies)
def test_malformed_score_requests(server, body):
    assert_refused(server, "POST", "/v1/score", dump(body))


label_item = st.one_of(junk.filter(lambda x: not isinstance(x, dict)), st.fixed_dictionaries(
    {"id": st.one_of(st.just(""), st.integers(), st.none(), st.text(min_size=1, max_size=8)),
     "target": st.one_of(st.text(max_size=4), st.lists(junk, max_size=2), st.floats(-5, 5))},
    optional={"extra": junk}))


@settings(FUZZ, max_examples=250)
@given(body=st.one_of(st.lists(label_item, min_size=1, max_size=5), st.dictionaries(st.text(max_size=3), junk,
                                                                                     max_size=2)))
def test_malformed_labels(server, body):
    assert_refused(server, "POST", "/v1/labels", dump(body))


ROUTES = ["/v1/score", "/v1/events", "/v1/labels", "/v1/model/rollback"]


@settings(FUZZ, max_examples=300)
@given(case=st.one_of(
    st.tuples(st.just("bytes"), st.sampled_from(ROUTES),
              st.binary(max_size=60).filter(lambda b: b.strip() and _invalid_json(b))),
    st.tuples(st.just("ctype"), st.sampled_from(ROUTES[:3]), st.sampled_from(
        ["text/plain", "application/xml", "multipart/form-data", "application/octet-stream", None, "text/json"])),
    st.tuples(st.just("method"), st.sampled_from(ROUTES + ["/v1/model", "/metrics", "/v1/incidents"]),
              st.sampled_from(["PUT", "DELETE", "PATCH"])),
    st.tuples(st.just("path"), st.text(alphabet="abcdefghijklmnopqrstuvwxyz/._-0123456789", min_size=1,
                                       max_size=20), st.sampled_from(["GET", "POST"])),
    st.tuples(st.just("rollback"), st.one_of(st.builds(lambda r: {"reason": r}, junk.filter(
        lambda x: not isinstance(x, str))), st.builds(lambda k: {"reason": "x", k: 1}, st.text(
            min_size=1, max_size=5).filter(lambda s: s != "reason")), st.lists(junk, max_size=2)), st.none()),
))
def test_wrong_bytes_types_methods_paths(server, case):
    kind, a, b = case
    if kind == "bytes":
        status, err = assert_refused(server, "POST", a, b or b"{", "application/json")
        assert status == 400 and err["where"] == "body"
    elif kind == "ctype":
        status, err = assert_refused(server, "POST", a, b"[]", b)
        assert status == 415
    elif kind == "method":
        assert assert_refused(server, b, a, b"{}")[0] == 405
    elif kind == "path":
        path = "/nowhere/" + a
        assert assert_refused(server, b, path, b"{}" if b == "POST" else None)[0] == 404
    else:
        assert assert_refused(server, "POST", "/v1/model/rollback", dump(a))[0] in (400, 422)


def test_oversize_bodies_huge_arrays_and_deep_nesting(server):
    big = b'{"features": {"ambient_c": 1.0}}\n' * 9000  # about 290 KB, over the 256 KiB limit
    for route, ctype in (("/v1/events", "application/x-ndjson"), ("/v1/score", "application/json"),
                         ("/v1/labels", "application/json")):
        status, err = assert_refused(server, "POST", route, big, ctype)
        assert status == 413 and "262144-byte limit" in err["message"]
    status, err = assert_refused(server, "POST", "/v1/events", dump([{"features": {}}] * 501))
    assert status == 413 and "501 events" in err["message"] and "500-item limit" in err["message"]
    status, err = assert_refused(server, "POST", "/v1/events", b'{"features": {}}\n' * 501, "application/x-ndjson")
    assert status == 413
    status, err = assert_refused(server, "POST", "/v1/labels", dump([{"id": "a", "target": 1}] * 501))
    assert status == 413
    for depth in (600, 5000):
        status, err = assert_refused(server, "POST", "/v1/events", b"[" * depth + b"]" * depth)
        assert status in (400, 422)
        status, err = assert_refused(server, "POST", "/v1/score", b'{"features": ' + b"[" * depth + b"]" * depth + b"}")
        assert status in (400, 422)


def test_nothing_reached_the_model(server):
    """Runs last in this module: after every malformed request the model and journal are unchanged."""
    assert SENT["n"] >= 2000, SENT["n"]
    card = orjson.loads(request(server, "GET", "/v1/model")[1])
    assert card["state_digest"] == server.digest
    db = sqlite3.connect(f"{server.config.service.data_dir}/trimtab.sqlite")
    assert db.execute("SELECT count(*) FROM journal WHERE kind = 0").fetchone()[0] == 400
    assert card["counters"]["learned"] + card["counters"]["held_out"] == 400
    status, _, _ = request(server, "GET", "/healthz")
    assert status == 200
