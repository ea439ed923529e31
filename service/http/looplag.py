"""How late the event loop runs: a task that asks to wake every 10 ms and records how late it woke.

Anything that holds the loop (a long parse, serializing a large answer, a lock taken on the loop)
shows up as lateness of this timer, so its maximum bounds the extra wait any request saw from work
done on the loop. It is exposed as the gauge ``trimtab_loop_lag_max_seconds`` on ``/metrics``.
"""

from __future__ import annotations

import asyncio

__all__ = ["LoopLag"]


class LoopLag:
    """The event loop's lateness, sampled every ``period_s`` seconds.

    Examples
    --------
    >>> lag = LoopLag(period_s=0.001)
    >>> async def main():
    ...     task = asyncio.create_task(lag.run())
    ...     await asyncio.sleep(0.01)
    ...     task.cancel()
    >>> asyncio.run(main())
    >>> lag.samples > 0 and lag.max_s >= 0.0
    True
    """

    def __init__(self, period_s: float = 0.01) -> None:
        self.period_s = period_s
        self.max_s = 0.0
        self.last_s = 0.0
        self.samples = 0

    async def run(self) -> None:
        """Sample until cancelled."""
        loop = asyncio.get_running_loop()
        while True:
            start = loop.time()
            await asyncio.sleep(self.period_s)
            self.last_s = max(0.0, loop.time() - start - self.period_s)
            self.max_s = max(self.max_s, self.last_s)
            self.samples += 1
