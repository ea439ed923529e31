"""Must-show 3: hostile ids at the boundary of a real ``trimtab serve`` process.

The id grammar is 1 to 256 bytes of UTF-8 without control characters. The control characters are
Unicode's general category Cc (The Unicode Standard, version 15.1, section 23.1 "Control Codes"):
the 33 of C0 and DEL (U+0000-U+001F, U+007F) that the issue names, and the 32 of C1
(U+0080-U+009F), which the service refuses too. UTF-8 validity follows RFC 3629 (Yergeau, 2003,
section 3: no overlong forms, no surrogates U+D800-U+DFFF, nothing past U+10FFFF), which Python's
own codec implements; a JSON text must be UTF-8 (RFC 8259, Bray, 2017, section 8.1).

Each bad item is rejected on its own with a 4xx reason naming where it is; the good items of the
same batch are learned (the state digest equals an offline engine that learned only them, and the
offline replay of the same NDJSON bytes, on its columnar path and its line-by-line path, rejects
the same lines for the same reasons); producers sending clean batches at the same time see
nothing of it.
"""

from __future__ import annotations

import http.client
import json
import threading

import orjson
import pytest

from service.config import load_config
from service.engine import Engine
from service.events import EventValidator
from service.feeds.files import read_feed
from service.replay.runner import run_replay
from tests.service.servicekit import AUTH, ServeProcess, demo_events, make_config, toml_text

CONTROL = [chr(c) for c in range(0x20)] + ["\x7f"]          # the 33 of C0 and DEL
C1 = [chr(c) for c in range(0x80, 0xA0)]                      # the 32 of C1
OVERLONG = {"x" * 257: 257, "\u00e9" * 129: 258, "\u20ac" * 86: 258, "\U0001F69A" * 65: 260}
#: raw bytes that are not UTF-8 (RFC 3629): a stray continuation byte, a truncated sequence, an
#: overlong "/", an encoded surrogate, a code point past U+10FFFF, a byte UTF-8 never uses
NOT_UTF8 = [b"\x80", b"\xe2\x82", b"\xc0\xaf", b"\xed\xa0\x80", b"\xf4\x90\x80\x80", b"\xff"]


def _edge_ids(tag: str) -> list[str]:
    """Valid ids at the edges: exactly 256 bytes (1- and 2-byte characters), characters just past
    C1 (U+00A0), outside the BMP, and a line separator (not a control character)."""
    room = 256 - len(tag)
    out = [tag + "x" * room, tag + "\u00e9" * (room // 2) + "x" * (room % 2), tag + "\u00a0nbsp",
           tag + "\U0001F69A-van", tag + "\u2028sep"]
    assert [len(i.encode()) for i in out[:2]] == [256, 256]
    return out


def _call(url: str, method: str, path: str, body: bytes | None = None,
          ctype: str = "application/json") -> tuple[int, dict]:
    host, port = url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=60)
    try:
        conn.request(method, path, body=body, headers={"Content-Type": ctype, **AUTH})
        r = conn.getresponse()
        return r.status, orjson.loads(r.read())
    finally:
        conn.close()


def _bad_ids(tag: str) -> dict[str, str]:
    """id -> the reason's telling part, for every bad id the grammar refuses."""
    out = {f"{tag}-{k}{ch}z": f"control character U+{ord(ch):04X} at character {len(f'{tag}-{k}')}"
           for k, ch in enumerate(CONTROL + C1)}
    out.update({text: f"{size} bytes of UTF-8, over the 256-byte limit" for text, size in OVERLONG.items()})
    out[""] = "empty"
    return out


def _mixed(tag: str) -> tuple[list, dict[int, str], list[dict]]:
    """Good demo events with the bad ids interleaved: (items, {index: reason part}, good items)."""
    goods = demo_events(200, tag=f"{tag}-good-")
    for k, ident in enumerate(_edge_ids(tag)):
        goods[10 * k + 5]["id"] = ident
    template = demo_events(1)[0]
    items, bad = [], {}
    for k, (ident, reason) in enumerate(_bad_ids(tag).items()):
        items += goods[2 * k:2 * k + 2]
        bad[len(items)] = reason
        items.append({**template, "id": ident})
    items += goods[2 * len(bad):]
    return items, bad, goods


def _offline_digest(config, events: list[dict]) -> str:
    engine = Engine(config)
    engine.apply_events([EventValidator(config).validate(e) for e in events])
    return engine.state_digest


@pytest.fixture
def served(tmp_path):
    cfg = make_config(tmp_path / "data")
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(cfg))
    server = ServeProcess(conf)
    try:
        server.wait_ready()
        yield server, cfg, conf
    finally:
        server.stop()


