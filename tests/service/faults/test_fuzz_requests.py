"""Malformed requests at the transport level, over raw sockets, against a real ``trimtab serve``.

Over 2,000 hypothesis-generated requests that aiohttp's own client would refuse to send: bodies that
do not match their ``Content-Encoding``, encodings the service does not undo, broken request lines and
headers, broken ``Content-Length`` and chunked framing, heads and bodies that never finish. Every
answer is a 4xx in the service's error shape ``{"error": {"code", "message", "where"}}`` (never a 5xx,
never the framework's plain text, never silence), the server logs no error, and the model's
``state_digest`` and learned count are the same afterwards.

The rules are those of RFC 9112 (Fielding, Nottingham, Reschke, 2022: message syntax, sections 2-7:
a request with both Content-Length and Transfer-Encoding, or an invalid Content-Length, is an error;
chunk sizes are hexadecimal) and RFC 9110 sections 8.4 and 15.5 (Content-Encoding; 400, 408, 413,
415, 431). gzip is RFC 1952, deflate RFC 1950.
"""

from __future__ import annotations

import gzip
import zlib

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.service.faults.rawhttp import exchange, request_bytes, serve
from tests.service.servicekit import demo_events, make_config

pytestmark = pytest.mark.slow

SENT = {"n": 0}
FUZZ = settings(deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                       HealthCheck.function_scoped_fixture])
WRITE_ROUTES = ["/v1/events", "/v1/labels", "/v1/score", "/v1/model/rollback"]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fuzzreq")
    cfg = make_config(tmp / "data", max_body_bytes=256 * 1024, max_score_bytes=64 * 1024, max_batch=500,
                      body_timeout_s=2.0, header_timeout_s=2.0, max_header_bytes=4096, max_headers=32)
    proc = serve(tmp, cfg)
    try:
        # the first apply may compile the kernels (a fresh checkout has no cache): minutes on a busy machine
        a = exchange(proc.url, request_bytes("POST", "/v1/events", orjson.dumps(demo_events(300)),
                                             {"Content-Type": "application/json"}), timeout=300)
        assert a.status == 200 and orjson.loads(a.body)["accepted"] == 300
        proc.card = model_card(proc)
        yield proc
    finally:
        assert proc.stop() == 0
        assert not [line for line in proc.log if "Traceback" in line or " ERROR " in line], proc.log[-20:]


def model_card(srv) -> dict:
    a = exchange(srv.url, request_bytes("GET", "/v1/model"))
    assert a.status == 200
    return orjson.loads(a.body)


def refused(srv, data: bytes, timeout: float = 20.0):
    """Send raw ``data``; assert a 4xx in the error shape; return ``(status, error)``."""
    a = exchange(srv.url, data, timeout=timeout)
    SENT["n"] += 1
    assert 400 <= a.status < 500, (a.status, a.body[:300], data[:300])
    assert a.headers.get("content-type", "").startswith("application/json"), (a.headers, a.body[:200])
    err = a.error()
    assert all(isinstance(err.get(k), str) and err[k] for k in ("code", "message", "where")), err
    if a.status in (429, 503):
        assert int(a.headers["retry-after"]) >= 1
    return a.status, err


# ------------------------------------------------------------------ bodies and their encodings
not_json = st.binary(min_size=1, max_size=200).map(lambda b: b"{" + b)
valid_events = st.integers(1, 5).map(lambda n: orjson.dumps(demo_events(n, tag="never-learned-")))


