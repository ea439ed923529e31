"""The compiled parse of plain NDJSON lines (``service.feeds.ndjson_direct``) against orjson.

The references outside trimtab: orjson's reading of each number (a correctly rounded parser, so the
double nearest the decimal; Python's ``float`` of the text agrees) and orjson + the validator
(``service.events.parse_ndjson``) for whole chunks, which the columnar reader must match bit for bit
whichever of its paths (this parse, Arrow's reader, the validator) takes a line. The parse takes a
number only on the exact fast path of W. D. Clinger, "How to read floating point numbers
accurately" (PLDI 1990), and must leave every other line to the general readers.
"""

from __future__ import annotations

import random

import numpy as np
import orjson
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.config import config_from_dict
from service.engine import Engine
from service.events import parse_ndjson
from service.feeds.ndjson_columns import ArrowNdjson, prepare_events
from service.feeds.ndjson_direct import DirectParse
from service.feeds.scan_codes import PARSED

CONFIG = {"name": "direct", "features": {"numeric": ["x", "y"], "categorical": ["site", "kind"], "hash_bits": 8,
                                         "scaling": "none"}}


def _parse(lines: list[bytes], binary: bool = False):
    config = dict(CONFIG, model={"task": "binary", "loss": "logistic"}) if binary else CONFIG
    engine = Engine(config_from_dict(config))
    buf = b"\n".join(lines) + b"\n"
    _, _, flags, _, parsed = DirectParse(engine.validator).scan(buf)
    return (None if parsed is None else parsed[0]), flags == PARSED


def _same_as_validator(buf: bytes, config: dict = CONFIG) -> ArrowNdjson:
    cfg = config_from_dict(config)
    fast, exact = ArrowNdjson(Engine(cfg)), Engine(cfg)
    got, rej = fast.chunk(buf, 1)
    events, ref_rej, where = parse_ndjson(buf, exact.validator)
    assert [r for _, r in rej] == ref_rej
    if not events:
        assert got is None
        return fast
    want = prepare_events(exact, events, where)
    x, y = got.batch, want.batch
    assert np.array_equal(x.rows.indptr, y.rows.indptr) and np.array_equal(x.rows.indices, y.rows.indices)
    assert x.rows.values.tobytes() == y.rows.values.tobytes()
    assert x.y.tobytes() == y.y.tobytes() and x.ts.tobytes() == y.ts.tobytes()
    assert np.array_equal(x.mode, y.mode)
    assert (x.ids.to_pylist() if hasattr(x.ids, "to_pylist") else list(x.ids)) == list(y.ids)
    assert np.array_equal(got.hashes, want.hashes) and np.array_equal(got.where, want.where)
    assert set(got.categories) == set(want.categories)  # the values the mapper remembers; parts may repeat one
    return fast


def _decimal(rng: random.Random) -> bytes:
    """A JSON number text: sign, integer part, fraction and exponent of random lengths."""
    text = rng.choice(["", "-"]) + rng.choice(["0", str(rng.randint(1, 9)) + "".join(
        rng.choice("0123456789") for _ in range(rng.randint(0, 17)))])
    if rng.random() < 0.6:
        text += "." + "".join(rng.choice("0123456789") for _ in range(rng.randint(1, 17)))
    if rng.random() < 0.3:
        text += rng.choice("eE") + rng.choice(["", "+", "-"]) + str(rng.randint(0, 30))
    return text.encode()


def test_numbers_are_the_doubles_orjson_reads():
    """Every number the parse takes is orjson's double bit for bit; the ones it leaves are exactly those
    off Clinger's exact path (over 15 significant digits or a decimal exponent past 22) and negative
    zeros (orjson reads ``-0`` as the integer 0)."""
    rng = random.Random(3)
    texts = [_decimal(rng) for _ in range(20_000)]
    texts += [b"0.1", b"0.30000000000000004", b"1772439300.0", b"-0.0", b"-0", b"1e22", b"1e23", b"123456789012345",
              b"1234567890123456", b"0.000000000000000000001", b"4.35", b"9007199254740993", b"1E-22", b"5e-324"]
    lines = [b'{"id":"n","features":{"x":' + t + b"}}" for t in texts]
    cols, done = _parse(lines)
    got = cols.numeric["x"]
    want = np.array([orjson.loads(t) for t in np.asarray(texts, dtype=object)[done]], dtype=np.float64)
    assert got.tobytes() == want.tobytes()
    assert want.tobytes() == np.array([float(t) for t in np.asarray(texts, dtype=object)[done]]).tobytes()
    for text, taken in zip(texts, done):
        mantissa, _, exp = text.lower().lstrip(b"-").partition(b"e")
        whole, _, frac = mantissa.partition(b".")
        significant = (whole + frac).lstrip(b"0")
        e10 = int(exp or 0) - len(frac)
        zero = not significant.strip(b"0")
        exact = len(significant) <= 15 and (zero or -22 <= e10 <= 22) and not (zero and text.startswith(b"-"))
        assert bool(taken) == exact, text
    assert done.sum() > 8000


