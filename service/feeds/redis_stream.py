"""A Redis stream as a feed: a consumer-group reader that acknowledges only what was learned.

Each stream entry carries one event, as the JSON of docs/events.md, in the field
``[feed] field`` (default ``event``). The reader uses a consumer group, so several services (or a
restarted one) share the stream without losing entries:

1. at start it first re-reads its own *pending* entries: those delivered before a crash and never
   acknowledged (``XREADGROUP ... 0``); the journal's deduplication by id makes re-delivery harmless;
2. then it blocks for new entries (``XREADGROUP ... >``) in batches of ``[feed] batch``;
3. every batch is validated with the same rules as HTTP bodies, submitted to the ingest queue, and
   acknowledged (``XACK``) only after its events are journaled *and* applied. A full queue is
   waited out (the stream itself is the buffer), never dropped.

Entries that fail validation are acknowledged too (they will never become valid) and copied, with
the reason and where, to the dead-letter stream ``[feed] dead_letter`` (default
``<stream>.rejected``), so nothing disappears silently.
"""

from __future__ import annotations

import asyncio
import logging
from contextlib import suppress

from models import InvalidInput

from service.config import FeedConfig
from service.errors import NotReady, Overloaded
from service.events import EventValidator
from service.ingest import Ingestor, encode_event

__all__ = ["StreamFeed"]

log = logging.getLogger("trimtab.feed")


class StreamFeed:
    """Consumes ``cfg.stream`` through consumer group ``cfg.group`` into an :class:`Ingestor`."""

    def __init__(self, cfg: FeedConfig, validator: EventValidator, ingestor: Ingestor) -> None:
        self.cfg = cfg
        self.validator = validator
        self.ingestor = ingestor
        self.consumed = 0
        self.rejected = 0
        self.dead_letter = cfg.dead_letter or f"{cfg.stream}.rejected"
        self.error: str | None = None

    async def run(self) -> None:
        """Read until cancelled; a lost connection is retried every second."""
        import redis.asyncio as aioredis

        client = aioredis.from_url(self.cfg.source)
        try:
            while True:
                try:
                    await self._ensure_group(client)
                    await self._consume(client)
                except asyncio.CancelledError:
                    raise
                except Exception as exc:  # a broker outage must not take the service down
                    self.error = f"{type(exc).__name__}: {exc}"
                    log.warning("feed %s: %s; retrying in 1 s", self.cfg.stream, self.error)
                    await asyncio.sleep(1.0)
        finally:
            with suppress(Exception):
                await client.aclose()

    async def _ensure_group(self, client) -> None:
        from redis.exceptions import ResponseError

        try:
            await client.xgroup_create(self.cfg.stream, self.cfg.group, id="0", mkstream=True)
        except ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    async def _consume(self, client) -> None:
        cfg = self.cfg
        cursor = "0"  # own pending entries first
        while True:
            block = None if cursor != ">" else cfg.block_ms
            resp = await client.xreadgroup(cfg.group, cfg.consumer, {cfg.stream: cursor}, count=cfg.batch,
                                           block=block)
            entries = resp[0][1] if resp else []
            if cursor != ">":
                entries = [(eid, fields) for eid, fields in entries if fields]
                if not entries:
                    cursor = ">"
                    continue
                cursor = entries[-1][0].decode()
            if entries:
                await self._handle(client, entries)
                self.error = None

    async def _handle(self, client, entries) -> None:
        cfg = self.cfg
        key = cfg.field.encode()
        events, payloads, bad = [], [], []
        for eid, fields in entries:
            where = f"stream {cfg.stream} entry {eid.decode()}"
            raw = fields.get(key)
            if raw is None:
                bad.append((eid, where, f"entry has no {cfg.field!r} field", b""))
                continue
            try:
                e = self.validator.parse_line(raw, where)
            except InvalidInput as exc:
                bad.append((eid, exc.where, exc.message, raw))
                continue
            events.append(e)
            payloads.append(encode_event(e))
        note = (len(bad), len(entries), None) if bad else None
        while True:
            try:
                item = self.ingestor.submit(events, payloads, note=note)
                break
            except Overloaded as exc:
                await asyncio.sleep(min(float(exc.retry_after), 5.0))
            except NotReady:
                await asyncio.sleep(0.2)
        await item.future  # journaled and applied; an exception leaves the entries pending
        for eid, where, reason, raw in bad:
            await client.xadd(self.dead_letter, {"entry": eid, "where": where, "reason": reason, "event": raw[:65536]},
                              maxlen=cfg.dead_letter_maxlen, approximate=True)
        await client.xack(cfg.stream, cfg.group, *[eid for eid, _ in entries])
        self.consumed += len(events)
        self.rejected += len(bad)

    def status(self) -> dict:
        return {"stream": self.cfg.stream, "group": self.cfg.group, "consumer": self.cfg.consumer,
                "consumed": self.consumed, "rejected": self.rejected, "dead_letter": self.dead_letter,
                "error": self.error}
