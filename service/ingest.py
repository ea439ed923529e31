"""The ingestion loop: a bounded queue, the journal commit, and the one learner that owns the engine.

Handlers validate a request (on a worker thread) and :meth:`Ingestor.submit` its events as one
*item* (:mod:`service.ingest_queue`); the answer waits on the item's future. An NDJSON body is parsed into columns
(:attr:`Ingestor.parser`, :mod:`service.feeds.ndjson_body`, with pyarrow) and queued whole: it is
journaled as one row of its new events' lines and applied as its prepared batch; other requests
queue validated events, journaled one row each. Two stages drain the queue, in order:

1. the *committer*, on the journal's own thread, takes queued items (up to ``service.chunk_events``
   events a chunk, chunk after chunk while items wait, with no round trip through the event loop
   between them), drops ids ever accepted before (the whole-history index of
   :mod:`service.storage.seen`; within a chunk the first occurrence wins), assigns journal
   positions and commits the rows with their id keys in one transaction;
2. the *learner* applies committed chunks, handed to its thread by the journal thread in commit
   order, in slices of ``service.apply_slice`` events; the event loop resolves each item's future
   as soon as its events are applied (an acknowledged event is journaled *and* learned).

While the learner applies chunk k the committer is already committing chunk k+1; SQLite and the
compiled kernels release the GIL while they work, so the stages overlap with each other and with
the event loop. Mapping features (``Engine.prepare``) is pure and runs outside the engine lock; only
``Engine.apply`` of one slice runs under it. After each slice the learner publishes a copy of the
model (:func:`serving_view`, about 12 us); ``/v1/score`` scores that copy, so it never sees a
half-updated model and never waits for the learner, not even for one slice. Recovery re-applies
journal rows through the same code, in journal order; the engine gives the same state however
events are chunked.
"""

from __future__ import annotations

import asyncio
import logging
import math
import threading
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from contextlib import suppress

from service.engine import INCIDENTS_KEPT, Engine, PreparedBatch
from service.publish import take_snapshot
from service.errors import JournalUnavailable, NotReady, Overloaded
from service.monitor.rules import step_scale_change
from service.events import Event
from service.storage.guard import StorageGuard
from service.storage.health import storage_fault
from service.feeds.ndjson_body import BodyParser, ParsedBody, available as columnar_available
from service.storage.journal import Journal
from service.ingest_queue import Item, Receipt, background_thread, journal_items, slice_batch
from service.startup import recover
from service.storage.recovery import encode_event, serving_view
from service.storage.seen import id_key
from service.warmup import STARTING

__all__ = ["Ingestor", "Item", "Receipt", "background_thread", "encode_event"]

log = logging.getLogger("trimtab.service")


