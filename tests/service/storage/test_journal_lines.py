"""NDJSON bodies journaled as one row of their accepted lines (journal format 2), on a real server and
a real SQLite file read back with the standard ``sqlite3`` module.

The outside references: ``sqlite3`` for the file, and an uninterrupted in-process :class:`Engine`
fed the same events through :meth:`EventValidator.validate` one by one (not the columnar reader
the service parses bodies with), whose ``state_digest`` the live and the restarted service must
equal bit for bit.
"""

from __future__ import annotations

import sqlite3

import orjson
import pytest

from service.engine import Engine
from service.events import EventValidator, parse_ndjson
from service.http.app import create_app
from service.storage.journal import EVENT, JOURNAL_FORMAT, LINES, Journal, StorageUnavailable, first_position
from service.storage.seen import id_key
from tests.service.servicekit import AUTH, TOKEN, demo_events, journal_positions, make_config, wait_ready

NDJSON = {"Content-Type": "application/x-ndjson"}


async def _started(aiohttp_client, cfg):
    client = await aiohttp_client(create_app(cfg, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    return client


@pytest.mark.asyncio
async def test_bad_lines_and_duplicates_leave_out_of_the_row_and_a_restart_gives_the_same_state(
        aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, prune_journal=False)
    events = demo_events(700)
    lines = [orjson.dumps(e) for e in events[:300]]
    # line 5: a string where a number goes; line 9: not JSON; line 12: an unknown top-level key
    lines[4] = orjson.dumps(dict(events[4], features=dict(events[4]["features"], load_kg="heavy")))
    lines[8] = b'{"id": "x", "features": '
    lines[11] = orjson.dumps(dict(events[11], colour="red"))
    lines[20] = lines[19]  # the same id twice in one body: the first wins
    first = b"\n".join(lines) + b"\n\n"  # trailing blank lines are skipped
    client = await _started(aiohttp_client, cfg)
    got = await (await client.post("/v1/events", data=first, headers=NDJSON)).json()
    # the rejections are the per-event parser's, word for word (line numbers from 1, the field)
    _, want_rejected, _ = parse_ndjson(first, EventValidator(cfg))
    assert got["rejected"] == [r.as_dict() for r in want_rejected]
    assert [r["where"] for r in got["rejected"]] == ["line 5.features.load_kg", "line 9", "line 12.colour"]
    assert got["duplicates"] == [20] and got["accepted"] == 296 and got["seq"] == [1, 296]

    # the next body repeats 100 accepted ids (0-based positions 0..99) and adds 400 new events
    second = b"\n".join(orjson.dumps(e) for e in events[150:250] + events[300:700])
    got2 = await (await client.post("/v1/events", data=second, headers=NDJSON)).json()
    assert got2["duplicates"] == list(range(100)) and got2["accepted"] == 400 and got2["seq"] == [298, 697]
    live = (await (await client.get("/v1/model")).json())["state_digest"]

    v = EventValidator(cfg)
    kept = [e for k, e in enumerate(events[:300]) if k not in (4, 8, 11, 20)] + events[300:700]
    ref = Engine(cfg)
    ref.apply_events([v.validate(e) for e in kept])
    assert live == ref.state_digest

    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    rows = db.execute("SELECT seq, id, kind FROM journal ORDER BY seq").fetchall()
    # one row of lines per body (at its last position), a note of the rejected lines after the first
    assert rows == [(296, None, LINES), (297, None, 1), (697, None, LINES)]
    got_ids = [c["id"] for _, kind, c in journal_positions(db) if kind == LINES]
    assert got_ids == [e["id"] for e in kept]
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == str(JOURNAL_FORMAT)
    db.close()
    await client.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    db.execute("DELETE FROM checkpoints")  # the restart must rebuild the state from the rows of lines
    db.commit()
    db.close()

    client = await _started(aiohttp_client, cfg)  # a restart from the journal alone
    ready = await (await client.get("/readyz")).json()
    assert ready["applied_seq"] == 697
    assert (await (await client.get("/v1/model")).json())["state_digest"] == live
    again = await (await client.post("/v1/events", data=second, headers=NDJSON)).json()
    assert again["accepted"] == 0 and again["duplicates"] == list(range(500))
    await client.close()


@pytest.mark.asyncio
async def test_a_body_of_only_bad_lines_changes_nothing(aiohttp_client, tmp_path):
    cfg = make_config(tmp_path, prune_journal=False)
    client = await _started(aiohttp_client, cfg)
    r = await client.post("/v1/events", data=b'{"features": 3}\n[1, 2]\n', headers=NDJSON)
    body = await r.json()
    assert r.status == 422, body
    assert [x["where"] for x in body["error"]["rejected"]] == ["line 1.features", "line 2"]
    assert body["error"]["where"] == "line 1.features"
    card = await (await client.get("/v1/model")).json()
    assert card["counters"]["events"] == 0 and card["updates"] == 0
    await client.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT kind FROM journal").fetchall() == [(1,)]  # only the note of the rejection


def test_format_1_files_are_read_and_marked_3_at_their_first_row_of_lines(tmp_path):
    j = Journal(tmp_path)
    assert j.format == JOURNAL_FORMAT == 4  # a new file is of the newest format
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    db.execute("DELETE FROM meta WHERE key = 'journal_format'")  # as a file of the versions before
    db.commit()
    db.close()

    j = Journal(tmp_path)
    assert j.format == 1
    ev = orjson.dumps(("a", None, {"ambient_c": 1.0}, 2.0))
    j.append([(1, [None], [ev])])
    assert j.format == 1  # event rows without an id key keep the file readable by the versions before
    body = b'{"id":"b","features":{}}\n{"id":"c","features":{}}\n'
    j.append([(3, None, LINES, body)], [(id_key("b"), 2), (id_key("c"), 3)])
    assert j.format == 3
    rows = j.rows_after(0)
    assert [(r[0], r[2], first_position(r)) for r in rows] == [(1, EVENT, 1), (3, LINES, 2)]
    assert [r[0] for r in j.rows_after(1, limit=1)] == [3]  # a row counts its lines as positions
    assert j.last_seq() == 3
    j.close()
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT value FROM meta WHERE key = 'journal_format'").fetchone()[0] == "3"
    db.execute("UPDATE meta SET value = '5' WHERE key = 'journal_format'")
    db.commit()
    db.close()
    with pytest.raises(StorageUnavailable, match="format 5, written by a newer trimtab"):
        Journal(tmp_path)
    Journal(tmp_path / "other").close()  # the refusal let go of the data-dir lock of the first


@pytest.mark.asyncio
async def test_without_pyarrow_bodies_go_event_by_event_as_before(aiohttp_client, tmp_path, monkeypatch):
    monkeypatch.setattr("service.ingest.columnar_available", lambda: False)
    cfg = make_config(tmp_path, prune_journal=False)
    client = await _started(aiohttp_client, cfg)
    events = demo_events(50)
    got = await (await client.post("/v1/events", data=b"\n".join(orjson.dumps(e) for e in events),
                                   headers=NDJSON)).json()
    assert got["accepted"] == 50 and got["seq"] == [1, 50]
    ref = Engine(cfg)
    ref.apply_events([EventValidator(cfg).validate(e) for e in events])
    assert (await (await client.get("/v1/model")).json())["state_digest"] == ref.state_digest
    db = sqlite3.connect(tmp_path / "trimtab.sqlite")
    assert db.execute("SELECT kind, count(*) FROM journal GROUP BY kind").fetchall() == [(EVENT, 50)]
    db.close()
    await client.close()
