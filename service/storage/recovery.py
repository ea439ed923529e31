"""The journal payload of an event, the serving copy of the model, and recovery at start.

Recovery, in order (each refusal leaves the service not ready, with an incident that says why):

1. :func:`check_storage`: a write-ahead log that lost committed frames (see
   :mod:`service.storage.health`) or a mark left by one (``STORAGE-DAMAGED`` in the data dir, until
   an operator deletes it), and ``PRAGMA quick_check`` of the journal file;
2. :func:`load_state`: the newest checkpoint whose digest verifies and whose format and position
   read back. A checkpoint that fails is skipped with a persisted incident and the next older one
   is tried; the journal is only pruned behind the oldest kept checkpoint, so an older checkpoint
   still has every row after it. With no usable checkpoint the engine is rebuilt from the journal
   if it holds the whole history (never pruned); otherwise recovery is refused, because a model
   built from part of the history would silently drop acknowledged events;
3. the journal rows after that position, re-applied on the learner thread through
   :meth:`Ingestor.apply_events` and :meth:`Ingestor.apply_prepared` (a row of an NDJSON body's
   lines is parsed again by the same columnar reader), the same code that applies live items, so
   the state after recovery is bit-identical to the state before.
"""

from __future__ import annotations

import copy
import logging

import numpy as np
import orjson

from models import TrimtabError

from service.engine import Engine
from service.events import Event
from service.storage.journal import EVENT, LINES, NOTE, ROLLBACK

__all__ = ["DAMAGE_MARK", "RecoveryRefused", "check_storage", "decode_event", "encode_event", "load_state",
           "newest_good_checkpoint", "replay_rows", "serving_view"]

#: a file in the data dir that keeps the service not ready after storage damage, until deleted
DAMAGE_MARK = "STORAGE-DAMAGED"


class RecoveryRefused(TrimtabError):
    """Recovery cannot give a state that holds every acknowledged event; the service stays not ready."""

log = logging.getLogger("trimtab.service")


def encode_event(e: Event) -> bytes:
    """The journal payload of a validated event: ``[id, ts, features, target]`` as orjson.

    Copied into a bytes object of its own size: the one orjson returns keeps about 4 KiB of memory
    whatever its length (measured: 4,120 bytes of RSS per 237-byte payload, 283 once copied, and the
    copy is faster end to end), and payloads wait in the ingest queue by the hundred thousand.
    """
    return bytes(memoryview(orjson.dumps((e.id, e.ts, e.features, e.target))))


def serving_view(engine: Engine, applied_seq: int) -> tuple:
    """``(model, serving iterate, journal position, updates)``: a copy of the model for scoring.

    The copy shares the feature mapper and the settings and copies every array (about 12 us for
    4,100 coordinates), so scoring it never reads an array the learner is changing and needs no lock.
    Its predictions are those of the engine at the moment of the copy, bit for bit.
    """
    model = engine.model
    view = copy.copy(model)
    for name, value in vars(model).items():
        if isinstance(value, np.ndarray):
            setattr(view, name, value.copy())
    return view, engine.serving, applied_seq, model.n_updates


def decode_event(payload: bytes) -> Event:
    """A journal payload ``[id, ts, features, target]`` back to the validated event."""
    ident, ts, feats, target = orjson.loads(payload)
    return Event(ident, ts, feats, target)


async def check_storage(ing) -> None:
    """Refuse to start on a damaged journal file or write-ahead log (incident first)."""
    journal = ing.journal
    mark = journal.path.parent / DAMAGE_MARK
    if journal.wal_damage is not None:
        mark.write_text(journal.wal_damage + "\n")
        await ing.db(ing._incident, "journal_damaged", journal.wal_damage, {"file": f"{journal.path.name}-wal"},
                     True)
    if mark.exists():
        raise RecoveryRefused(f"storage damage was found earlier: {mark.read_text().strip()}. Check the data "
                              f"dir, then delete {mark} to start with what the journal holds")
    problems = [journal.open_damage] if journal.open_damage else await ing.db(journal.quick_check)
    if problems:
        reason = (f"the journal file {journal.path.name} is damaged (PRAGMA quick_check: {'; '.join(problems[:3])}); "
                  "not starting, so that no acknowledged event is silently dropped; restore the data dir")
        ing._incident("journal_damaged", reason, {"findings": problems})  # not persisted: the file is damaged
        raise RecoveryRefused(reason)


