"""Offline replay: determinism, one engine for every reader, bad lines, duplicates, the CLI.

The demo feed is the invented cold-chain fleet shipped in ``replay_data/`` (made by
``service.replay.scenario``). The references outside trimtab are Python's ``hashlib`` (BLAKE2b, RFC 7693,
Saarinen and Aumasson, 2015) for the compiled id hash, Arrow's own Parquet and CSV writers for the
columnar feeds, and orjson (through the validator) for the NDJSON path that the columnar path must
match bit for bit.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import random
import re
from pathlib import Path

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.cli import main
from service.config import load_config
from service.engine import Engine
from service.events import parse_ndjson
from service.idhash import IdSet, hash_strings
from service.feeds.ndjson_columns import ArrowNdjson, prepare_events
from service.replay.runner import run_replay
from service.replay.scenario import write_csv, write_ndjson

ROOT = Path(__file__).resolve().parents[3]
FEED = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"
UNGUARDED = ROOT / "replay_data" / "configs" / "unguarded.toml"


def _same_batch(a, b) -> None:
    x, y = a.batch, b.batch
    assert np.array_equal(x.rows.indptr, y.rows.indptr)
    assert np.array_equal(x.rows.indices, y.rows.indices)
    assert x.rows.values.tobytes() == y.rows.values.tobytes()
    assert x.y.tobytes() == y.y.tobytes() and x.ts.tobytes() == y.ts.tobytes()
    assert np.array_equal(x.mode, y.mode)
    ids = x.ids.to_pylist() if hasattr(x.ids, "to_pylist") else list(x.ids)
    assert ids == list(y.ids)
    assert np.array_equal(a.hashes, b.hashes) and np.array_equal(a.where, b.where)


def test_id_hash_is_blake2b_as_hashlib_computes_it():
    """The compiled BLAKE2b-64 equals hashlib's (RFC 7693) for empty, one-block and multi-block inputs."""
    rng = random.Random(5)
    texts = ["", "V07-0001842", "é" * 70, "a" * 119, "a" * 120, "a" * 121, "😀" * 40]
    texts += ["".join(chr(rng.randint(32, 0x10FFF)) for _ in range(rng.randint(0, 260))) for _ in range(300)]
    texts = [t.encode("utf-8", "surrogatepass").decode("utf-8", "surrogatepass") for t in texts]
    got = hash_strings(texts)
    ref = [int.from_bytes(hashlib.blake2b(b"holdout\x1f" + t.encode("utf-8", "surrogatepass"), digest_size=8).digest(),
                          "little") for t in texts]
    assert got.tolist() == ref


def test_id_set_keeps_first_occurrences():
    """Duplicates within one call and across calls are refused; the table grows past its first size."""
    ids = [f"id{k % 3000}" for k in range(10_000)]
    seen = IdSet(capacity=16)
    keep = np.concatenate([seen.add(hash_strings(ids[i:i + 700]), np.ones(len(ids[i:i + 700]), bool))
                           for i in range(0, len(ids), 700)])
    first = [ids.index(x) == k for k, x in enumerate(ids)]
    assert keep.tolist() == first and len(seen) == 3000


def _chunks(data: bytes, size: int = 1 << 18):
    pos, line = 0, 1
    while pos < len(data):
        cut = data.find(b"\n", min(pos + size, len(data)))
        cut = len(data) if cut < 0 else cut + 1
        yield data[pos:cut], line
        line += data[pos:cut].count(b"\n")
        pos = cut


def test_columnar_ndjson_matches_the_validator_on_the_demo_feed():
    """Arrow parsing + vectorized mapping give the batches and rejections of parse_ndjson + Engine.prepare."""
    cfg = load_config(GUARDED)
    fast, exact = ArrowNdjson(Engine(cfg)), Engine(cfg)
    data = gzip.open(FEED).read()[:6_000_000]
    rejected = 0
    for chunk, first in _chunks(data):
        got, rej = fast.chunk(chunk, first)
        events, ref_rej, lines = parse_ndjson(chunk, exact.validator, first_line=first)
        _same_batch(got, prepare_events(exact, events, lines))
        assert [r for _, r in rej] == ref_rej
        rejected += len(rej)
    assert rejected > 50  # the feed's malformed lines were met