@st.composite
def mismatched(draw):
    """A body that does not match the gzip/deflate it claims."""
    enc = draw(st.sampled_from(["gzip", "x-gzip", "deflate"]))
    inner = draw(st.one_of(not_json, valid_events))
    packed = gzip.compress(inner) if enc != "deflate" else zlib.compress(inner)
    kind = draw(st.sampled_from(["random", "truncated", "flipped", "trailing", "other_format", "plain"]))
    if kind == "random":
        body = draw(st.binary(min_size=1, max_size=300))
    elif kind == "truncated":
        body = packed[:draw(st.integers(1, len(packed) - 1))]
    elif kind == "flipped":
        i = draw(st.integers(0, len(packed) - 1))
        body = packed[:i] + bytes([packed[i] ^ draw(st.integers(1, 255))]) + packed[i + 1:]
    elif kind == "trailing":
        body = packed + draw(st.binary(min_size=1, max_size=20))
    elif kind == "other_format":  # gzip data sent as deflate, zlib data sent as gzip
        body = zlib.compress(inner) if enc != "deflate" else gzip.compress(inner)
    else:
        body = inner
    return enc, kind, body


@settings(FUZZ, max_examples=520)
@given(case=mismatched(), route=st.sampled_from(WRITE_ROUTES))
def test_bodies_that_do_not_match_their_content_encoding(server, case, route):
    enc, kind, body = case
    status, err = refused(server, request_bytes("POST", route, body, {"Content-Type": "application/json",
                                                                      "Content-Encoding": enc}))
    # a flipped byte can leave a stream that still inflates (to JSON that is wrong, or to junk)
    assert status in (400, 413, 422), (status, err)
    if kind in ("random", "truncated", "trailing", "other_format", "plain"):
        assert status == 400 and err["where"] in ("Content-Encoding", "body"), (kind, err)


unsupported = st.one_of(
    st.sampled_from(["br", "zstd", "compress", "x-compress", "exi", "pack200-gzip", "aes128gcm", "dcb", "dcz",
                     "gzip, br", "gzip, gzip", "identity, zstd", "deflate, gzip", "GZIPX", "*"]),
    st.text("abcdefghijklmnopqrstuvwxyz0123456789-_.", min_size=1, max_size=12).filter(
        lambda t: t not in ("gzip", "x-gzip", "deflate", "identity")),
)


@settings(FUZZ, max_examples=420)
@given(enc=unsupported, route=st.sampled_from(WRITE_ROUTES), body=st.one_of(valid_events, not_json))
def test_unsupported_encodings_are_415_and_never_read_as_text(server, enc, route, body):
    """Valid events under an unknown encoding are refused, not learned (the digest check below)."""
    ctype = "application/x-ndjson" if route == "/v1/events" and body.startswith(b"{") else "application/json"
    status, err = refused(server, request_bytes("POST", route, body, {"Content-Type": ctype,
                                                                      "Content-Encoding": enc}))
    assert status == 415 and err["where"] == "Content-Encoding", (status, err)


# ------------------------------------------------------------------ request lines and headers
CTL = [bytes([c]) for c in range(32) if c not in (9, 10, 13)] + [b"\x7f"]
token = st.binary(min_size=1, max_size=12)


