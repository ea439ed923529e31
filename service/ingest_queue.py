"""What the ingestion queue holds and the helpers its stages share (:mod:`service.ingest`).

An :class:`Item` is one request's events (or its NDJSON body parsed into columns) with an optional
rejection note and operator action; its :class:`Receipt` says what became of each event (journal
position or duplicate). :func:`slice_batch` cuts a prepared batch into the learner's slices;
:func:`background_thread` lowers a worker thread below the event loop's; :func:`journal_items`
numbers and commits a chunk of items.
"""

from __future__ import annotations

import asyncio
import os
import threading
from contextlib import suppress

import orjson

from models import Rows

from service.engine import PreparedBatch
from service.feeds.ndjson_body import ParsedBody
from service.storage.journal import LINES, NOTE, ROLLBACK, Journal
from service.storage.seen import id_key, number_events

__all__ = ["Item", "Receipt", "background_thread", "journal_items", "slice_batch"]


def slice_batch(batch: PreparedBatch, lo: int, hi: int) -> PreparedBatch:
    """Events ``lo`` to ``hi`` of a prepared batch (copies of its arrays)."""
    rows = batch.rows
    a, b = int(rows.indptr[lo]), int(rows.indptr[min(hi, len(batch))])
    part = Rows(rows.indptr[lo:hi + 1] - a, rows.indices[a:b].copy(), rows.values[a:b].copy())
    return PreparedBatch(batch.ids[lo:hi], batch.ts[lo:hi].copy(), part, batch.y[lo:hi].copy(),
                         batch.mode[lo:hi].copy())


def background_thread() -> None:
    """Run this worker thread at a lower OS priority than the event loop's thread (Linux: a nice
    value per thread), so that on a busy machine the loop, which answers scores, is scheduled first."""
    if hasattr(os, "setpriority"):
        with suppress(OSError):  # not permitted or not supported: run at the normal priority
            os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), 5)


class Receipt:
    """What happened to an item's events: which were duplicates, and the journal positions of the others.

    The new events of an item get consecutive positions from :attr:`first_seq` in order, so the
    receipt keeps only that position, the item's size and the positions of its duplicates (usually
    none): what a request is answered costs the same whatever its size.
    """

    __slots__ = ("first_seq", "size", "dups", "extra_seq", "applied_seq", "checkpoint")

    def __init__(self) -> None:
        self.first_seq = 0
        self.size = 0
        self.dups: list[int] = []  # positions in the item of its duplicates, ascending
        self.extra_seq: int | None = None
        self.applied_seq = 0
        self.checkpoint = None

    def numbered(self, first_seq: int, size: int, dups: list[int]) -> None:
        """Record the item's numbering (:func:`service.storage.seen.number_events`)."""
        self.first_seq, self.size, self.dups = first_seq, size, dups

    @property
    def accepted(self) -> int:
        return self.size - len(self.dups)

    def duplicates(self) -> list[int]:
        return list(self.dups)

    def kept(self) -> list[int] | None:
        """Positions in the item of its new events; ``None`` when every event is new."""
        if not self.dups:
            return None
        dups = set(self.dups)
        return [k for k in range(self.size) if k not in dups]

    def seq_range(self) -> list[int] | None:
        n = self.accepted
        return [self.first_seq, self.first_seq + n - 1] if n else None


class Item:
    """Events of one request with their payloads, an optional rejection note and operator action.

    An NDJSON body parsed into columns comes as ``body`` (a :class:`ParsedBody`) instead of
    ``events`` and ``payloads``: it is journaled as one row of its accepted lines and applied as
    its prepared batch."""

    __slots__ = ("events", "payloads", "body", "note", "action", "future", "receipt")

    def __init__(self, events, payloads, note=None, action=None, body: ParsedBody | None = None) -> None:
        self.events = events
        self.payloads = payloads
        self.body = body
        self.note = note          # (rejected, total, ts) for engine.note_rejected
        self.action = action      # None | ("rollback", reason) | ("checkpoint",)
        self.future: asyncio.Future = asyncio.get_running_loop().create_future()
        self.receipt = Receipt()

    def size(self) -> int:
        """How many events the item holds (an operator action holds none)."""
        return len(self.body) if self.body is not None else len(self.events)

    def keys(self) -> list:
        """The deduplication key of each event's id (``None`` without an id)."""
        if self.body is not None:
            return self.body.keys
        return [None if e.id is None else id_key(e.id) for e in self.events]

    def weight(self) -> int:
        return max(1, self.size())


def journal_items(journal: Journal, items: list[Item], first_seq: int) -> int:
    """On the journal thread: deduplicate ``items`` against the whole history, number them from
    ``first_seq`` and commit their rows and id keys in one transaction; return the next position.
    The first occurrence of an id in queue order wins.

    A parsed body becomes one row of its new events' lines (kind ``LINES``, ``seq`` its last
    position); other items one row per event."""
    keys = [it.keys() for it in items]
    wanted = set().union(*keys)
    wanted.discard(None)
    known = journal.known(list(wanted))
    parts, pairs, seq = [], [], first_seq
    for it, ks in zip(items, keys):
        dups, new = number_events(ks, known, seq)
        it.receipt.numbered(seq, len(ks), dups)
        keep = it.receipt.kept()  # None: every event is new (the common case)
        count = len(ks) - len(dups)
        if count and it.body is not None:
            parts.append((seq + count - 1, None, LINES, it.body.lines(keep)))
        elif count:
            events, payloads = it.events, it.payloads
            if keep is not None:
                events, payloads = [events[k] for k in keep], [payloads[k] for k in keep]
            parts.append((seq, [e.id for e in events], payloads))
        seq += count
        pairs += new
        if it.note is not None or (it.action and it.action[0] == "rollback"):
            kind, body = (NOTE, it.note) if it.note is not None else (ROLLBACK, {"reason": it.action[1]})
            parts.append((seq, None, kind, orjson.dumps(body)))
            it.receipt.extra_seq = seq
            seq += 1
    journal.append(parts, pairs)
    return seq