_TRICKY = [
    b'{"id":"a1","ts":1.5,"features":{"ambient_c":-0,"van":"V01"},"target":2}',
    b'{"id":"a2","features":{"ambient_c":-0.0},"target":-0.0}',
    b'{"id":"a3","features":{"ambient_c":1e400},"target":1}',
    b'{"id":"a4","features":{"ambient_c":NaN},"target":1}',
    b'{"id":"a5","features":{"van":7,"route":true},"target":1}',
    b'{"id":"a6","features":{"van":7.0},"target":1}',
    b'{"id":"a7","features":{"van":7.5},"target":1}',
    b'{"id":"","features":{},"target":1}',
    b'{"features":{},"target":1}',
    b'{"id":"a8","features":{}}',
    b'{"id":"a9","features":{"probe":null},"target":1}',
    b'{"id":"a10","features":{"ambient_c":true},"target":1}',
    b'{"id":"a11","extra":null,"features":{},"target":1}',
    b'{"id":"a12","features":{"ambient_c":1},"target":1} {"id":"a13","features":{}}',
    b'{"id":"a14","features":{"\\u0061mbient_c":3},"target":1}',
    b'{"id":"a15","features":{"ambient_c":1,"ambient_c":2},"target":1}',
    b'\xef\xbb\xbf{"id":"a16","features":{},"target":1}',
    b'{"id":"a\xff","features":{},"target":1}',
    b'{"id":"a17","ts":"2026-03-02T08:15:00Z","features":{},"target":1}',
    b'{"id":"a18","ts":"2026-03-02T08:15:00","features":{},"target":1}',
    b'{"id":"' + b"x" * 201 + b'","features":{},"target":1}',
    b'{"id":"a19","features":{"load_kg":[1]},"target":"warm"}',
    b'[{"id":"a20","features":{}}]', b"null", b"  ", b"\x0b", b"\t\r", b'{"id":"a21"', b"{}",
    b'{"id":"a22","features":null,"target":1}', b'{"id":"a23","features":' + b"[" * 80 + b"]" * 80 + b"}",
    b'{"id":"a24","features":{"door_open_s":12345678901234567890123},"target":1}',
    b'{"id":"a25","features":{"route":"urban","van":"V03"},"target":0.1000000000000000055511151231257827}',
]


def test_columnar_ndjson_matches_the_validator_on_tricky_lines():
    """Every awkward case (signed zeros, NaN, BOM, duplicate keys, escapes, several objects on a
    line, invalid UTF-8, deep nesting, RFC 3339 times) is accepted or rejected exactly as orjson +
    the validator do, mixed among ordinary lines in seeded random orders."""
    cfg = load_config(GUARDED)
    base = [orjson.dumps({"id": f"ok{k}", "ts": 1772439300.0 + k, "target": 4.0 + k / 7,
                          "features": {"ambient_c": 20.5 + k % 5, "compressor_duty": 0.3, "door_open_s": k % 40,
                                       "load_kg": 400 + k, "van": f"V{k % 24 + 1:02d}", "route": "urban"}})
            for k in range(400)]
    rng = random.Random(11)
    for trial in range(40):
        lines = base[:] + rng.sample(_TRICKY, rng.randint(1, len(_TRICKY)))
        rng.shuffle(lines)
        data = b"\n".join(lines) + (b"\n" if trial % 2 else b"")
        fast, exact = ArrowNdjson(Engine(cfg)), Engine(cfg)
        got, rej = fast.chunk(data, 1)
        events, ref_rej, where = parse_ndjson(data, exact.validator)
        _same_batch(got, prepare_events(exact, events, where))
        assert [r for _, r in rej] == ref_rej


def test_replay_is_deterministic_and_parallel_runs_match_single_runs(tmp_path):
    """Must-show 1: two replays of the demo feed give the same digest per config, and two configs
    run in parallel processes give the digests of each config alone."""
    cfg = load_config(GUARDED)
    one = run_replay([FEED], cfg)["summary"]
    two = run_replay([FEED], cfg, workers=1)["summary"]
    exact = run_replay([FEED], cfg, columnar=False)["summary"]
    assert one["state_digest"] == two["state_digest"] == exact["state_digest"]
    assert one["events"] == 103_680 and one["rejected"] == 326
    code = main(["replay", str(FEED), "-c", str(GUARDED), "-c", str(UNGUARDED), "--out", str(tmp_path),
                 "--no-progress", "--jobs", "2"])
    assert code == 0
    runs = {r["name"]: r for r in json.loads((tmp_path / "summary.json").read_text())["runs"]}
    assert runs["guarded"]["state_digest"] == one["state_digest"]
    alone = run_replay([FEED], load_config(UNGUARDED))["summary"]
    assert runs["unguarded"]["state_digest"] == alone["state_digest"]
    print("digests", {k: v["state_digest"][:16] for k, v in runs.items()})


