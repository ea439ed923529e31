"""A Redis stream as a feed: a consumer-group reader that acknowledges only what was learned.

Each stream entry carries one event, as the JSON of docs/events.md, in the field
``[feed] field`` (default ``event``). The reader uses a consumer group, so several services (or a
restarted one) share the stream without losing entries:

1. at start (and after every reconnection) it takes over the entries that another consumer of the
   group was delivered and has not acknowledged for ``[feed] claim_idle_ms`` (``XAUTOCLAIM``): a
   consumer that died, or was renamed, leaves no entry pending for ever;
2. it then re-reads its own *pending* entries, the taken-over ones included, in stream order:
   those delivered before a crash and never acknowledged (``XREADGROUP ... 0``); the journal's
   deduplication by id makes re-delivery harmless;
3. then it blocks for new entries (``XREADGROUP ... >``) in batches of ``[feed] batch``;
4. every batch is validated with the same rules as HTTP bodies, submitted to the ingest queue, and
   acknowledged (``XACK``) only after its events are journaled *and* applied. A full queue is
   waited out (the stream itself is the buffer), never dropped.

A lost connection (a ``redis-server`` restart, a network cut) is retried with a doubling wait up to
``[feed] reconnect_max_s``; with the server's append-only file on, the stream, the group and its
pending list survive a restart, and the steps above resume where the acknowledgements stopped.

Poison entries are acknowledged (they will never be learned) and copied, with the reason and where,
to the dead-letter stream ``[feed] dead_letter`` (default ``<stream>.rejected``), in the same
transaction as the acknowledgement, so nothing disappears silently:

- an entry that fails validation, or has no event field;
- a pending entry that was deleted from the stream (trimmed) before it was learned;
- a pending entry delivered more than ``[feed] max_deliveries`` times and never learned (a learner
  that stops on it each time would otherwise stop for ever); one already journaled is acknowledged.
"""

from __future__ import annotations

import asyncio
import logging
from collections import deque
from contextlib import suppress

from models import InvalidInput

from service.config import FeedConfig
from service.errors import NotReady, Overloaded
from service.events import EventValidator
from service.backoff import Backoff
from service.ingest import Ingestor, encode_event

__all__ = ["StreamFeed"]

log = logging.getLogger("trimtab.feed")

#: a dead-letter copy keeps at most this much of the entry's event field
_KEEP_BYTES = 65536


