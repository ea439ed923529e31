"""Storage faults against a real ``trimtab serve`` and real SQLite files: a second process on the
same data dir, corrupted checkpoints, a truncated journal file, a damaged write-ahead log.

The references outside the service: the process table (the PID the refusal names), the SQLite
files read and damaged with ``sqlite3`` and plain file writes, SQLite's documented WAL format
(sqlite.org, "Write-Ahead Logging", file format: a 32-byte header, then frames of a 24-byte header
and one page), ``pickle`` from the standard library for a checkpoint that must never be read, and an
offline :class:`Engine` replay of the journal for the state a rebuild must reach.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import sqlite3
import struct
import subprocess
import sys

from service.storage import seen
from tests.service.faults.faultkit import ENV, Client, journal_replay, start, write_config
from tests.service.servicekit import ROOT, demo_events


def _fill(client: Client, n: int, tag: str) -> set[str]:
    events = demo_events(n, tag=tag)
    for i in range(0, n, 250):
        got = client.events(events[i:i + 250])
        assert got["accepted"] == len(events[i:i + 250])
    return {e["id"] for e in events}


def _not_ready(client: Client, *words: str) -> dict:
    status, body = client.call("GET", "/readyz")
    assert status == 503, body
    assert all(w in body["error"]["message"] for w in words), body
    status, refused = client.call("POST", "/v1/events", demo_events(1, tag="refused-"))
    assert status == 503, refused
    return body


def test_a_second_process_on_the_same_data_dir_exits_2_naming_the_holder(tmp_path):
    data = tmp_path / "data"
    cfg, conf = write_config(tmp_path, data, prune_journal=False)
    server = start(conf)
    try:
        client = Client(server.url)
        acked = _fill(client, 500, "lock-")
        second = subprocess.run([sys.executable, "-m", "service.cli", "serve", "-c", str(conf), "--port", "0"],
                                cwd=ROOT, env={**os.environ, **ENV}, capture_output=True, timeout=120)
        assert second.returncode == 2, second.stderr
        message = second.stderr.decode()
        assert f"PID {server.proc.pid}" in message and str(data) in message, message
        # the first process is untouched and keeps acknowledging
        acked |= _fill(client, 250, "after-lock-")
        final = client.card()
        assert final["counters"]["events"] == len(acked) == 750
    finally:
        assert server.stop() == 0
    digest, _, ids, _ = journal_replay(cfg, data / "trimtab.sqlite")
    assert sorted(ids) == sorted(acked) and digest == final["state_digest"]


def _corrupt_checkpoints(db_path, which: str) -> list[int]:
    """Damage checkpoints in place: ``"all"`` flips a bit in each; ``"pickle"`` replaces the newest with
    a pickle whose SHA-256 column is right, so only the format check can refuse it."""
    db = sqlite3.connect(db_path)
    rows = db.execute("SELECT id, seq, blob FROM checkpoints ORDER BY id DESC").fetchall()
    if which == "pickle":
        blob = pickle.dumps({"model": b"", "counters": {}}, protocol=5)
        db.execute("UPDATE checkpoints SET blob = ?, digest = ? WHERE id = ?",
                   (blob, hashlib.sha256(blob).hexdigest(), rows[0][0]))
    else:
        for ck_id, _seq, blob in rows:
            bad = bytearray(blob)
            bad[len(bad) // 2] ^= 0x10
            db.execute("UPDATE checkpoints SET blob = ? WHERE id = ?", (bytes(bad), ck_id))
    db.commit()
    db.close()
    return [r[1] for r in rows]


def test_corrupt_checkpoints_rebuild_from_a_whole_journal_or_refuse_to_serve(tmp_path):
    # whole history kept: every checkpoint corrupt -> the model is rebuilt from the journal, exactly
    data = tmp_path / "whole"
    cfg, conf = write_config(tmp_path, data, checkpoint_every=400, checkpoint_min_interval_s=0.0, prune_journal=False)
    server = start(conf)
    _fill(Client(server.url), 1500, "w-")
    assert server.stop() == 0
    seqs = _corrupt_checkpoints(data / "trimtab.sqlite", "all")
    server = start(conf)
    client = Client(server.url)
    digest, updates, ids, last = journal_replay(cfg, data / "trimtab.sqlite")
    card = client.card()
    assert (card["state_digest"], card["updates"], card["journal"]["applied_seq"]) == (digest, updates, last)
    kinds = [i["kind"] for i in client.incidents()]
    assert kinds.count("corrupt_checkpoint") == len(seqs) and "rebuilt_from_journal" in kinds
    assert server.stop() == 0

    # a pickle where the newest checkpoint was (its digest column right): refused by the format reader
    _corrupt_checkpoints(data / "trimtab.sqlite", "pickle")
    server = start(conf)
    client = Client(server.url)
    assert client.card()["state_digest"] == digest
    reasons = [i["reason"] for i in client.incidents() if i["kind"] == "corrupt_checkpoint"]
    assert any("not a trimtab checkpoint" in r and "pickle" in r for r in reasons[len(seqs):]), reasons
    assert server.stop() == 0

    # a pruned journal: no checkpoint to start from and no whole history -> not ready, with the reason
    data = tmp_path / "pruned"
    cfg, conf = write_config(tmp_path, data, checkpoint_every=400, checkpoint_min_interval_s=0.0, checkpoints_kept=2)
    server = start(conf)
    acked = _fill(Client(server.url), 1500, "p-")
    assert server.stop() == 0
    _corrupt_checkpoints(data / "trimtab.sqlite", "all")
    server = start(conf, ready=False)
    client = Client(server.url)
    client.wait(lambda: client.call("GET", "/readyz")[1]["error"]["message"].startswith("not ready: recovery"))
    _not_ready(client, "pruned", "acknowledged")
    assert "history_incomplete" in [i["kind"] for i in client.incidents()]
    server.kill()
    db = sqlite3.connect(data / "trimtab.sqlite")  # nothing was deleted: the rows and index are as acknowledged
    assert len(seen.index_pairs(db)) == len(acked)
    db.close()


def test_a_truncated_journal_file_is_found_at_start(tmp_path):
    data = tmp_path / "data"
    _, conf = write_config(tmp_path, data, checkpoint_every=10**6)
    server = start(conf)
    _fill(Client(server.url), 3000, "t-")
    assert server.stop() == 0
    path = data / "trimtab.sqlite"
    assert not path.with_name(path.name + "-wal").exists()  # a clean stop folded the WAL in
    with open(path, "r+b") as f:
        f.truncate(os.path.getsize(path) * 2 // 3)
    server = start(conf, ready=False)
    client = Client(server.url)
    client.wait(lambda: client.call("GET", "/readyz")[1]["error"]["message"].startswith("not ready: recovery"))
    _not_ready(client, "damaged")
    assert "journal_damaged" in [i["kind"] for i in client.incidents()]
    server.kill()


def _wal_frames(path) -> tuple[int, list[tuple[int, int]]]:
    """Page size and ``(offset, commit_size)`` of each frame, from the WAL format's own headers."""
    raw = path.read_bytes()
    page = struct.unpack(">I", raw[8:12])[0]
    frames = []
    for off in range(32, len(raw) - 24 - page + 1, 24 + page):
        frames.append((off, struct.unpack(">I", raw[off + 4:off + 8])[0]))
    return page, frames