def test_summary_and_model_files_follow_the_contract(tmp_path):
    """The replay outputs (README "Replay outputs"): the RUN fields, and model.json with raw and averaged coefficients by name."""
    assert main(["replay", str(FEED), "-c", str(GUARDED), "--out", str(tmp_path), "--no-progress",
                 "--no-report"]) == 0
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["feed"] == str(FEED)
    run = summary["runs"][0]
    for key in ("name", "events", "learned", "held_out", "rejected", "progressive_loss", "holdout_loss", "serving",
                "rollbacks", "restarts", "certificate", "state_digest", "events_per_second",
                "rejected_by_reason", "bad_lines"):
        assert key in run, key
    assert set(run["holdout_loss"]) == {"raw", "averaged"}
    assert run["learned"] + run["held_out"] + run["scored_only"] == run["events"]
    assert sum(run["rejected_by_reason"].values()) == run["rejected"]
    assert all(set(r) == {"event", "reason", "step_scale"} for r in run["rollbacks"])
    assert all(set(r) == {"event", "reason"} for r in run["restarts"])
    assert run["diverged"] is None and run["binary_metrics"] is None and run["nonfinite_losses"] == 0
    assert (tmp_path / "guarded" / "state.bin").is_file() and (tmp_path / "guarded" / "state.json").is_file()
    model = json.loads((tmp_path / "guarded" / "model.json").read_text())
    for it in ("raw", "averaged"):
        assert set(model[it]["numeric"]) == {"ambient_c", "compressor_duty", "door_open_s", "load_kg"}
        assert set(model[it]["categorical"]["route"]) == {"urban", "regional", "linehaul"}
        assert len(model[it]["categorical"]["van"]) == 24
    assert model["state_digest"] == run["state_digest"]
    assert not (tmp_path / "report.html").exists()


def test_csv_and_parquet_feeds_give_the_ndjson_digest(tmp_path):
    """The same events as NDJSON, CSV (gzip) and Parquet (written by pyarrow) replay to one digest."""
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    n = 12_000
    nd, csv = tmp_path / "f.ndjson", tmp_path / "f.csv.gz"
    write_ndjson(nd, n, seed=3, malformed_share=0.0)
    write_csv(csv, n, seed=3)
    rows = [orjson.loads(line) for line in nd.read_bytes().splitlines()]
    cols = {"id": [r["id"] for r in rows], "ts": [r["ts"] for r in rows], "target": [r["target"] for r in rows]}
    for name in rows[0]["features"]:
        cols[name] = [r["features"][name] for r in rows]
    pq.write_table(pa.table(cols), tmp_path / "f.parquet", row_group_size=5000)
    cfg = load_config(GUARDED)
    digests = {p.name: run_replay([p], cfg)["summary"]["state_digest"] for p in (nd, csv, tmp_path / "f.parquet")}
    assert len(set(digests.values())) == 1, digests


def test_every_kind_of_bad_line_is_counted_and_the_run_completes(tmp_path):
    """Must-show 4: truncated JSON, NaN, wrong types, missing target, unknown feature, huge lines
    (one just over the limit, one held only as a count), invalid UTF-8 and more, each counted by
    reason with its line number; a line without a target is scored, not learned."""
    good = [orjson.dumps({"id": f"g{k}", "ts": 1772439300.0 + 60 * k, "target": 4.0 + (k % 9) / 10,
                          "features": {"ambient_c": 15.0 + k % 7, "compressor_duty": 0.4, "door_open_s": k % 30,
                                       "load_kg": 500, "van": "V02", "route": "regional"}}) for k in range(3000)]
    bad = {
        "truncated": good[0][:40],
        "nan": re.sub(rb'"ambient_c":[^,]+', b'"ambient_c":NaN', good[1]),
        "wrong_type": good[2].replace(b'"load_kg":500', b'"load_kg":"heavy"'),
        "unknown": good[3].replace(b'"route"', b'"probe_volts":3.3,"route"'),
        "over_limit": b'{"id":"big1","features":{},"target":1,"pad":"' + b"x" * 70_000 + b'"}',
        "huge": b'{"id":"big2","features":{},"target":1,"pad":"' + b"y" * 3_000_000 + b'"}',
        "utf8": good[4].replace(b'"id":"g4"', b'"id":"g\xff4"'),
        "not_object": b"[" + good[5] + b"]",
        "no_id": good[6].replace(b'"id":"g6",', b""),
    }
    unlabelled = good[7].replace(b',"target":4.7', b"")
    lines = good[:100] + list(bad.values()) + [unlabelled] + good[100:]
    lines = [ln.replace(b'"id":"g', b'"id":"h') if k > 100 else ln for k, ln in enumerate(lines)]
    feed = tmp_path / "bad.ndjson.gz"
    with gzip.open(feed, "wb") as f:
        f.write(b"\n".join(lines) + b"\n")
    run = run_replay([feed], load_config(GUARDED))["summary"]
    print(json.dumps(run["rejected_by_reason"], indent=1))
    assert run["rejected"] == len(bad)
    assert run["events"] == len(lines) - len(bad)
    assert run["scored_only"] == 1
    reasons = " | ".join(run["rejected_by_reason"])
    for text in ("not valid JSON: unexpected end of data", "unexpected character",
                 "features.load_kg: expected a number",
                 "features.probe_volts: unknown feature", "over the N-byte limit", "invalid UTF-8",
                 "an event must be a JSON object", "id: required"):
        assert text in reasons, text
    assert run["rejected_by_reason"]["line is N bytes, over the N-byte limit"] == 2
    assert [b["line"] for b in run["bad_lines"]] == list(range(101, 101 + len(bad)))


