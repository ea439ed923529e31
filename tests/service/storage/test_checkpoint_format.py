"""The checkpoint format (``docs/checkpoint-format.md``): round trip, refusals, and no pickle anywhere.

References outside the code under test: an uninterrupted :class:`Engine` run (a restored engine must
continue bit-identically), ``pickle`` and ``hashlib`` from the standard library (a pickle must be
refused, a re-checksummed blob of another version too), and the module sources parsed with ``ast``.
"""

from __future__ import annotations

import ast
import hashlib
import pickle
import struct
from pathlib import Path

import pytest

from service.engine import STATE_COUNTERS, Engine
from service.events import EventValidator
from service.storage.checkpoint import FORMAT_VERSION, MAGIC, CheckpointFormatError, read_sections
from tests.service.servicekit import ROOT, demo_events, make_config


@pytest.fixture(scope="module")
def trained():
    cfg = make_config("unused")
    v = EventValidator(cfg)
    events = [v.validate(e) for e in demo_events(3000)]
    engine = Engine(cfg, trace_limit=None)
    engine.apply_events(events[:2000])
    return cfg, engine, events


def test_a_restored_engine_continues_bit_identically(trained):
    cfg, engine, events = trained
    blob = engine.to_bytes(position=2000)
    restored = Engine.from_bytes(cfg, blob, trace_limit=None)
    assert restored.state_digest == engine.state_digest and restored.to_bytes(position=2000) == blob
    assert Engine.checkpoint_position(blob) == 2000 and restored.counters() == engine.counters()
    assert list(restored.trace) == [dict(r) for r in engine.trace]
    uninterrupted = Engine(cfg, trace_limit=None)
    uninterrupted.apply_events(events)
    restored.apply_events(events[2000:])
    assert restored.state_digest == uninterrupted.state_digest != engine.state_digest
    assert restored.counters() == uninterrupted.counters()


def _rechecksummed(blob: bytes, at: int, value: bytes) -> bytes:
    body = bytearray(blob[:-32])
    body[at:at + len(value)] = value
    return bytes(body) + hashlib.sha256(bytes(body)).digest()


def test_the_reader_refuses_anything_else_with_the_reason(trained):
    cfg, engine, _ = trained
    blob = engine.to_bytes()
    cases = {
        "pickle": (pickle.dumps({"model": b"", "counters": {}}, protocol=5), "pickle"),
        "other version": (_rechecksummed(blob, len(MAGIC), struct.pack("<I", FORMAT_VERSION + 1)), "version"),
        "flipped bit": (blob[:100] + bytes([blob[100] ^ 1]) + blob[101:], "checksum"),
        "truncated": (blob[: len(blob) // 2], "checksum"),
        "too short": (MAGIC + b"\0\0", "truncated"),
    }
    for name, (bad, word) in cases.items():
        with pytest.raises(CheckpointFormatError) as err:
            Engine.from_bytes(cfg, bad)
        assert word in str(err.value), (name, str(err.value))
    with pytest.raises(CheckpointFormatError, match="missing"):
        read_sections(blob, {"meta", "model", "counters", "trace", "monitor", "extra"})


def test_every_counter_of_the_engine_is_in_the_checkpoint(trained):
    """A new engine counter outside ``STATE_COUNTERS`` would be lost at restart without a version bump."""
    _, engine, _ = trained
    from_config = {"_share", "_check_every"}
    numbers = {k for k, v in vars(engine).items()
               if isinstance(v, (int, float)) and not isinstance(v, bool) and k not in from_config}
    assert numbers == set(STATE_COUNTERS)


def test_no_state_code_imports_pickle():
    for rel in ("service/engine.py", *(str(p.relative_to(ROOT)) for p in (ROOT / "service/storage").glob("*.py"))):
        tree = ast.parse(Path(ROOT, rel).read_text())
        names = {a.name for n in ast.walk(tree) if isinstance(n, (ast.Import, ast.ImportFrom)) for a in n.names}
        mods = {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
        assert "pickle" not in names | mods, rel


def test_the_trace_section_is_the_plain_serialization_of_the_records_across_checkpoints():
    """Trace records are serialized once and their JSON reused by later checkpoints; the section
    must stay byte for byte what orjson gives for the whole list (the reference), including when
    records leave a bounded trace and when a record holds a non-finite float."""
    import orjson

    from service.engine import _SECTIONS
    from service.state_json import tagged as _tagged

    cfg = make_config("unused")
    v = EventValidator(cfg)
    events = [v.validate(e) for e in demo_events(3000)]
    engine = Engine(cfg, trace_limit=5)  # records fall out of the trace as checks come
    for lo in range(0, 3000, 400):
        engine.apply_events(events[lo:lo + 400])
        if lo == 1200:
            engine.trace[-1]["step"] = float("nan")  # a fresh record changed before its first checkpoint
        want = orjson.dumps([_tagged(r) for r in engine.trace], option=orjson.OPT_SERIALIZE_NUMPY)
        for _ in range(2):  # a first and a cached serialization
            assert read_sections(engine.to_bytes(position=lo), _SECTIONS, frozenset({"monitor"}))["trace"] == want
    assert len(engine.trace) == 5 and len(engine._trace_json) == 5


def test_check_records_keep_the_newest_and_replace_their_twins():
    """``store_checks`` keeps the newest ``kept`` records; a record made again (the journal re-applied
    after a crash) replaces its twin; ``load_checks`` reads those up to an event, oldest first."""
    import sqlite3

    from service.storage.checkpoint import CHECKS_SCHEMA, load_checks, store_checks

    db = sqlite3.connect(":memory:")
    db.executescript(CHECKS_SCHEMA)
    store_checks(db, [(e, b"a%d" % e) for e in range(0, 500, 100)], kept=3)
    assert load_checks(db, 10**9, None) == [b"a200", b"a300", b"a400"]
    store_checks(db, [(400, b"b400"), (500, b"b500")], kept=3)
    assert load_checks(db, 10**9, None) == [b"a300", b"b400", b"b500"]
    assert load_checks(db, 450, None) == [b"a300", b"b400"]
    assert load_checks(db, 10**9, 1) == [b"b500"]
    store_checks(db, [(600, b"c")], kept=None)
    assert len(load_checks(db, 10**9, None)) == 4
