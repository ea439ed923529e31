"""The storage guard: after a storage fault, refuse writes until the storage takes a write again.

A commit or checkpoint that fails on a storage fault (:func:`service.storage.health.storage_fault`:
disk full, read-only, file-size limit, I/O error) calls :meth:`StorageGuard.failed`. From then on
``fault`` holds the reason: the ingestor answers every write with 503 and that reason, ``/readyz``
answers 503, and an incident is recorded (in memory: the disk may refuse it). A probe runs every half
second; once the data dir has :data:`~service.storage.health.MIN_FREE_BYTES` free and a small
durable write succeeds, the fault incident is persisted, a ``storage_recovered`` incident follows,
and writes are taken again. Nothing in a failed transaction was applied or acknowledged, so the
producer's retry is the whole recovery.
"""

from __future__ import annotations

import asyncio
import logging
import time
from contextlib import suppress

from service.storage.health import has_room, storage_fault

__all__ = ["StorageGuard"]

log = logging.getLogger("trimtab.service")


class StorageGuard:
    """Fault state of one journal.

    Parameters
    ----------
    journal
        The :class:`~service.storage.journal.Journal` to probe.
    db
        Coroutine function running a journal call on the journal's thread.
    incident
        ``incident(kind, reason, evidence, persist)`` of the ingestor (``persist`` on the journal thread).
    """

    def __init__(self, journal, db, incident) -> None:
        self.journal, self._db, self._incident = journal, db, incident
        #: why writes are refused now, or None
        self.fault: str | None = None
        self._watch: asyncio.Future | None = None

    def failed(self, reason: str, during: str) -> None:
        """Enter the fault state (once) and start probing."""
        if self.fault is None:
            self.fault = reason
            self._incident("storage_fault", f"{during} failed: {reason}; writes are refused until it recovers "
                           "(nothing of the failed write was applied or acknowledged)", {"during": during}, False)
            self._watch = asyncio.ensure_future(self._probe())

    async def _probe(self, every: float = 0.5) -> None:
        began = time.monotonic()
        while True:
            await asyncio.sleep(every)
            if not has_room(self.journal.path.parent):
                continue
            try:
                await self._db(self.journal.probe)
                await self._db(self.journal.add_incident, "storage_fault", f"writes were refused: {self.fault}",
                               {"during": "the fault", "since_s": round(time.monotonic() - began, 1)})
            except Exception as exc:
                if storage_fault(exc) is None:
                    log.exception("storage probe failed")
                continue
            took = round(time.monotonic() - began, 1)
            await self._db(self._incident, "storage_recovered", f"the storage takes writes again after {took} s "
                           f"(it had failed: {self.fault})", {"seconds": took}, True)
            self.fault = None
            return

    async def close(self) -> None:
        """Stop probing."""
        if self._watch is not None:
            self._watch.cancel()
            with suppress(asyncio.CancelledError):
                await self._watch