class StreamFeed:
    """Consumes ``cfg.stream`` through consumer group ``cfg.group`` into an :class:`Ingestor`.

    Parameters
    ----------
    cfg : FeedConfig
        The ``[feed]`` section.
    validator : EventValidator
        The same validation as HTTP bodies.
    ingestor : Ingestor
        Where valid events go; an entry is acknowledged once its item is journaled and applied.
    """

    def __init__(self, cfg: FeedConfig, validator: EventValidator, ingestor: Ingestor) -> None:
        self.cfg = cfg
        self.validator = validator
        self.ingestor = ingestor
        self.consumed = 0
        self.rejected = 0
        self.claimed = 0
        self.reconnects = 0
        self.dead_letter = cfg.dead_letter or f"{cfg.stream}.rejected"
        self.error: str | None = None
        self._backoff = Backoff(cfg.reconnect_max_s)

    async def run(self) -> None:
        """Read until cancelled; a lost connection is retried with a doubling wait."""
        import redis.asyncio as aioredis

        client = aioredis.from_url(self.cfg.source, socket_connect_timeout=5.0)
        try:
            while True:
                try:
                    await self._ensure_group(client)
                    await self._take_over(client)
                    await self._consume(client)
                except asyncio.CancelledError:
                    raise
                except Exception as exc:  # a broker outage must not take the service down
                    self.error = f"{type(exc).__name__}: {exc}"
                    self.reconnects += 1
                    wait = self._backoff.next_wait()
                    log.warning("feed %s: %s; retrying in %.2f s", self.cfg.stream, self.error, wait)
                    await asyncio.sleep(wait)
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

    async def _take_over(self, client) -> None:
        """Make entries idle for ``claim_idle_ms`` at any consumer of the group ours (the pending
        pass then reads them in stream order with our own, so each counts two deliveries); entries
        deleted meanwhile are dropped from the pending list by the server and dead-lettered here."""
        cfg = self.cfg
        start = "0-0"
        while True:
            # not JUSTID: redis-py then returns the ids without the cursor that the scan needs
            nxt, got, *rest = await client.xautoclaim(cfg.stream, cfg.group, cfg.consumer, cfg.claim_idle_ms,
                                                      start_id=start, count=1000)
            self.claimed += len(got)
            deleted = rest[0] if rest else []
            if deleted:
                await self._settle(client, [], [(eid, f"stream {cfg.stream} entry {eid.decode()}",
                                                 "entry was deleted from the stream before it was learned", b"")
                                                for eid in deleted])
            start = nxt.decode() if isinstance(nxt, bytes) else str(nxt)
            if start == "0-0":
                return

    async def _consume(self, client) -> None:
        cfg = self.cfg
        cursor = "0"  # own pending entries first
        inflight: deque = deque()  # submitted batches, oldest first: acknowledged in that order
        while True:
            # with a batch in flight, do not block: finish it first when nothing new is there
            block = cfg.block_ms if cursor == ">" and not inflight else None
            resp = await client.xreadgroup(cfg.group, cfg.consumer, {cfg.stream: cursor}, count=cfg.batch,
                                           block=block)
            self._backoff.reset()
            self.error = None
            entries = resp[0][1] if resp else []
            if cursor != ">":
                if not entries:
                    cursor = ">"
                    continue
                cursor = entries[-1][0].decode()
                inflight.append(await self._submit(entries, await self._deliveries(client, entries)))
            elif entries:
                inflight.append(await self._submit(entries, {}))
            # one batch learned while the next is read and validated; none left waiting when idle
            while len(inflight) > (1 if entries else 0):
                await self._complete(client, inflight.popleft())

    async def _deliveries(self, client, entries) -> dict:
        """How often each re-read pending entry has been delivered (this delivery included)."""
        cfg = self.cfg
        rows = await client.xpending_range(cfg.stream, cfg.group, min=entries[0][0], max=entries[-1][0],
                                           count=len(entries), consumername=cfg.consumer)
        return {row["message_id"]: row["times_delivered"] for row in rows}

    def _parse(self, entries, deliveries: dict) -> tuple:
        """Validate a batch (on a worker thread): events with payloads, refusals, over-delivered ones."""
        cfg = self.cfg
        key = cfg.field.encode()
        events, payloads, bad, worn = [], [], [], []
        for eid, fields in entries:
            where = f"stream {cfg.stream} entry {eid.decode()}"
            if not fields:  # re-read pending entry that the stream no longer holds
                bad.append((eid, where, "entry was deleted from the stream before it was learned", b""))
                continue
            raw = fields.get(key)
            if raw is None:
                bad.append((eid, where, f"entry has no {cfg.field!r} field", b""))
                continue
            try:
                e = self.validator.parse_line(raw, where)
            except InvalidInput as exc:
                bad.append((eid, exc.where, exc.message, raw))
                continue
            times = deliveries.get(eid, 0)
            if times > cfg.max_deliveries:
                worn.append((eid, where, times, raw, e))
                continue
            events.append(e)
            payloads.append(encode_event(e))
        return events, payloads, bad, worn

    async def _submit(self, entries, deliveries: dict) -> tuple:
        """Queue a batch's valid events for the journal and the model; ``(item or None, entries, refusals,
        events)`` for :meth:`_complete`."""
        cfg = self.cfg
        events, payloads, bad, worn = await asyncio.to_thread(self._parse, entries, deliveries)
        for eid, where, times, raw, e in worn:
            if e.id is not None and await asyncio.to_thread(self.ingestor.journaled, e.id):
                continue  # learned before a crash took the acknowledgement: nothing to keep
            bad.append((eid, where, f"delivered {times} times and never learned (over feed.max_deliveries = "
                                    f"{cfg.max_deliveries}): the learner may stop on this entry", raw))
        note = (len(bad), len(entries), None) if bad else None
        item = None
        if events or note:
            while True:
                try:
                    item = self.ingestor.submit(events, payloads, note=note)
                    break
                except Overloaded as exc:
                    await asyncio.sleep(min(float(exc.retry_after), 5.0))
                except NotReady:
                    await asyncio.sleep(0.2)
        return item, entries, bad, len(events)

    async def _complete(self, client, submitted: tuple) -> None:
        """Wait until a submitted batch is journaled and applied, then acknowledge it (an exception
        leaves its entries pending: they are re-read after the reconnection)."""
        item, entries, bad, n = submitted
        if item is not None:
            await item.future
        await self._settle(client, [eid for eid, _ in entries], bad)
        self.consumed += n

    async def _settle(self, client, acked: list, bad: list) -> None:
        """Copy ``bad`` entries (id, where, reason, event bytes) to the dead-letter stream and
        acknowledge them and ``acked`` in one transaction: a crash never keeps one without the other."""
        cfg = self.cfg
        async with client.pipeline(transaction=True) as tx:
            for eid, where, reason, raw in bad:
                tx.xadd(self.dead_letter, {"entry": eid, "where": where, "reason": reason, "event": raw[:_KEEP_BYTES]},
                        maxlen=cfg.dead_letter_maxlen, approximate=True)
            ids = list(dict.fromkeys([*acked, *(eid for eid, *_ in bad)]))
            if ids:
                tx.xack(cfg.stream, cfg.group, *ids)
            await tx.execute()
        self.rejected += len(bad)

    def status(self) -> dict:
        """What ``/readyz`` shows about the feed."""
        return {"stream": self.cfg.stream, "group": self.cfg.group, "consumer": self.cfg.consumer,
                "consumed": self.consumed, "rejected": self.rejected, "claimed": self.claimed,
                "reconnects": self.reconnects, "dead_letter": self.dead_letter, "error": self.error}
