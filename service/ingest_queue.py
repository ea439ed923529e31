"""What the ingestion queue holds and the helpers its stages share (:mod:`service.ingest`).

An :class:`Item` is one request's events (or its NDJSON body parsed into columns) with an optional
rejection note and operator action; its :class:`Receipt` says what became of each event (journal
position or duplicate). :func:`slice_batch` cuts a prepared batch into the learner's slices;
:func:`background_thread` lowers a worker thread below the event loop's.
"""

from __future__ import annotations

import asyncio
import os
import threading
from contextlib import suppress

from models import Rows

from service.engine import PreparedBatch
from service.feeds.ndjson_body import ParsedBody
from service.storage.seen import id_key

__all__ = ["Item", "Receipt", "background_thread", "slice_batch"]


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
    """What happened to an item: journal positions of its new events (``None`` for duplicates)."""

    __slots__ = ("seqs", "extra_seq", "applied_seq", "checkpoint")

    def __init__(self) -> None:
        self.seqs: list = []
        self.extra_seq: int | None = None
        self.applied_seq = 0
        self.checkpoint = None

    @property
    def accepted(self) -> int:
        return sum(1 for s in self.seqs if s is not None)

    def duplicates(self) -> list[int]:
        return [k for k, s in enumerate(self.seqs) if s is None]

    def seq_range(self) -> list[int] | None:
        got = [s for s in self.seqs if s is not None]
        return [got[0], got[-1]] if got else None


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
