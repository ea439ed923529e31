"""The SQLite journal and checkpoints, on a real file, read back with the standard ``sqlite3`` module.

Durability rests on SQLite's documented WAL semantics (sqlite.org, "Write-Ahead Logging" and
"PRAGMA synchronous"): a committed transaction is in the WAL file before COMMIT returns, so it
survives the death of the process; with synchronous=FULL the WAL is also fsynced at each commit.
The kill test checks the first half on this machine; power loss cannot be tested here.
"""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap

import orjson
import pytest

from service.config import ConfigError
from service.storage.journal import EVENT, NOTE, Journal
from service.storage import seen
from service.storage.seen import id_key
from tests.service.servicekit import ROOT


def payload(ident: str, x: float) -> bytes:
    return orjson.dumps((ident, None, {"ambient_c": x}, 2.0 * x))


def test_rows_and_runs_commit_in_order_with_exact_payloads(tmp_path):
    j = Journal(tmp_path)
    run = [payload(f"a{k}", k / 7) for k in range(50)]
    keys = [(id_key(f"a{k}"), k + 1) for k in range(50)] + [(id_key("b"), 52)]
    j.append([(1, [f"a{k}" for k in range(50)], run), (51, None, NOTE, orjson.dumps([3, 53, None])),
              (52, ["b"], [payload("b", 0.1)])], keys)
    assert j.known([k for k, _ in keys] + [id_key("c")]) == {k for k, _ in keys}
    assert [r[0] for r in j.rows_after(49, limit=2)] == [50, 51]
    assert j.last_seq() == 52
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    rows = db.execute("SELECT seq, id, kind, typeof(payload), payload FROM journal ORDER BY seq").fetchall()
    assert [r[0] for r in rows] == list(range(1, 53))
    assert [r[1] for r in rows[:50]] == [f"a{k}" for k in range(50)] and rows[50][1] is None and rows[51][1] == "b"
    assert [r[2] for r in rows] == [EVENT] * 50 + [NOTE, EVENT]
    assert {r[3] for r in rows} == {"blob"}
    assert [r[4] for r in rows[:50]] == run  # byte for byte, floats included
    # the index holds the BLAKE2b-128 digest of each id (hashlib as the outside reference)
    got = {s: h for h, s in seen.index_pairs(db)}
    assert got[52] == hashlib.blake2b(b"b", digest_size=16).digest() and len(got) == 51
    # the buffer holds one run per stretch of consecutive positions: 1-50, then 52
    assert db.execute("SELECT seq, length(keys) FROM seen_runs ORDER BY rowid").fetchall() == [(1, 800), (52, 16)]


def test_the_index_buffer_becomes_sorted_runs_and_both_answer(tmp_path, monkeypatch):
    """Keys go to ``seen_runs`` first and become a sorted run of ``seen_sorted`` (primary key
    ``(run, h)``) once the buffer is full; a lookup sees both, before and after a reopen; a failed
    transaction changes neither."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 10)
    j = Journal(tmp_path)
    keys = [id_key(f"k{n}") for n in range(25)]
    for n in range(0, 25, 4):  # commits of 4: the buffer fills at 12 and at 24
        part = list(range(n, min(25, n + 4)))
        j.append([(n + 1, [f"k{m}" for m in part], [payload(f"k{m}", m) for m in part])],
                 [(keys[m], m + 1) for m in part])
    with pytest.raises(sqlite3.IntegrityError):  # a row at a taken position: all or nothing
        j.append([(26, ["late"], [payload("late", 0.0)]), (25, None, NOTE, b"[]")], [(id_key("late"), 26)])
    assert j.known(keys + [id_key("late")]) == set(keys)
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT count(*) FROM seen").fetchone()[0] == 0  # the legacy table is not written
    assert db.execute("SELECT run, count(*) FROM seen_sorted GROUP BY run").fetchall() == [(1, 12), (2, 12)]
    assert seen.run_levels(db) == [(1, 0, 12), (2, 0, 12)]
    assert db.execute("SELECT seq, length(keys) FROM seen_runs").fetchall() == [(25, 16)]
    assert sorted(seen.index_pairs(db), key=lambda p: p[1]) == [(k, n + 1) for n, k in enumerate(keys)]
    db.close()
    j = Journal(tmp_path)
    assert j.known(keys) == set(keys) and j.last_seq() == 25


def test_checkpoints_are_kept_pruned_and_verified(tmp_path):
    j = Journal(tmp_path)
    j.append([(1, [f"e{k}" for k in range(100)], [payload(f"e{k}", k) for k in range(100)])],
             [(id_key(f"e{k}"), k + 1) for k in range(100)])
    for seq in (20, 40, 60, 80):
        blob = os.urandom(1000) + seq.to_bytes(4, "little")
        ck, upto = j.write_checkpoint(seq, blob, f"state{seq}", keep=2)
        assert ck.as_dict()["digest"] == hashlib.sha256(blob).hexdigest() and upto == max(20, seq - 20)
    assert [c[1] for c in j.checkpoints()] == [80, 60]
    assert j.rows_after(0, 1)[0][0] == 61  # rows up to the oldest kept checkpoint are gone
    seq, blob, ok = j.load_checkpoint(j.checkpoints()[0][0])
    assert (seq, ok, blob[-4:]) == (80, True, (80).to_bytes(4, "little"))
    assert j.pruned_to() == 60 and j.known([id_key("e0")]) == {id_key("e0")}  # the index is never pruned
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    db.execute("UPDATE checkpoints SET blob = substr(blob, 1, 500) WHERE seq = 80")
    db.commit()
    db.close()
    j = Journal(tmp_path)
    assert j.load_checkpoint(j.checkpoints()[0][0])[2] is False

    keep_all = Journal(tmp_path / "all")
    keep_all.append([(1, [f"e{k}" for k in range(10)], [payload(f"e{k}", k) for k in range(10)])])
    keep_all.write_checkpoint(5, b"x", "s", keep=1, prune=False)
    assert keep_all.count() == 10 and keep_all.pruned_to() == 0


def test_a_journal_refuses_another_learning_config(tmp_path):
    Journal(tmp_path).claim("a" * 64)
    Journal(tmp_path).claim("a" * 64)
    with pytest.raises(ConfigError) as err:
        Journal(tmp_path).claim("b" * 64)
    assert err.value.where == "service.data_dir"
    with pytest.raises(ConfigError) as err:
        Journal(tmp_path, sync="sometimes")
    assert err.value.where == "service.journal_sync" and "'full', 'normal'" in err.value.message


def test_incidents_outlive_a_reopen(tmp_path):
    Journal(tmp_path).add_incident("corrupt_checkpoint", "checkpoint 3 skipped", {"seq": 30})
    got = Journal(tmp_path).incidents()
    assert [(i["kind"], i["evidence"]) for i in got] == [("corrupt_checkpoint", {"seq": 30})]


@pytest.mark.parametrize("sync", ["full", "normal"])
def test_a_commit_survives_sigkill_right_after_it_returns(tmp_path, sync):
    """The process is killed the moment ``append`` returns (the point where the service acks)."""
    script = textwrap.dedent(f"""
        import os, signal, sys, orjson
        from service.storage.journal import Journal
        j = Journal({str(tmp_path)!r}, sync={sync!r})
        j.append([(1, ["k%d" % k for k in range(5000)], [orjson.dumps(("k%d" % k, None, {{}}, 1.0)) for k in range(5000)])])
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    proc = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT count(*), max(seq) FROM journal").fetchone() == (5000, 5000)
    assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_ids_are_compared_as_bytes_whatever_they_hold(tmp_path):
    """Ids that SQLite's text and JSON functions confuse (U+0000 inside, a prefix of another, lone
    surrogates, long ones) are distinct keys, and each is a duplicate of itself only."""
    odd = ["a", "a\x00", "a\x00b", "a\x00c", "\x00", "a\ud800", "x" * 10_000, "é", "e\u0301"]
    j = Journal(tmp_path)
    keys = [id_key(i) for i in odd]
    assert len(set(keys)) == len(odd)
    dups, pairs = seen.number_events(keys + [id_key("a\x00b")], j.known(keys), 1)
    assert dups == [len(odd)]  # the repeat in the same commit is the duplicate
    assert [s for _, s in pairs] == list(range(1, len(odd) + 1))
    j.append([(1, odd, [payload(f"p{k}", k) for k in range(len(odd))])], pairs)
    assert j.known(keys + [id_key("a\x00d"), id_key("b")]) == set(keys)


