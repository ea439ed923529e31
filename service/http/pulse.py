"""The service's pulse: a bounded history of ingest figures over wall time, sampled once a second.

The engine's check records give the model's figures over *events*; what an operator also needs is
how the service keeps up over *time*: events applied per second, events waiting in the queue, input
rejected at the boundary, and which model version is published and since when. :class:`Pulse`
samples them every ``period`` seconds into a ring of ``size`` samples (10 minutes by default) from a
task of the app (:func:`pulse_context`). It reads plain counters without taking the learner's lock.

The published version is the journal position of the copy that ``/v1/score`` scores
(:func:`service.storage.recovery.serving_view`), read when asked; its *age* is the time since that
copy was first seen (by a sample or a read), so it is exact to within one sampling period.
"""

from __future__ import annotations

import asyncio
import time
from collections import deque
from contextlib import suppress

from aiohttp import web

__all__ = ["PULSE", "Pulse", "pulse_context"]


class Pulse:
    """A ring of ``(time, events, queue, rejected, version)`` samples.

    Parameters
    ----------
    size
        Samples kept (the oldest is dropped first).
    period
        Seconds between samples.
    """

    def __init__(self, size: int = 600, period: float = 1.0) -> None:
        self.period = period
        self._samples: deque[tuple] = deque(maxlen=size)
        self._view = None
        self.published_at: float | None = None

    def _see(self, ing, now: float):
        """Note the published view of ``ing``; a view not seen before was published by ``now``."""
        view = ing.view
        if view is not self._view:
            self._view, self.published_at = view, now
        return view

    def sample(self, ing, now: float | None = None) -> None:
        """Take one sample of ``ing`` (an :class:`service.ingest.Ingestor`) if it has an engine."""
        now = time.time() if now is None else now
        eng = ing.engine if ing is not None else None
        if eng is None:
            return
        view = self._see(ing, now)
        seq = view[2] if view is not None else None
        self._samples.append((now, eng.events, ing.queued_events, eng.rejected, seq))

    def version(self, ing, now: float | None = None) -> dict | None:
        """The published model's journal position, updates, serving iterate and age in seconds
        (``None`` before there is one)."""
        now = time.time() if now is None else now
        if ing is None or self._see(ing, now) is None:
            return None
        return {"seq": self._view[2], "updates": self._view[3], "serving": self._view[1],
                "age_s": max(0.0, now - self.published_at)}

    def series(self) -> dict:
        """The samples as columns: ``t`` (Unix seconds), ``rate`` (events applied per second since the
        sample before), ``queue`` (events), ``rejected`` (inputs rejected per second since the sample
        before); the first sample has no rate (``None``)."""
        rows = list(self._samples)
        out = {"t": [], "rate": [], "queue": [], "rejected": []}
        prev = None
        for t, events, queue, rejected, _ in rows:
            out["t"].append(t)
            out["queue"].append(queue)
            if prev is None or t <= prev[0]:
                out["rate"].append(None)
                out["rejected"].append(None)
            else:
                dt = t - prev[0]
                # a restart loads an older engine: a step down is a new start, not a negative rate
                out["rate"].append(max(0.0, (events - prev[1]) / dt))
                out["rejected"].append(max(0.0, (rejected - prev[3]) / dt))
            prev = (t, events, queue, rejected)
        return out

    async def run(self, service) -> None:
        """Sample ``service.ingestor`` every ``period`` seconds until cancelled."""
        while True:
            self.sample(service.ingestor)
            await asyncio.sleep(self.period)


#: the app's pulse (set by :func:`pulse_context`)
PULSE = web.AppKey("pulse", Pulse)


async def pulse_context(app: web.Application):
    """``cleanup_ctx`` entry: start sampling after the service's lifecycle started, stop at shutdown."""
    from service.http.handlers import SERVICE

    pulse = app[PULSE]
    task = asyncio.create_task(pulse.run(app[SERVICE]), name="trimtab-pulse")
    yield
    task.cancel()
    with suppress(asyncio.CancelledError):
        await task