@st.composite
def broken_head(draw):
    """A POST to a write route with one defect in its request line or headers (and a bad body)."""
    route = draw(st.sampled_from(WRITE_ROUTES)).encode()
    method, target, version = b"POST", route, b"HTTP/1.1"
    headers = [b"Host: 127.0.0.1", b"Content-Type: application/json", b"Connection: close"]
    body = b"{not json"
    length = b"Content-Length: %d" % len(body)
    kind = draw(st.sampled_from(["method", "target", "version", "ctl_name", "ctl_value", "no_colon", "fold",
                                 "long_value", "many_headers", "length", "length_twice", "length_and_chunked",
                                 "transfer_encoding", "empty_name", "space_before_colon", "nul_line"]))
    if kind == "method":
        method = draw(st.one_of(st.sampled_from([b"P OST", b"POST\x00", b"G\xe9T", b"", b"(POST)", b"POST/"]),
                                token.filter(lambda t: t.isupper() is False)))
    elif kind == "target":
        target = draw(st.sampled_from([b"", b"v1/score", b"/v1/ score", b"/v1/\x00", b"/\xff\xfe", b"/v1/score#x",
                                       b"http://[::1/v1/score", b"/" + b"a" * 5000]))
    elif kind == "version":
        version = draw(st.sampled_from([b"HTTP/9.9", b"HTTP/1.1x", b"FOO/1.1", b"HTTP/1", b"http/1.1", b"HTTP/01.1"]))
    elif kind == "ctl_name":
        headers.append(b"X-" + draw(st.sampled_from(CTL)) + b"Bad: 1")
    elif kind == "ctl_value":
        headers.append(b"X-Bad: a" + draw(st.sampled_from([c for c in CTL if c != b"\x00"] + [b"\x00"])) + b"b")
    elif kind == "no_colon":
        headers.append(draw(st.sampled_from([b"NoColonHere", b"X-Bad a"])))
    elif kind == "fold":
        headers.append(b"X-Folded: a")
        headers.append(b" continued")
    elif kind == "long_value":
        headers.append(b"X-Long: " + b"a" * draw(st.integers(4100, 20000)))
    elif kind == "many_headers":
        headers += [b"X-H%d: v" % k for k in range(draw(st.integers(40, 200)))]
    elif kind == "length":
        length = b"Content-Length: " + draw(st.sampled_from([b"-1", b"abc", b"+10", b"0x10", b"1 0", b"9" * 25,
                                                             b"", b"1.5"]))
    elif kind == "length_twice":
        headers.append(b"Content-Length: %d" % (len(body) + draw(st.integers(1, 5))))
    elif kind == "length_and_chunked":
        headers.append(b"Transfer-Encoding: chunked")
    elif kind == "transfer_encoding":
        length = b"Transfer-Encoding: " + draw(st.sampled_from([b"gzip", b"chunked, chunked", b"chunkedx",
                                                                b"identity", b"gzip, chunked, gzip", b"xyz"]))
        body = b"3\r\nabc\r\n0\r\n\r\n"
    elif kind == "empty_name":
        headers.append(b": value")
    elif kind == "space_before_colon":
        headers.append(b"Content-Type : application/json")
    else:
        headers.append(b"\x00")
    head = b" ".join(p for p in (method, target, version) if p) + b"\r\n" + b"\r\n".join(headers + [length])
    return kind, head + b"\r\n\r\n" + body


@settings(FUZZ, max_examples=700)
@given(case=broken_head(), auth=st.booleans())
def test_broken_request_lines_and_headers(server, case, auth):
    kind, data = case
    if auth:  # with the token too: a defect must not let a write through
        data = data.replace(b"Host: 127.0.0.1", b"Host: 127.0.0.1\r\nAuthorization: Bearer fault-test-token", 1)
    status, err = refused(server, data)
    if kind in ("long_value", "many_headers"):
        assert status in (400, 431), (status, err)


@st.composite
def broken_chunks(draw):
    """A chunked body whose framing is wrong."""
    kind = draw(st.sampled_from(["size_not_hex", "negative", "overflow", "missing_crlf", "extension",
                                 "short_then_end", "garbage"]))
    if kind == "size_not_hex":
        body = draw(st.sampled_from([b"zz", b"1g", b"0x5", b" 5", b"5 5"])) + b"\r\nabcde\r\n0\r\n\r\n"
    elif kind == "negative":
        body = b"-5\r\nabcde\r\n0\r\n\r\n"
    elif kind == "overflow":
        body = b"f" * draw(st.integers(17, 40)) + b"\r\nabc\r\n0\r\n\r\n"
    elif kind == "missing_crlf":
        body = b"5\r\nabcdeXX3\r\nabc\r\n0\r\n\r\n"
    elif kind == "extension":
        body = b"5;" + draw(st.binary(min_size=1, max_size=20).filter(lambda b: b"\r" not in b)) + \
            b"\x00\r\nabcde\r\n0\r\n\r\n"
    elif kind == "short_then_end":
        body = b"a\r\nabc\r\n0\r\n\r\n"  # says 10 bytes, gives 3, then the terminator as data
    else:
        body = draw(st.binary(min_size=1, max_size=60).filter(lambda b: not b[:1].isalnum()))
    return kind, body


