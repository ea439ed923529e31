"""How late the event loop runs: a task that asks to wake every 10 ms and records how late it woke.

Anything that holds the loop (a long parse, serializing a large answer, a lock taken on the loop)
shows up as lateness of this timer, so its maximum bounds the extra wait any request saw from work
done on the loop. Two figures, both maxima since the service became ready, on ``/metrics``:

* ``trimtab_loop_lag_max_seconds``: wall-clock lateness. It also counts time the process was not
  scheduled at all (a busy machine) or waited for the interpreter lock held by a worker thread.
* ``trimtab_loop_busy_max_seconds``: CPU time the loop's own thread spent within one sampling
  interval (``time.thread_time``), beyond the interval. It counts only work done *on* the loop, so
  it is the figure that says whether anything blocks the loop, whatever else runs on the machine.
"""

from __future__ import annotations

import asyncio
import time

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
    >>> lag.samples > 0 and lag.max_s >= lag.busy_max_s >= 0.0
    True
    """

    def __init__(self, period_s: float = 0.01) -> None:
        self.period_s = period_s
        self.max_s = 0.0
        self.busy_max_s = 0.0
        self.samples = 0

    def reset(self) -> None:
        """Forget the samples so far (the service calls it once recovery is done: loading the
        compiled kernels at start holds the interpreter for a second or more before anything is served)."""
        self.max_s = self.busy_max_s = 0.0
        self.samples = 0

    async def run(self) -> None:
        """Sample until cancelled."""
        loop = asyncio.get_running_loop()
        while True:
            start, cpu = loop.time(), time.thread_time()
            await asyncio.sleep(self.period_s)
            late = max(0.0, loop.time() - start - self.period_s)
            busy = max(0.0, min(late, time.thread_time() - cpu - self.period_s))
            self.max_s = max(self.max_s, late)
            self.busy_max_s = max(self.busy_max_s, busy)
            self.samples += 1