def test_every_control_character_and_overlong_id_is_a_per_item_rejection(served):
    """A JSON array mixing 65 control-character ids, 4 overlong ids (ASCII and multi-byte, <= 256
    characters but > 256 bytes) and an empty id into good events: 200, each bad item rejected
    with its index and reason, every good item (the 256-byte edge cases too) learned exactly."""
    server, cfg, _ = served
    items, bad, goods = _mixed("arr")
    status, body = _call(server.url, "POST", "/v1/events", orjson.dumps(items))
    assert status == 200, body
    got = {r["where"]: r["reason"] for r in body["rejected"]}
    assert set(got) == {f"events[{i}].id" for i in bad}
    for i, part in bad.items():
        assert part in got[f"events[{i}].id"], (i, got[f"events[{i}].id"])
        assert "1 to 256 bytes of UTF-8 without control characters" in got[f"events[{i}].id"]
    assert body["accepted"] == len(goods) == len(items) - len(bad)
    card = _call(server.url, "GET", "/v1/model")[1]
    assert card["state_digest"] == _offline_digest(cfg, goods)
    # the bad items left nothing behind: re-sending the good ones finds them all, and only them
    status, again = _call(server.url, "POST", "/v1/events", orjson.dumps(goods))
    assert status == 200 and again["accepted"] == 0 and len(again["duplicates"]) == len(goods)


def _ndjson_feed(tag: str) -> tuple[bytes, dict[int, str], list[dict]]:
    items, bad, goods = _mixed(tag)
    lines = [orjson.dumps(e) for e in items]
    template = orjson.dumps({**demo_events(1)[0], "id": "PLACEHOLDER"})
    for k, raw in enumerate(NOT_UTF8):
        at = 7 + 11 * k
        lines.insert(at, template.replace(b"PLACEHOLDER", b"u8-" + raw + b"-x"))
        bad = {(i + 1 if i >= at else i): r for i, r in bad.items()}
        bad[at] = f"not valid JSON: invalid UTF-8 at byte offset {template.index(b'PLACEHOLDER') + 3} of the line"
    lines.append(template.replace(b"PLACEHOLDER", b"\\ud800lone"))  # a lone surrogate escape is not JSON text
    bad[len(lines) - 1] = "not valid JSON"
    return b"\n".join(lines) + b"\n", bad, goods


def test_invalid_utf8_and_bad_ids_in_ndjson_agree_with_offline_replay(served, tmp_path):
    """NDJSON with the same bad ids plus lines that are not UTF-8: per-line rejections naming the
    line (and the byte offset of the bad byte); the live digest equals the offline replay's on both
    of its parse paths, which reject the same lines for the same reasons."""
    server, cfg, conf = served
    body, bad, goods = _ndjson_feed("nd")
    status, out = _call(server.url, "POST", "/v1/events", body, "application/x-ndjson")
    assert status == 200, out
    live = {r["where"]: r["reason"] for r in out["rejected"]}
    assert {w.split(".")[0] for w in live} == {f"line {i + 1}" for i in bad}
    for i, part in bad.items():
        reason = next(r for w, r in live.items() if w.split(".")[0] == f"line {i + 1}")
        assert part in reason, (i, reason)
    assert out["accepted"] == len(goods)
    digest = _call(server.url, "GET", "/v1/model")[1]["state_digest"]
    assert digest == _offline_digest(cfg, goods)

    feed = tmp_path / "hostile.ndjson"
    feed.write_bytes(body)
    config = load_config(conf)
    for columnar in (True, False):
        offline = {r.where: r.reason for chunk in read_feed(feed, config, columnar=columnar) for _, r in chunk.rejected}
        assert offline == live, columnar
    assert run_replay([feed], config)["summary"]["state_digest"] == digest


def _producer(url: str, tag: str, rounds: int, results: list) -> None:
    for k in range(rounds):
        events = demo_events(150, tag=f"{tag}{k}-")
        results.append(_call(url, "POST", "/v1/events", orjson.dumps(events)) + (len(events),))


def test_hostile_batches_do_not_disturb_concurrent_producers(served):
    """Two producers post clean batches while a third posts batches full of bad ids (JSON arrays
    and NDJSON with invalid UTF-8): the clean ones get every event accepted, no rejection, no
    error; the hostile one gets its good items accepted and its bad ones rejected each time."""
    server, _, _ = served
    clean: list = []
    threads = [threading.Thread(target=_producer, args=(server.url, f"p{n}-", 6, clean)) for n in range(2)]
    for t in threads:
        t.start()
    hostile = []
    for k in range(6):
        if k % 2:
            body, bad, goods = _ndjson_feed(f"h{k}")
            hostile.append(_call(server.url, "POST", "/v1/events", body, "application/x-ndjson") + (bad, goods))
        else:
            items, bad, goods = _mixed(f"h{k}")
            hostile.append(_call(server.url, "POST", "/v1/events", orjson.dumps(items)) + (bad, goods))
    for t in threads:
        t.join(120)
    assert len(clean) == 12
    for status, body, n in clean:
        assert status == 200 and body["accepted"] == n and body["rejected"] == [] and body["duplicates"] == [], body
    for status, body, bad, goods in hostile:
        assert status == 200 and body["accepted"] == len(goods) and len(body["rejected"]) == len(bad), body
    total = sum(n for _, _, n in clean) + sum(len(goods) for *_, goods in hostile)
    counters = _call(server.url, "GET", "/v1/model")[1]["counters"]
    assert counters["learned"] + counters["held_out"] == total