def test_the_shapes_it_takes_and_the_lines_it_leaves():
    """Key order, whitespace, nulls and integer or boolean categoricals are taken; escapes, unknown
    or repeated keys, booleans as numbers, a line that is not one object are left."""
    taken = [b'{"id":"a","ts":1.5,"features":{"x":1,"site":"s1","kind":3},"target":2.5}',
             b' { "target" : 2 , "features" : { "kind" : true , "y" : null } , "id" : "b" } ',
             b'{"features":{},"id":null,"ts":null,"target":null}',
             b'{"features":{"site":-12,"kind":false,"x":-0.5e-3}}',
             b'{"id":"\xc3\xa9t\xc3\xa9","features":{"site":"\xe2\x82\xac"}}']
    left = [b'{"id":"a\\n","features":{}}', b'{"id":"a","features":{"z":1}}', b'{"id":"a","q":1,"features":{}}',
            b'{"id":"a","features":{"x":1,"x":2}}', b'{"id":"a","features":{"x":true}}',
            b'{"id":"a","features":{"site":1.0}}', b'{"id":"a","features":{"site":-0}}',
            b'{"id":"a","features":{"site":[1]}}', b'{"id":"a"}', b'{"id":"a","features":{}} {}',
            b'{"id":"a","features":{},}', b'{"id":"a","features":{,"x":1}}', b'{"id":"a","ts":"2026-03-02T08:15:00Z",'
            b'"features":{}}', b'{"id":"a","features":{},"target":true}', b'{"id":"a","features":{"x":01}}',
            b'{"id":"a","features":{"x":1.}}', b'{"id":"a","features":{"x":.5}}', b'{"id":"a","features":{"x":+1}}',
            b'{"id":"a","features":null}', b'{"id":"a\x01","features":{}}', b'{"id":"a","features":{"x":1e400}}']
    _, done = _parse(taken + left)
    assert done.tolist() == [True] * len(taken) + [False] * len(left)
    _, done = _parse([b'{"id":"a","features":{},"target":true}', b'{"id":"a","features":{},"target":false}'],
                     binary=True)
    assert done.all()
    _same_as_validator(b"\n".join(taken + left) + b"\n")


def test_lines_it_leaves_are_classed_as_the_line_scan_classes_them():
    """Blank lines stay blank, a line over the byte limit or with NaN goes to the validator even when
    its shape is the common one, other lines to Arrow's reader; ends exclude the newline."""
    engine = Engine(config_from_dict(CONFIG))
    long = b'{"id":"' + b"x" * 60 + b'","features":{}}'
    lines = [b'{"id":"a","features":{}}', b"", b" \t\r", long, b'{"id":"b","features":{"x":NaN}}',
             b'{"id":"c\\u0041","features":{}}', b'{"id":"d","features":{}}\r', b"{}"]
    buf = b"\n".join(lines)
    starts, ends, flags, escaped, (cols, _) = DirectParse(engine.validator).scan(buf, 70)
    assert [buf[a:b] for a, b in zip(starts, ends)] == lines
    assert flags.tolist() == [3, 0, 0, 2, 2, 1, 3, 1] and escaped.tolist() == [False] * 5 + [True, False, False]
    assert cols.ids.to_pylist() == ["a", "d"]


