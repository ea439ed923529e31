"""NDJSON whose categorical values mix JSON types stay on the columnar path, with the same result.

The reference is orjson through the validator (``service.events.parse_ndjson``), the line-by-line
path that the columnar one must match bit for bit. Arrow's JSON reader refuses a column that
changes type ("changed from string to number"); the columnar path splits such a chunk by the type
of the value in each line and parses each part on its own. The test checks that the lines it
sends to the validator are only those the validator rejects (the fast path was taken, whatever
the speed), and that the prepared batch, the rejections and the replay digest equal the
line-by-line ones.
"""

from __future__ import annotations

import random

import numpy as np
import orjson

from service.config import config_from_dict
from service.engine import Engine
from service.events import parse_ndjson
from service.feeds.ndjson_columns import ArrowNdjson, prepare_events
from service.replay.runner import run_replay

CONFIG = {"name": "mixed", "features": {"numeric": ["x"], "categorical": ["site", "kind"], "hash_bits": 8,
                                        "scaling": "none"}}
#: the values a categorical may take, each with whether the validator accepts it
VALUES = [("site-07", True), (7, True), (7.0, True), (True, True), (False, True), (None, True), (-3, True),
          ("7", True), (2.5, False), (2**63, False), ("", True)]


def _feed(n: int, seed: int) -> tuple[bytes, int]:
    """``n`` lines and how many the validator rejects; numbers have at most 15 digits (longer runs go
    to the validator on purpose, see ``service.feeds.ndjson_columns``)."""
    rng = random.Random(seed)
    lines, bad = [], 0
    for i in range(n):
        feats = {"x": round(rng.uniform(-1.0, 1.0), 6), "kind": rng.choice(["a", "b", 3])}
        value, ok = rng.choice(VALUES) if rng.random() < 0.5 else (f"site-{rng.randrange(20)}", True)
        if value is not None or rng.random() < 0.5:
            feats["site"] = value
        bad += not ok
        lines.append(orjson.dumps({"id": f"m{i}", "features": feats, "target": round(rng.uniform(0.0, 5.0), 3)}))
    return b"\n".join(lines) + b"\n", bad


def test_mixed_type_categoricals_take_the_columnar_path_and_match_the_validator(tmp_path):
    config = config_from_dict(CONFIG)
    buf, bad = _feed(5000, seed=7)
    fast = ArrowNdjson(Engine(config, trace_limit=1))
    got, rejected = fast.chunk(buf, 1)
    assert fast.fallback_lines == bad == len(rejected) > 0

    engine = Engine(config, trace_limit=1)
    events, want_rej, lines = parse_ndjson(buf, engine.validator)
    want = prepare_events(engine, events, lines)
    assert [(r.where, r.reason) for _, r in rejected] == [(r.where, r.reason) for r in want_rej]
    assert np.array_equal(got.where, want.where) and np.array_equal(got.hashes, want.hashes)
    assert np.array_equal(got.batch.rows.indices, want.batch.rows.indices)
    assert got.batch.rows.values.tobytes() == want.batch.rows.values.tobytes()
    assert got.batch.y.tobytes() == want.batch.y.tobytes()

    feed = tmp_path / "mixed.ndjson"
    feed.write_bytes(buf)
    columnar = run_replay([feed], config)["summary"]
    exact = run_replay([feed], config, columnar=False)["summary"]
    assert columnar["state_digest"] == exact["state_digest"] and columnar["rejected"] == exact["rejected"] == bad