def test_duplicate_ids_are_applied_once(tmp_path):
    """A feed with repeated ids (a producer's retries) ends at the digest of the feed without them."""
    nd = tmp_path / "f.ndjson"
    write_ndjson(nd, 8000, seed=4, malformed_share=0.0)
    lines = nd.read_bytes().splitlines()
    noisy = lines[:3000] + lines[2000:2500] + lines[3000:] + lines[:10]
    dup = tmp_path / "dup.ndjson"
    dup.write_bytes(b"\n".join(noisy) + b"\n")
    cfg = load_config(GUARDED)
    clean, repeated = run_replay([nd], cfg)["summary"], run_replay([dup], cfg)["summary"]
    assert repeated["state_digest"] == clean["state_digest"]
    assert repeated["duplicates"] == 510 and repeated["events"] == 8000
    assert repeated["duplicate_lines"][0]["line"] == 3001


def test_cli_errors_name_the_argument(tmp_path, capsys):
    """Exit status 2 with the key named: no config, a missing feed, two configs with one name."""
    assert main(["replay", str(FEED), "--out", str(tmp_path)]) == 2
    assert main(["replay", str(tmp_path / "nope.ndjson"), "-c", str(GUARDED), "--out", str(tmp_path)]) == 2
    assert main(["replay", str(FEED), "-c", str(GUARDED), "-c", str(GUARDED), "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "-c" in err and "nope.ndjson" in err and "share the name 'guarded'" in err


_VALUES = [b"1", b"-0", b"0.5", b"-0.0", b"1e400", b"1e-400", b"NaN", b"true", b"false", b"null", b'"x"', b'""',
           b'"V01"', b"[]", b"{}", b"[1]", b'"\\u00e9"', b'"a\\nb"', b"12345678901234567890", b"7.0", b"2"]
_KEYS = [b'"ambient_c"', b'"compressor_duty"', b'"van"', b'"route"', b'"probe"', b'"door_open_s"']


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.lists(st.tuples(st.sampled_from(_KEYS), st.sampled_from(_VALUES)), max_size=4),
                          st.sampled_from([b'"id":"k%d",', b"", b'"id":5,', b'"id":"",']),
                          st.sampled_from([b',"target":1.5', b"", b',"target":"w"', b',"target":-0',
                                           b',"target":null', b',"target":true']),
                          st.sampled_from([b"", b',"ts":1.5', b',"ts":"2026-03-02T08:15:00Z"', b',"x":1']),
                          st.integers(0, 9)), min_size=1, max_size=12))
def test_columnar_ndjson_matches_the_validator_on_generated_lines(spec):
    """Property (hypothesis): for generated lines mixing valid and invalid ids, targets, timestamps,
    feature values and keys, the columnar path gives exactly the validator's events and rejections."""
    cfg = load_config(GUARDED)
    lines = []
    for k, (feats, ident, target, extra, cut) in enumerate(spec):
        body = b",".join(key + b":" + value for key, value in feats)
        line = b"{" + (ident % k if b"%d" in ident else ident) + b'"features":{' + body + b"}" + target + extra + b"}"
        lines.append(line[: len(line) - cut] if cut > 7 else line)
    data = b"\n".join(lines) + b"\n"
    fast, exact = ArrowNdjson(Engine(cfg)), Engine(cfg)
    got, rej = fast.chunk(data, 1)
    events, ref_rej, where = parse_ndjson(data, exact.validator)
    if events:
        _same_batch(got, prepare_events(exact, events, where))
    else:
        assert got is None
    assert [r for _, r in rej] == ref_rej


