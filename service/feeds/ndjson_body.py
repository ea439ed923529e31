"""NDJSON request bodies (``POST /v1/events``) parsed into columns, as a replay parses a file.

Parsing a body one event at a time (orjson, a dict per event, the validator, ``Engine.prepare``)
costs the learner process about 12 us per event; the replay's columnar reader
(:class:`service.feeds.ndjson_columns.ArrowNdjson`) parses, checks and maps the same lines in
about 4. It applies the validator's rules column by column and sends every line it cannot vouch for
through :meth:`EventValidator.parse_line`, so a bad line gets the same rejection (``line N``, the
field, the reason) and an accepted value is the one the validator gives; the prepared rows equal
``Engine.prepare`` of the validated events bit for bit.

A :class:`ParsedBody` keeps, beside the prepared events, the bytes of each accepted line: the
journal stores the lines of the events it accepts as one row per body
(:data:`service.storage.journal.LINES`), and recovery parses that row with the same reader
(:meth:`BodyParser.lines`), which gives the same prepared events again.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from service.feeds.columns import Prepared, string_buffers, take_prepared
from service.feeds.ndjson_columns import ArrowNdjson, available
from service.idhash import id_keys
from service.kernels import FEEDS
from service.storage.seen import id_key

__all__ = ["BodyParser", "ParsedBody", "available"]


@dataclass
class ParsedBody:
    """One body's accepted events (prepared, in line order) and its rejections.

    ``rejected`` holds :class:`service.events.Rejection` in line order; ``where[k]`` is the 0-based
    line of accepted event ``k`` (as the per-event path numbers them); ``ids[k]`` its id or ``None``
    and ``keys[k]`` the id's deduplication key (:func:`service.storage.seen.id_key`) or ``None``.
    """

    buf: bytes
    prepared: Prepared | None
    rejected: list
    where: list
    ids: list
    keys: list
    starts: np.ndarray
    ends: np.ndarray

    def __len__(self) -> int:
        return len(self.ids)

    def lines(self, keep: list[int] | None = None) -> bytes:
        """The accepted lines (only those at the positions ``keep``, when given), each followed by a
        newline: the journal payload of the body."""
        sel = np.asarray(self.where if keep is None else [self.where[k] for k in keep], dtype=np.int64)
        if len(sel) == 0:
            return b""
        out = np.empty(int(np.sum(self.ends[sel] - self.starts[sel])) + len(sel), dtype=np.uint8)
        FEEDS.gather_lines(np.frombuffer(self.buf, dtype=np.uint8), self.starts, self.ends, sel, out)
        return out.tobytes()

    def kept(self, keep: list[int] | None) -> Prepared:
        """The prepared events at positions ``keep`` (all when ``None``)."""
        if keep is None or len(keep) == len(self.ids):
            return self.prepared
        return take_prepared([self.prepared], np.asarray(keep, dtype=np.int64))


class BodyParser:
    """Parses NDJSON bodies for one config; safe to call from several threads (one reader each).

    Each thread gets its own :class:`ArrowNdjson` over an engine of the config that only prepares
    (its feature mapper's values seen are its own; the learner remembers the values of the events
    it applies from :attr:`Prepared.categories`, as a replay does).
    """

    def __init__(self, config) -> None:
        self.config = config
        self._local = threading.local()

    def _reader(self) -> ArrowNdjson:
        reader = getattr(self._local, "reader", None)
        if reader is None:
            from service.engine import Engine

            reader = self._local.reader = ArrowNdjson(Engine(self.config, trace_limit=0))
        return reader

    def parse(self, body: bytes) -> ParsedBody:
        """Parse and check ``body``; bad lines are rejected with ``line N`` (1-based) and why."""
        reader = self._reader()
        scanned = reader.scan(body)
        prepared, rejected = reader.chunk_lines(body, 1, scanned)
        starts, ends = scanned[0], scanned[1]
        if prepared is None:
            return ParsedBody(body, None, [r for _, r in rejected], [], [], [], starts, ends)
        where = (prepared.where - 1).tolist()
        ids = prepared.batch.ids
        # the deduplication keys here, on a parse thread, not the journal's
        if hasattr(ids, "to_pylist"):
            keys = id_keys(*string_buffers(ids))
            ids = ids.to_pylist()
        else:
            ids = list(ids)
            keys = [None if i is None else id_key(i) for i in ids]
        return ParsedBody(body, prepared, [r for _, r in rejected], where, ids, keys, starts, ends)

    def lines(self, payload: bytes) -> Prepared:
        """The prepared events of a journal row of lines (:meth:`ParsedBody.lines`); raises
        ``ValueError`` if a line no longer parses to one accepted event (the row is not what was
        journaled)."""
        expect = payload.count(b"\n")
        parsed = self.parse(payload)
        if parsed.rejected or len(parsed) != expect:
            first = parsed.rejected[0] if parsed.rejected else None
            raise ValueError(f"a journal row of {expect} lines gave {len(parsed)} events"
                             + (f"; {first.where}: {first.reason}" if first else ""))
        return parsed.prepared