def test_a_value_of_the_wrong_type_is_still_rejected_with_the_validators_words():
    """A string where a number is declared, a number as the id: the rejection names the line and the
    field as the validator does, and the lines around it are read by the compiled parse."""
    lines = [orjson.dumps({"id": f"k{k}", "features": {"x": k / 4, "site": f"s{k % 3}"}, "target": k / 8})
             for k in range(40)]
    lines[7] = b'{"id":"k7","features":{"x":"warm","site":"s1"},"target":1.0}'
    lines[19] = b'{"id":19,"features":{"x":1.0},"target":1.0}'
    lines[30] = b'{"id":"k30","features":{"x":1.0},"target":"hot"}'
    fast = _same_as_validator(b"\n".join(lines) + b"\n")
    before = fast.fallback_lines
    got, rejected = fast.chunk(b"\n".join(lines) + b"\n", 1)
    assert [(n, r.where, r.reason) for n, r in rejected] == [
        (8, "line 8.features.x", "expected a number, got a string"),
        (20, "line 20.id", "expected a string, got a number (an id is 1 to 256 bytes of UTF-8 without control "
                           "characters)"),
        (31, "line 31.target", "expected a number, got a string")]
    assert fast.fallback_lines - before == 3 and len(got.batch) == 37


_VALUES = [b"1", b"-0", b"0.5", b"-2.25e3", b"1e-7", b"true", b"false", b"null", b'"x"', b'""', b'"s\xc3\xa9"',
           b'"a\\"b"', b"12", b"-7", b"7.0", b"[]", b"1e400", b"123456789012345678", b"1234567890123456789"]
_KEYS = [b'"x"', b'"y"', b'"site"', b'"kind"', b'"other"']
_WS = [b"", b" ", b"\t", b" \r "]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.lists(st.tuples(st.sampled_from(_KEYS), st.sampled_from(_VALUES)), max_size=5),
                          st.sampled_from([b'"id":"k%d"', b'"id":null', b'"id":5', None]),
                          st.sampled_from([b'"target":1.5', b'"target":-0', b'"target":null', b'"target":true', None]),
                          st.sampled_from([b'"ts":17.5', b'"ts":"2026-03-02T08:15:00Z"', None]),
                          st.sampled_from(_WS), st.randoms(use_true_random=False)), min_size=1, max_size=10))
def test_generated_lines_match_the_validator(spec):
    """Property (hypothesis): lines with shuffled keys, random whitespace and values of every JSON type
    give exactly the validator's events and rejections."""
    lines = []
    for k, (feats, ident, target, ts, ws, rng) in enumerate(spec):
        body = (b"," + ws).join(key + ws + b":" + ws + value for key, value in feats)
        top = [b'"features"' + ws + b":{" + body + b"}"]
        top += [part.replace(b"%d", str(k).encode()) for part in (ident, target, ts) if part is not None]
        rng.shuffle(top)
        lines.append(ws + b"{" + (b"," + ws).join(top) + b"}" + ws)
    _same_as_validator(b"\n".join(lines) + b"\n")


def test_dedup_keys_of_a_body_are_blake2b_128_as_hashlib_computes_it():
    """The compiled 16-byte keys of a parsed body equal ``hashlib.blake2b(id, digest_size=16)`` (RFC 7693)
    for short, multi-block and non-ASCII ids, and ``None`` for an event without an id."""
    import hashlib

    from service.feeds.ndjson_body import BodyParser
    from service.storage.seen import id_key

    idents = ["a", "V07-0001842", "é" * 70, "x" * 127, "x" * 128, "x" * 129, "😀" * 40, "y" * 256]
    lines = [orjson.dumps({"id": i, "features": {"x": 1.0}, "target": 1.0}) for i in idents]
    lines += [b'{"features":{"x":2.0}}', b'{"id":"esc\\u0041","features":{},"target":1.0}']
    want = [hashlib.blake2b(i.encode(), digest_size=16).digest() for i in idents] + [None, id_key("escA")]
    parser = BodyParser(config_from_dict(CONFIG))
    for body, n in ((b"\n".join(lines[:-1]) + b"\n", len(lines) - 1), (b"\n".join(lines) + b"\n", len(lines))):
        parsed = parser.parse(body)  # all lines of the first read by the compiled parse; one of the second by Arrow's
        assert parsed.ids == (idents + [None, "escA"])[:n] and parsed.keys == want[:n]