def test_progress_draws_a_bar_on_a_terminal_and_lines_elsewhere():
    """Nothing within the first second (here ``delay``); then a redrawn bar with events/s and ETA on
    a terminal, periodic plain lines otherwise; ``--no-progress`` shows nothing."""
    import io
    import time

    from service.replay.progress import Progress, progress_mode

    class Tty(io.StringIO):
        def isatty(self):
            return True

    assert progress_mode(False, Tty()) == "bar" and progress_mode(False, io.StringIO()) == "lines"
    assert progress_mode(True, Tty()) == "off"
    for mode, stream in (("bar", Tty()), ("lines", io.StringIO())):
        with Progress(["guarded"], lambda: [(5000, 0.5)], mode, stream=stream, interval=0.01, every=0.02, delay=0.05):
            time.sleep(0.3)
        text = stream.getvalue()
        assert "guarded" in text and "5,000" in text and "50%" in text and "ETA 0:00:0" in text, text
        assert ("\r" in text) == (mode == "bar")
    quiet = io.StringIO()
    with Progress(["guarded"], lambda: [(5000, 0.5)], "lines", stream=quiet, interval=0.01, every=0.02, delay=5):
        time.sleep(0.1)
    assert quiet.getvalue() == ""


@pytest.mark.parametrize("value", [b"12345678901234567890", b"9007199254740993", b"-12345678901234567890",
                                   b"1.2345678901234567890123"])
def test_long_numbers_take_the_validators_reading(value):
    """An integer past 2**53 is exact for orjson (and so for the validator) but a double for Arrow's
    reader: found by the property test above. Such lines must give the validator's batch."""
    cfg = load_config(GUARDED)
    data = (b'{"id":"k1","features":{"van":' + value + b',"ambient_c":' + value + b'},"target":1.5}\n'
            b'{"id":"k2","features":{"van":"V01","ambient_c":3.5},"target":2.5}\n')
    fast, exact = ArrowNdjson(Engine(cfg)), Engine(cfg)
    got, rej = fast.chunk(data, 1)
    events, ref_rej, where = parse_ndjson(data, exact.validator)
    assert [r for _, r in rej] == ref_rej
    _same_batch(got, prepare_events(exact, events, where))


def test_model_file_version_is_the_installed_distribution():
    """The version ``model.json`` carries is what the standard library's ``importlib.metadata``
    reads for the installed distribution (found without importing it)."""
    from importlib.metadata import PackageNotFoundError, version

    from service.version import trimtab_version

    try:
        expected = version("trimtab")
    except PackageNotFoundError:
        expected = "unknown (not installed as a package)"
    assert trimtab_version() == expected


def test_ndjson_blocks_grow_from_a_small_first_one_and_keep_every_line(tmp_path, monkeypatch):
    """Blocks start small (the first events are learned early), double up to the block size, end on
    whole lines, and together are the file with the right first line numbers."""
    from service.feeds import files

    monkeypatch.setattr(files, "_FIRST_BLOCK", 100)
    monkeypatch.setattr(files, "_RAMP_BLOCK", 400)
    rng = random.Random(5)
    lines = [b'{"id": "x%d", "pad": "%s"}' % (i, b"p" * rng.randrange(0, 60)) for i in range(400)]
    path = tmp_path / "f.ndjson"
    path.write_bytes(b"\n".join(lines) + b"\n")
    with files._open(path) as src:
        blocks = list(files._ndjson_blocks(src, max_line=1000, block=3000))
    assert b"".join(b for b, _, _ in blocks) == path.read_bytes()
    assert all(b.endswith(b"\n") and not skipped for b, _, skipped in blocks)
    assert [first for _, first, _ in blocks] == list(np.cumsum([1] + [b.count(b"\n") for b, _, _ in blocks[:-1]]))
    sizes = [len(b) for b, _, _ in blocks]
    # whole lines cut each read short by less than a line: 100, then 400, 800, 1600, then 3000 each
    assert sizes[0] <= 100 and 400 - 100 < sizes[1] <= 400 + 100 and sizes[2] > 600 and sizes[3] > 1400
    assert max(sizes) <= 3000 + 100 and sizes[4] > 2800
