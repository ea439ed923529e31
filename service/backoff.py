"""Waits between reconnection attempts: doubling from a floor up to a ceiling, with jitter.

Several processes that lose the same Redis server at once (a learner and its remote scorers) would
otherwise all retry in the same instant; a random factor in [0.5, 1] spreads them ("full jitter" is
the common practice; no published constant is claimed here).
"""

from __future__ import annotations

import random

__all__ = ["Backoff"]


class Backoff:
    """The next wait after a failure; :meth:`reset` after a success.

    Parameters
    ----------
    ceiling_s : float
        Longest wait in seconds.
    floor_s : float
        First wait in seconds.
    """

    def __init__(self, ceiling_s: float, floor_s: float = 0.1) -> None:
        self.floor_s = min(floor_s, ceiling_s)
        self.ceiling_s = ceiling_s
        self.failures = 0
        self._rng = random.Random()

    def reset(self) -> None:
        """A success: the next failure waits the floor again."""
        self.failures = 0

    def next_wait(self) -> float:
        """Seconds to wait after one more failure."""
        self.failures += 1
        full = min(self.ceiling_s, self.floor_s * 2 ** min(self.failures - 1, 30))
        return full * (0.5 + 0.5 * self._rng.random())