class Ingestor:
    """Owns the engine, the journal thread and the queue between handlers and the model."""

    def __init__(self, config, journal: Journal, metrics) -> None:
        svc = config.service
        self.config, self.journal, self.metrics = config, journal, metrics
        self.incidents: deque[dict] = deque(maxlen=INCIDENTS_KEPT)  # service incidents (the engine keeps its own)
        self.engine: Engine | None = None
        #: what /v1/score reads: see :func:`serving_view` (replaced whole, never changed in place)
        self.view: tuple | None = None
        self.ready = self.stopping = False
        self.recovery = {"state": "starting", "replayed": 0, "checkpoint": None}
        self.applied_seq = self.checkpoint_seq = self.queued_events = 0
        self._limit, self._slice, self._chunk = svc.queue_limit, svc.apply_slice, svc.chunk_events
        self._every, self._keep, self._prune = svc.checkpoint_every, svc.checkpoints_kept, svc.prune_journal
        self._min_gap = svc.checkpoint_min_interval_s
        self._checkpoint_due_at = -math.inf  # monotonic time before which no periodic checkpoint starts
        self._checks_stored = -1  # the newest check record stored beside a checkpoint (the first stores all)
        self._pending: deque[Item] = deque()
        self._merge_retry_at = 0.0           # monotonic time before which no idle merge step is tried
        self._wake = asyncio.Event()
        self._thread, self._learn_thread = (ThreadPoolExecutor(1, f"trimtab-{n}", background_thread)
                                            for n in ("journal", "learner"))
        #: held while the engine changes (one slice at a time); readers of the model take it too
        self.lock = threading.Lock()
        self._next_seq = 1
        self._failed = False                 # the learner failed: nothing more is applied or checkpointed
        self.guard = StorageGuard(journal, self.db, self._incident)
        self._tasks: list[asyncio.Task] = []
        self._background: set[asyncio.Future] = set()
        self._rate = 20_000.0                # events/s applied, for Retry-After
        #: where the serving model is published for scorer processes (None: scores are answered here only)
        self.publisher = None
        self._publish_every = svc.publish_every_ms / 1000.0
        self._published_at = -math.inf       # monotonic time of the last publication
        self.unpublished = False              # the engine changed since the last publication
        self.published_version = 0
        self.published_wall = 0.0             # Unix time of the last publication
        #: parses NDJSON bodies into columns (None without pyarrow: bodies go event by event)
        self.parser = BodyParser(config) if columnar_available() else None

    # ---------------------------------------------------------------- serving
    def set_view(self, force: bool = False) -> None:
        """Under :attr:`lock`: make the engine's state the one ``/v1/score`` reads here, and publish it
        for scorer processes (after every slice, at most every ``service.publish_every_ms`` unless
        ``force``; a state held back by that limit is published by :meth:`publish_pending`)."""
        self.view = serving_view(self.engine, self.applied_seq)
        if self.publisher is None or not self.ready:  # scorers see recovered states only
            return
        now = time.monotonic()
        if not force and now - self._published_at < self._publish_every:
            self.unpublished = True
            return
        snap = take_snapshot(self.engine, self.applied_seq, self.publisher.next_version())
        self.publisher.publish(snap)
        self._published_at, self.unpublished = now, False
        self.published_version, self.published_wall = snap.version, snap.published_at

    def publish_pending(self) -> None:
        """Publish a state that :meth:`set_view` held back (learner thread)."""
        with self.lock:
            if self.unpublished and self.engine is not None:
                self.set_view(force=True)

    def _incident(self, kind: str, reason: str, evidence: dict, persist: bool = False) -> None:
        """Record a service incident; ``persist`` (journal thread only) keeps it across restarts."""
        log.warning("incident %s: %s", kind, reason)
        if persist:
            self.incidents.append(self.journal.add_incident(kind, reason, evidence))
        else:
            self.incidents.append({"kind": kind, "ts": time.time(), "reason": reason, "evidence": evidence})

    @property
    def fault(self) -> str | None:
        """Why the storage refuses writes now (disk full, read-only, ...), or None."""
        return self.guard.fault

    async def db(self, fn, *args):
        """Run a journal call on the journal's thread."""
        return await asyncio.get_running_loop().run_in_executor(self._thread, fn, *args)

    async def learn(self, fn, *args):
        """Run an engine-changing call on the learner's thread."""
        return await asyncio.get_running_loop().run_in_executor(self._learn_thread, fn, *args)

    def journaled(self, ident: str) -> bool:
        """Whether an event with this id was ever journaled (the deduplication index). The lookup runs
        on the journal's thread and this waits for it: call it from a worker thread, never the loop."""
        key = id_key(ident)
        return key in self._thread.submit(self.journal.known, [key]).result()

    # ---------------------------------------------------------------- submitting
    def reserve(self, n: int) -> int:
        """Claim room for ``n`` events *before* a body is parsed, so that refused requests cost no
        parsing and parsed-but-unqueued events count against ``service.queue_limit`` too."""
        if not self.ready or self.stopping:
            what = STARTING.get(self.recovery["state"], "recovering from the journal")
            raise NotReady(what if not self.stopping else "shutting down", where="startup")
        if self.fault is not None:
            raise JournalUnavailable(f"writes are refused until the storage recovers: {self.fault}", where="storage")
        n = max(1, n)
        if self.queued_events + n > self._limit:
            self.metrics.overloaded.inc()
            wait = max(1, math.ceil(self.queued_events / max(self._rate, 1.0)))
            raise Overloaded(f"ingest queue full ({self.queued_events} of {self._limit} events queued, "
                             f"{n} more asked, service.queue_limit); retry later", retry_after=wait)
        self.queued_events += n
        return n

    def release(self, n: int) -> None:
        """Give back a reservation that did not become an item."""
        self.queued_events -= n

    def submit(self, events: list[Event], payloads: list[bytes], note=None, action=None, reserved: int = 0,
               body: ParsedBody | None = None) -> Item:
        """Queue one request's events, or its parsed NDJSON ``body`` (using a reservation if one was
        made); raises :class:`Overloaded` when the queue is full."""
        item = Item(events, payloads, note, action, body)
        extra = item.weight() - reserved
        if extra > 0:
            try:
                self.reserve(extra)
            except Exception:
                self.release(reserved)
                raise
        else:
            self.queued_events += extra
        self._pending.append(item)
        self._wake.set()
        return item

    # ---------------------------------------------------------------- stage 1: journal commit
    async def _committer(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            while not self._pending:
                if self.journal.merging and time.monotonic() >= self._merge_retry_at:
                    await self.db(self._merge_step)  # one slice at a time: a waiting item goes next
                    continue
                self._wake.clear()
                await self._wake.wait()
            await self.db(self._commit_pending, loop)

    def _merge_step(self) -> None:
        """Journal thread, no commit waiting: move the deduplication index's owed merge slices on, so
        that commits do not carry them (:meth:`Journal.merge_step`). A failure is left to the next
        commits (which move owed slices themselves past ``seen.OWED_LIMIT``, or fail and say why)."""
        try:
            self.journal.merge_step()
        except Exception as exc:
            self._merge_retry_at = time.monotonic() + 5.0
            log.warning("moving a merge of the deduplication index failed (retried in 5 s): %r", exc)

    def _commit_pending(self, loop: asyncio.AbstractEventLoop) -> None:
        """Journal thread: commit the queued items a chunk (up to ``service.chunk_events`` events) at a
        time until none is left, and hand each committed chunk straight to the learner's thread.

        Items queued while a chunk commits are taken here without a round trip through the event
        loop; the two single-thread executors keep commit order and learning order the same. The event
        loop only appends to the queue (:meth:`submit`); only this thread pops from it."""
        while self._pending:
            items, n = [], 0
            while self._pending and (not items or n + self._pending[0].size() <= self._chunk):
                it = self._pending.popleft()
                items.append(it)
                n += it.size()
            start = time.perf_counter()
            try:
                self._next_seq = journal_items(self.journal, items, self._next_seq)
            except Exception as exc:
                loop.call_soon_threadsafe(self._commit_failed, items, exc)
                continue
            self.metrics.commit_seconds.observe(time.perf_counter() - start)
            self._learn_thread.submit(self._apply_chunk, items, loop)

    def _commit_failed(self, items: list[Item], exc: Exception) -> None:
        """Event loop: a commit failed; its items are refused (nothing of them was journaled)."""
        reason = storage_fault(exc, self.journal.path.parent)
        log.error("journal commit failed: %s", reason or repr(exc))
        if reason is not None:
            self.guard.failed(reason, "a journal commit")
        for it in items:
            self._finish(it, JournalUnavailable(f"the journal write failed ({reason or exc}); nothing from "
                                                "this request was applied or acknowledged; retry", where="journal"))

    # ---------------------------------------------------------------- stage 2: learning
    def apply_events(self, events: list[Event], *, view_last: bool = True) -> None:
        """Learner thread: apply events in order, one slice at a time under the engine lock.
        ``view_last=False``: the caller sets the view after the last slice (:meth:`_apply_sync`)."""
        engine, step = self.engine, self._slice
        for i in range(0, len(events), step):
            self._apply_slice(engine.prepare(events[i:i + step]),  # prepare is pure: no lock needed
                              view=view_last or i + step < len(events))

    def apply_prepared(self, prepared, *, view_last: bool = True) -> None:
        """Learner thread: apply a prepared batch (:class:`service.feeds.columns.Prepared`) in order,
        one slice at a time under the engine lock; its categorical values join the values seen first,
        as a replay remembers them. ``view_last``: as in :meth:`apply_events`."""
        engine, step = self.engine, self._slice
        bucket = engine.model.mapper.bucket
        for name, text in prepared.categories:
            bucket(name, text)  # the values seen, for reporting: the mapping itself is fixed
        batch = prepared.batch
        for i in range(0, len(batch), step):
            self._apply_slice(batch if len(batch) <= step else slice_batch(batch, i, i + step),
                              view=view_last or i + step < len(batch))

    def _apply_slice(self, batch: PreparedBatch, view: bool = True) -> None:
        """Apply one slice under the lock and, with ``view``, serve and publish the state after it."""
        start = time.perf_counter()
        with self.lock:
            self.engine.apply(batch)
            if view:
                self.set_view()
        took = time.perf_counter() - start
        self.metrics.apply_seconds.observe(took)
        if took > 0:
            self._rate = 0.9 * self._rate + 0.1 * (len(batch) / took)

    def _apply_sync(self, it: Item) -> None:
        """Learner thread: one item's new events, then its rejection note or rollback."""
        r = it.receipt
        keep = r.kept()  # None: every event is new
        # the item's last slice is served and published once, below, with the item's position
        if r.accepted and it.body is not None:
            self.apply_prepared(it.body.kept(keep), view_last=False)
        elif r.accepted:
            self.apply_events(it.events if keep is None else [it.events[k] for k in keep], view_last=False)
        if it.note is not None:
            with self.lock:
                self.engine.note_rejected(*it.note)
        if it.action is not None and it.action[0] == "rollback":
            self._operator_rollback(it.action[1])
        last = r.extra_seq if r.extra_seq is not None else (r.seq_range() or [None, None])[1]
        with self.lock:  # the position always describes the engine state under the same lock
            if last is not None:
                self.applied_seq = last
            self.set_view()
        r.applied_seq = self.applied_seq

    def _operator_rollback(self, reason: str) -> None:
        """Learner thread: an operator's rollback. The monitor records its own incidents; without one the
        service keeps them (in the journal, so they outlive a restart; a replayed journal adds none)."""
        with self.lock:
            before = self.engine.model.step_scale
            self.engine.rollback(reason)
            after = self.engine.model.step_scale
        if self.engine.monitor is None:
            self._incident("rollback", reason, {"step_scale": after, "monitor": "off"}, persist=True)
            if after != before:
                self._incident("step_scale", *step_scale_change(before, after, "rollback",
                                                                self.config.monitor.rollback_shrink), persist=True)

    def _apply_chunk(self, items: list[Item], loop: asyncio.AbstractEventLoop) -> None:
        """Learner thread: apply a committed chunk's items in journal order; each item's answer (and a
        checkpoint it asks for or that falls due) goes back to the event loop."""
        for it in items:
            if self._failed:  # journaled, not applied: a restart applies them in journal order
                loop.call_soon_threadsafe(self._finish, it, JournalUnavailable(
                    "the learner failed; these events are journaled and will be applied at restart", where="learner"))
                continue
            try:
                self._apply_sync(it)
            except Exception as exc:
                self._learner_failed(exc)
                loop.call_soon_threadsafe(self._finish, it, JournalUnavailable(
                    "the learner failed; the events are journaled and will be applied at restart", where="learner"))
                continue
            loop.call_soon_threadsafe(self._applied, it)

    def _learner_failed(self, exc: Exception) -> None:
        """The journal holds rows the model has not learned: stop applying and checkpointing (a
        checkpoint now would record a position that does not describe the engine)."""
        self.ready, self._failed = False, True
        self._incident("learner_failed", f"applying journaled events failed: {exc!r}; "
                       "restart the service to re-apply them from the journal", {})
        log.error("learner failed", exc_info=exc)

    def _applied(self, it: Item) -> None:
        """Event loop: an item is journaled and learned; answer it (after its checkpoint, if it asked
        for one) and start the periodic checkpoint when one is due."""
        if it.action is not None and it.action[0] == "checkpoint":
            fut = asyncio.ensure_future(self._checkpoint_for(it))
            self._background.add(fut)
            fut.add_done_callback(self._background.discard)
            return
        now = time.monotonic()
        if self.applied_seq - self.checkpoint_seq >= self._every and now >= self._checkpoint_due_at:
            self.checkpoint_seq = self.applied_seq  # one checkpoint per period, even while it is written
            self._checkpoint_due_at = now + self._min_gap
            fut = asyncio.ensure_future(self.checkpoint())
            self._background.add(fut)
            fut.add_done_callback(self._background_done)
        self._finish(it, None)

    async def _checkpoint_for(self, it: Item) -> None:
        """An operator's checkpoint: written, then the item is answered with it."""
        try:
            it.receipt.checkpoint = await self.checkpoint()
        except Exception as exc:
            self._learner_failed(exc)
            self._finish(it, JournalUnavailable("the learner failed; the events are journaled and will be applied "
                                                "at restart", where="learner"))
            return
        self._finish(it, None)

    def _background_done(self, fut: asyncio.Future) -> None:
        self._background.discard(fut)
        if not fut.cancelled() and fut.exception() is not None:
            exc = fut.exception()
            reason = storage_fault(exc, self.journal.path.parent)
            log.error("checkpoint failed: %s", reason or repr(exc))
            if reason is not None:
                self.guard.failed(reason, "a checkpoint")
            else:
                self._incident("checkpoint_failed", f"writing a checkpoint failed: {exc!r}", {})

    def _finish(self, it: Item, exc: Exception | None) -> None:
        self.queued_events -= it.weight()
        if not it.future.done():
            if exc is None:
                it.future.set_result(it.receipt)
            else:
                it.future.set_exception(exc)

    async def checkpoint(self) -> dict:
        """Write a checkpoint of the engine at the applied position (and prune the journal)."""
        if self._failed:
            raise JournalUnavailable("no checkpoint after a learner failure: restart the service", where="learner")

        def snapshot():
            with self.lock:  # the position and the state under one lock: the position is the state's
                eng = self.engine  # its check records are stored beside the checkpoint, each once
                return (self.applied_seq, eng.to_bytes(position=self.applied_seq, trace=False), eng.state_digest,
                        (eng.trace_rows(self._checks_stored), eng.trace.maxlen))

        seq, blob, digest, checks = await self.learn(snapshot)
        self.checkpoint_seq = max(self.checkpoint_seq, seq)
        ck, _ = await self.db(self.journal.write_checkpoint, seq, blob, digest, self._keep, self._prune, checks)
        if checks[0]:
            self._checks_stored = max(self._checks_stored, checks[0][-1][0])
        self.metrics.checkpoints.inc()
        return ck.as_dict()

    # ---------------------------------------------------------------- start and stop
    async def recover(self) -> None:
        """Compile or load the kernels, check the storage, load the newest usable checkpoint and
        re-apply the journal after it (:func:`service.startup.recover`); then start the stages.
        Raises :class:`service.storage.recovery.RecoveryRefused` (the service stays not ready, with
        an incident) when the storage is damaged or the acknowledged history cannot be rebuilt."""
        pos, replayed, self._next_seq = await recover(self)
        self._tasks = [asyncio.create_task(self._committer(), name="trimtab-committer")]
        self.ready = True
        if self.publisher is not None:
            with self.lock:
                self.set_view(force=True)
        log.info("recovered: checkpoint at position %d, %d journal rows re-applied, position %d",
                 pos, replayed, self.applied_seq)

    async def drain(self, timeout: float = 30.0) -> None:
        """Stop taking writes and wait until every queued item is applied."""
        self.stopping = True
        deadline = time.monotonic() + timeout
        while self.queued_events > 0 and time.monotonic() < deadline and all(not t.done() for t in self._tasks):
            await asyncio.sleep(0.01)

    async def close(self, final_checkpoint: bool = True) -> None:
        """Drain, write a final checkpoint, stop the stages and the journal thread."""
        if self.ready:
            await self.drain()
            for fut in list(self._background):
                with suppress(Exception):
                    await fut
            if final_checkpoint and self.applied_seq > self.checkpoint_seq and self.fault is None:
                try:
                    await self.checkpoint()
                except Exception as exc:  # the journal holds every applied row: the next start replays them
                    if storage_fault(exc, self.journal.path.parent) is None:
                        raise
                    log.error("final checkpoint not written (%s); the next start re-applies the journal", exc)
        await self.guard.close()
        for t in self._tasks:
            t.cancel()
        for t in self._tasks:
            with suppress(asyncio.CancelledError):
                await t
        self.ready = False
        self._thread.shutdown(wait=True)  # first: a commit in progress still hands its chunk to the learner
        self._learn_thread.shutdown(wait=True)