def test_a_damaged_wal_is_kept_reported_and_never_silently_dropped(tmp_path):
    data = tmp_path / "data"
    _, conf = write_config(tmp_path, data, checkpoint_every=10**6)
    server = start(conf)
    _fill(Client(server.url), 750, "d-")  # three commits, all still in the WAL
    server.kill()
    wal = data / "trimtab.sqlite-wal"
    page, frames = _wal_frames(wal)
    commits = [k for k, (_, size) in enumerate(frames) if size]
    assert len(commits) >= 3
    raw = bytearray(wal.read_bytes())
    raw[frames[0][0] + 24 + page // 2] ^= 0x01  # one bit of the first frame's page: SQLite drops the rest
    wal.write_bytes(bytes(raw))
    server = start(conf, ready=False)
    client = Client(server.url)
    client.wait(lambda: client.call("GET", "/readyz")[1]["error"]["message"].startswith("not ready: recovery"))
    _not_ready(client, "write-ahead log", "STORAGE-DAMAGED")
    reasons = [i["reason"] for i in client.incidents() if i["kind"] == "journal_damaged"]
    assert reasons and "acknowledged events may be missing" in reasons[0]
    copies = list(data.glob("trimtab.sqlite-wal.damaged-*"))
    assert len(copies) == 1 and copies[0].read_bytes() == bytes(raw)
    assert server.stop() == 0
    server = start(conf, ready=False)  # the mark keeps it refusing until an operator removes it
    client = Client(server.url)
    client.wait(lambda: client.call("GET", "/readyz")[1]["error"]["message"].startswith("not ready: recovery"))
    _not_ready(client, "STORAGE-DAMAGED")
    assert server.stop() == 0