async def newest_good_checkpoint(ing) -> tuple[Engine | None, int]:
    """``(engine, position)`` from the newest usable checkpoint, or ``(None, 0)`` if there is none."""
    for ck in await ing.db(ing.journal.checkpoints):
        try:
            seq, blob, ok = await ing.db(ing.journal.load_checkpoint, ck[0])
        except Exception as exc:  # an unreadable row is as unusable as a corrupt blob
            seq, blob, ok = ck[1], b"", False
            log.error("checkpoint %d cannot be read: %s", ck[0], exc)
        reason = "its SHA-256 digest does not match (corrupt or truncated)"
        if ok:
            try:
                recorded = Engine.checkpoint_position(blob)
                if recorded is not None and recorded != seq:
                    raise ValueError(f"it records position {recorded}, its row says {seq}")
                engine = Engine.from_bytes(ing.config, blob)
                if not engine.trace:  # a service checkpoint: its check records are stored beside it
                    engine.load_trace(await ing.db(ing.journal.checks, engine.events - 1, engine.trace.maxlen))
                return engine, seq
            except Exception as exc:  # a blob that hashes right but cannot be read is just as unusable
                reason = f"it cannot be read: {exc}"
        await ing.db(ing._incident, "corrupt_checkpoint",
                     f"checkpoint {ck[0]} at journal position {seq} was skipped: {reason}; an older one "
                     "(or the whole journal) and a longer journal replay were used instead",
                     {"checkpoint": ck[0], "seq": seq}, True)
    return None, 0


async def load_state(ing) -> tuple[Engine, int]:
    """The engine to continue from and its journal position: the newest usable checkpoint, else an
    empty engine at position 0 when the journal holds the whole history."""
    engine, pos = await newest_good_checkpoint(ing)
    if engine is not None:
        return engine, pos
    pruned = await ing.db(ing.journal.pruned_to)
    had = await ing.db(ing.journal.checkpoints)
    source = await ing.db(ing.journal.started_from)
    if source is not None:
        reason = (f"no usable checkpoint, and this data dir started from {source}: the journal holds only the "
                  "events after that state, so rebuilding from it would lose the state; the service stays not "
                  "ready; restore a checkpoint or start a new data dir from the state again")
        await ing.db(ing._incident, "history_incomplete", reason, {"started_from": source}, True)
        raise RecoveryRefused(reason)
    if pruned != 0:
        where = f"up to position {pruned}" if pruned > 0 else "(up to an unknown position)"
        reason = (f"no usable checkpoint and the journal was pruned {where}: a model rebuilt from the rest "
                  "would miss acknowledged events, so the service stays not ready; restore a checkpoint "
                  "(service.prune_journal = false keeps the whole history for this case)")
        await ing.db(ing._incident, "history_incomplete", reason, {"pruned_to": pruned}, True)
        raise RecoveryRefused(reason)
    if had:
        await ing.db(ing._incident, "rebuilt_from_journal", "no usable checkpoint: the model is rebuilt from "
                     "the whole journal, which holds every acknowledged event", {"checkpoints": len(had)}, True)
    return Engine(ing.config), 0


def replay_rows(ing, rows: list[tuple]) -> None:
    """Learner thread: journal rows in order, through the same code as live items. A row of lines
    is parsed by the reader that parsed its body (``ing.parser``) and applied as a prepared batch."""
    events: list[Event] = []
    for seq, _id, kind, payload in rows:
        if kind == EVENT:
            events.append(decode_event(payload))
            continue
        ing.apply_events(events)
        events = []
        if kind == LINES:
            if ing.parser is None:
                raise RecoveryRefused(f"journal row {seq} holds NDJSON lines, which need pyarrow to be read; "
                                      "install it (the 'parquet' extra)")
            try:
                prepared = ing.parser.lines(payload)
            except ValueError as exc:
                raise RecoveryRefused(f"journal row {seq} cannot be re-applied: {exc}") from None
            ing.apply_prepared(prepared)
            continue
        body = orjson.loads(payload)
        with ing.lock:
            if kind == NOTE:
                ing.engine.note_rejected(*body)
            elif kind == ROLLBACK:
                ing.engine.rollback(body["reason"])
    ing.apply_events(events)
    with ing.lock:
        ing.applied_seq = rows[-1][0]
        ing.set_view()