@settings(FUZZ, max_examples=400)
@given(case=broken_chunks(), route=st.sampled_from(WRITE_ROUTES))
def test_broken_chunked_framing(server, case, route):
    _, body = case
    data = request_bytes("POST", route, body, {"Content-Type": "application/json", "Transfer-Encoding": "chunked"},
                         length=False)
    refused(server, data)


def test_bodies_received_whole_keep_their_limits_and_framing(server):
    """A body that is already in when its handler starts (sent in one write with its head) is read
    without waiting, and held to the same rules: chunked over the route's limit is a 413 naming the
    key, chunked within it is decoded (RFC 9112 section 7.1) and scored, and a short body under a
    longer Content-Length still waits for the rest (408 once the deadline passes)."""
    features = orjson.dumps({"features": {"ambient_c": 4.0, "van": "V03"}})
    pieces = [features[:7], features[7:20], features[20:]]
    chunked = b"".join(b"%x\r\n%s\r\n" % (len(p), p) for p in pieces) + b"0\r\n\r\n"
    headers = {"Content-Type": "application/json", "Transfer-Encoding": "chunked"}
    a = exchange(server.url, request_bytes("POST", "/v1/score", chunked, headers, length=False))
    assert a.status == 200 and len(orjson.loads(a.body)["scores"]) == 1, a.body[:300]
    big = b"x" * (server.config.service.max_score_bytes + 10)
    over = b"%x\r\n%s\r\n0\r\n\r\n" % (len(big), big)
    status, err = refused(server, request_bytes("POST", "/v1/score", over, headers, length=False))
    assert status == 413 and err["where"] == "body" and "service.max_score_bytes" in err["message"], err
    short = request_bytes("POST", "/v1/score", features, {"Content-Type": "application/json",
                                                           "Content-Length": str(len(features) + 5)}, length=False)
    status, err = refused(server, short, timeout=server.config.service.body_timeout_s + 5)
    assert status == 408 and err["code"] == "request_timeout", err


# ------------------------------------------------------------------ requests that never finish
def test_heads_and_bodies_that_never_finish_get_408(server):
    timeout = server.config.service.body_timeout_s + 5
    cases = [
        b"POST /v1/score HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Ty",  # head never completes
        request_bytes("POST", "/v1/score", b'{"features"', {"Content-Type": "application/json",
                                                            "Content-Length": "400"}, length=False),  # 11 of 400
        request_bytes("POST", "/v1/events", b"", {"Content-Type": "application/json",
                                                  "Transfer-Encoding": "chunked"}, length=False) + b"5\r\nab",
    ]
    for data in cases:
        status, err = refused(server, data, timeout=timeout)
        assert status == 408 and err["code"] == "request_timeout", err


def test_expectations_are_checked_before_the_body_is_sent(server):
    """RFC 9110 section 10.1.1: a server may answer a request that expects 100-continue with a final
    status instead, and answers 417 to an expectation it does not support."""
    head = (b"POST /v1/score HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
            b"Content-Length: 15000000\r\nExpect: 100-continue\r\n\r\n")
    a = exchange(server.url, head)  # the body is never sent: the answer must come without it
    SENT["n"] += 1
    assert a.status == 413 and a.error()["code"] == "too_large", (a.status, a.body[:200])
    for path in ("/v1/score", "/nowhere", "/healthz"):
        status, err = refused(server, request_bytes("POST", path, b"{}", {"Content-Type": "application/json",
                                                                         "Expect": "teapot"}))
        assert status == 417, (path, status, err)
    status, err = refused(server, request_bytes("POST", "/v1/events", b"[]", {
        "Content-Type": "application/json", "Expect": "100-continue", "Content-Encoding": "br"}))
    assert status == 415


def test_nothing_reached_the_model(server):
    """Runs last in this module: after every malformed request the model is the one before."""
    assert SENT["n"] >= 2000, SENT["n"]
    card = model_card(server)
    assert card["state_digest"] == server.card["state_digest"]
    assert card["counters"] == server.card["counters"]
    assert exchange(server.url, request_bytes("GET", "/healthz")).status == 200