def test_a_format_2_file_with_keys_buffered_one_row_each_opens_and_moves_on(tmp_path, monkeypatch):
    """The upgrade path of the index buffer: a file of format 2 holds its newest keys one row each in
    ``seen_new`` and has no ``seen_runs``. Opened by this version, those keys are known (lookups, the
    Bloom filter, the last position); its first new key marks it format 3 and goes into a run; the
    first sorted run takes the rows of both tables and marks it format 4; a reopen answers the same."""
    monkeypatch.setattr(seen, "BUFFER_KEYS", 12)
    j = Journal(tmp_path)
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    old = [id_key(f"old{k}") for k in range(5)]
    db.executescript("DROP TABLE seen_runs; UPDATE meta SET value = '2' WHERE key = 'journal_format';")
    db.executemany("INSERT INTO journal VALUES (?, ?, 0, ?)",
                   [(k + 1, f"old{k}", payload(f"old{k}", k)) for k in range(5)])
    db.executemany("INSERT INTO seen_new VALUES (?, ?)", [(h, k + 1) for k, h in enumerate(old)])
    db.commit()
    db.close()

    j = Journal(tmp_path)
    assert j.format == 2 and j.last_seq() == 5
    assert j.known(old + [id_key("new0")]) == set(old)
    assert all(j._filter.maybe(old))  # the filter was built with the old buffer's keys
    new = [id_key(f"new{k}") for k in range(4)]
    j.append([(6, [f"new{k}" for k in range(4)], [payload(f"new{k}", k) for k in range(4)])],
             [(h, k + 6) for k, h in enumerate(new)])
    assert j.format == 3 and j.known(old + new) == set(old + new)
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == "3"
    assert db.execute("SELECT count(*) FROM seen_new").fetchone()[0] == 5  # still buffered: 9 keys < 12
    db.close()

    j = Journal(tmp_path)
    more = [id_key(f"more{k}") for k in range(3)]
    j.append([(10, [f"more{k}" for k in range(3)], [payload(f"more{k}", k) for k in range(3)])],
             [(h, k + 10) for k, h in enumerate(more)])  # 12 keys: the buffer becomes a sorted run
    assert j.format == 4
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == "4"
    assert db.execute("SELECT (SELECT count(*) FROM seen_new) + (SELECT count(*) FROM seen_runs)").fetchone()[0] == 0
    everything = old + new + more
    want = [(h, k + 1) for k, h in enumerate(everything)]
    assert db.execute("SELECT h, seq FROM seen_sorted ORDER BY seq").fetchall() == want
    # one run, sorted as SQLite orders the primary key (memcmp of the bytes)
    assert [r[0] for r in db.execute("SELECT h FROM seen_sorted WHERE run = 1")] == sorted(everything)
    db.close()
    j = Journal(tmp_path)
    assert j.known(old + new + more + [id_key("never")]) == set(old + new + more) and j.last_seq() == 12
    j.close()
