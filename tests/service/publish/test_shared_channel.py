"""The one-box channel between real processes: a writer process publishes thousands of versions
while this process reads; every snapshot read is whole (its coefficients hash to the digest the
learner computed, by SHA-256 as ``LinearModel.digest`` defines it) and versions never go back."""

from __future__ import annotations

import multiprocessing as mp
import os

import pytest

from service.engine import Engine
from service.events import EventValidator
from service.publish import SnapshotPublisher, SnapshotReader, take_snapshot
from service.publish.shared import SharedPublisher, SharedReader, capacity_for
from tests.service.servicekit import demo_events, make_config

VERSIONS = 2000


def _writer(fd_holder: SharedPublisher, data_dir: str, done) -> None:
    cfg = make_config(data_dir)
    v = EventValidator(cfg)
    engine = Engine(cfg)
    events = [v.validate(e) for e in demo_events(VERSIONS, tag="w")]
    for k, e in enumerate(events):
        engine.apply_events([e])
        fd_holder.publish(take_snapshot(engine, seq=k + 1, version=fd_holder.next_version()))
    done.set()


def test_a_reader_never_sees_a_torn_version_while_a_process_publishes(tmp_path):
    cfg = make_config(tmp_path)
    pub = SharedPublisher(capacity_for(cfg))
    assert isinstance(pub, SnapshotPublisher)
    reader = SharedReader(pub.fd)
    assert isinstance(reader, SnapshotReader)
    assert reader.version() == 0 and reader.latest() is None
    ctx = mp.get_context("fork")  # the child inherits the shared file's descriptor and mapping
    done = ctx.Event()
    child = ctx.Process(target=_writer, args=(pub, str(tmp_path), done))
    child.start()
    seen, last = 0, 0
    while not done.is_set() or reader.version() != last:
        snap = reader.latest()
        if snap is None:
            continue
        assert snap.version >= last
        assert snap.model.digest == snap.digest  # recomputed from the decoded coefficients
        assert snap.seq == snap.version  # the writer's seq k + 1 went with version k + 1
        last = snap.version
        seen += 1
    child.join(60)
    assert child.exitcode == 0
    assert last == VERSIONS
    print(f"\n{seen} reads, {reader.torn} copies retried because the writer was in the slot")
    assert seen > 50
    reader.close()
    pub.close()


def test_a_snapshot_too_large_or_out_of_order_is_refused_and_the_last_stays(tmp_path):
    cfg = make_config(tmp_path)
    engine = Engine(cfg)
    pub = SharedPublisher(capacity=64 * 1024)
    dup = os.dup(pub.fd)
    reader = SharedReader(dup)
    pub.publish(take_snapshot(engine, seq=0, version=1))
    with pytest.raises(ValueError, match="expected 2"):
        pub.publish(take_snapshot(engine, seq=0, version=5))
    small = SharedPublisher(capacity=1024)
    with pytest.raises(ValueError, match="does not fit"):
        small.publish(take_snapshot(engine, seq=0, version=1))
    assert reader.latest().version == 1 and pub.next_version() == 2
    small.close()
    reader.close()
    os.close(dup)
    pub.close()
