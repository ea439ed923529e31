"""The published model: bytes and back, scores bit for bit the learner's own, damage refused.

The reference is the learner's engine itself (its model scoring the same features through
``predict_rows``), and for the digest the model card's definition (``LinearModel.digest``)."""

from __future__ import annotations

import numpy as np
import pytest

from service.engine import Engine
from service.events import EventValidator
from service.publish import ServingSnapshot, SnapshotDecodeFailed, take_snapshot
from tests.service.servicekit import demo_events, make_config


def _engine(tmp_path, n: int, **monitor):
    cfg = make_config(tmp_path, monitor=monitor or None)
    v = EventValidator(cfg)
    engine = Engine(cfg)
    events = [v.validate(e) for e in demo_events(n)]
    engine.apply_events(events)
    return engine, [e.features for e in events]


@pytest.mark.parametrize("n", [50, 3000])  # in warm-up (scaling not frozen yet) and after it
def test_decoded_snapshot_scores_bit_for_bit_as_the_learner(tmp_path, n):
    engine, feats = _engine(tmp_path, n)
    snap = ServingSnapshot.from_bytes(take_snapshot(engine, seq=n, version=7).to_bytes())
    assert (snap.version, snap.seq, snap.updates) == (7, n, engine.model.n_updates)
    assert snap.digest == engine.state_digest
    m = engine.model
    for iterate in ("raw", "averaged"):
        want = m.predict_rows(m.rows(feats, remember=False), iterate)
        got, used = snap.score(feats, iterate)
        assert used == iterate
        assert np.array_equal(got.view(np.uint64), want.view(np.uint64))
    got, used = snap.score(feats)
    assert used == engine.serving


def test_snapshot_describes_layout_scaling_and_certificate(tmp_path):
    engine, _ = _engine(tmp_path, 1000)
    snap = ServingSnapshot.from_bytes(take_snapshot(engine, seq=1000, version=1).to_bytes())
    card = snap.describe(now=snap.published_at + 2.0)
    assert card["age_s"] == 2.0
    assert card["layout"] == {"numeric": ["ambient_c", "compressor_duty", "door_open_s", "load_kg"],
                              "categorical": ["van", "route"], "hash_bits": 10, "dimension": engine.model.dim}
    mean, std = engine.model.scaling
    assert card["scaling"]["mean"] == mean.tolist() and card["scaling"]["std"] == std.tolist()
    cert = engine.certificate()
    assert card["certificate"]["T"] == cert["T"] and card["certificate"]["bound"] == cert["bound"]


def test_damaged_or_truncated_bytes_are_refused(tmp_path):
    engine, _ = _engine(tmp_path, 500)
    blob = take_snapshot(engine, seq=500, version=3).to_bytes()
    with pytest.raises(SnapshotDecodeFailed, match="magic"):
        ServingSnapshot.from_bytes(b"x" + blob[1:])
    with pytest.raises(SnapshotDecodeFailed, match="truncated|damaged"):
        ServingSnapshot.from_bytes(blob[:-100])
    flipped = bytearray(blob)
    flipped[len(blob) // 2] ^= 0x01  # one bit of one coefficient
    with pytest.raises(SnapshotDecodeFailed, match="damaged"):
        ServingSnapshot.from_bytes(bytes(flipped))