def test_labels_and_remember_enforce_the_grammar(served):
    """Remember-on-score refuses a bad id (422 naming it) and remembers nothing; a labels batch
    rejects bad ids item by item and learns the good ones."""
    server, _, _ = served
    feats = demo_events(1)[0]["features"]
    for ident in ("a\x00b", "x" * 257, "\u20ac" * 86, "\x85"):
        status, body = _call(server.url, "POST", "/v1/score",
                             orjson.dumps({"features": feats, "id": ident, "remember": True}))
        assert status == 422 and body["error"]["where"] == "id", body
    good = [f"lab-{k}" for k in range(5)]
    for ident in good:
        status, body = _call(server.url, "POST", "/v1/score", orjson.dumps({"features": feats, "id": ident,
                                                                             "remember": True}))
        assert status == 200 and body["remembered"] == 1
    labels = [{"id": i, "target": 3.0} for i in good[:3]] + [{"id": "lab-\x07", "target": 1.0},
                                                          {"id": "y" * 300, "target": 1.0}] + \
             [{"id": i, "target": 3.0} for i in good[3:]]
    status, body = _call(server.url, "POST", "/v1/labels", orjson.dumps(labels))
    assert status == 200 and body["accepted"] == 5, body
    got = {r["where"]: r["reason"] for r in body["rejected"]}
    assert set(got) == {"labels[3].id", "labels[4].id"}
    assert "control character U+0007" in got["labels[3].id"] and "300 bytes" in got["labels[4].id"]


def test_long_categorical_values_and_integers_past_64_bits_are_per_item(served):
    """Categorical values over ``features.max_value_bytes`` (256 bytes of UTF-8) and integers outside
    the signed 64-bit range (as integers or integral floats) are rejected per item naming the
    feature; an integer past 64 bits as a *numeric* value is a double (RFC 8259 section 6 leaves
    number precision to the implementation; the service reads it as IEEE 754 binary64), learned."""
    server, cfg, _ = served
    tmpl = demo_events(120, tag="val-")
    cat_bad = {"x" * 257: "257 bytes", "\u00e9" * 129: "258 bytes", 2**63: "outside the signed 64-bit range",
               -(10**20): "outside the signed 64-bit range", 10**30: "outside the signed 64-bit range",
               2**64: "outside the signed 64-bit range", 1e300: "outside the signed 64-bit range"}
    items, bad = [], {}
    for k, (value, reason) in enumerate(cat_bad.items()):
        items += tmpl[3 * k:3 * k + 3]
        bad[len(items)] = reason
        items.append({**tmpl[0], "id": f"val-bad-{k}", "features": {**tmpl[0]["features"], "van": value}})
    edge = [{**tmpl[0], "id": f"val-edge-{k}", "features": {**tmpl[0]["features"], **feats}}
            for k, feats in enumerate([{"van": "v" * 256}, {"van": "\u00e9" * 128}, {"van": 2**63 - 1},
                                       {"van": -(2**63)}, {"ambient_c": 10**30}, {"ambient_c": 2**64 + 5}])]
    items += tmpl[3 * len(cat_bad):] + edge
    goods = [e for i, e in enumerate(items) if i not in bad]
    body = b"[" + b",".join(json.dumps(e).encode() for e in items) + b"]"  # integers of any size, as sent
    status, out = _call(server.url, "POST", "/v1/events", body)
    assert status == 200, out
    got = {r["where"]: r["reason"] for r in out["rejected"]}
    assert set(got) == {f"events[{i}].features.van" for i in bad}, got
    for i, part in bad.items():
        assert part in got[f"events[{i}].features.van"], got[f"events[{i}].features.van"]
    assert out["accepted"] == len(goods)
    # the same lines as NDJSON: the same per-line answers
    lines = b"\n".join(json.dumps({**e, "id": "nd-" + e["id"]}).encode() for e in items)
    status, nd = _call(server.url, "POST", "/v1/events", lines, "application/x-ndjson")
    assert status == 200 and nd["accepted"] == len(goods)
    assert {r["where"] for r in nd["rejected"]} == {f"line {i + 1}.features.van" for i in bad}
