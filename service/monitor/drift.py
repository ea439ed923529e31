"""Change detectors for the monitor: Page-Hinkley and ADWIN behind one small interface.

Page-Hinkley (E. S. Page, 1954, "Continuous inspection schemes", Biometrika 41, 100-115) is
implemented here, step for step as river's ``drift.PageHinkley`` does it (running mean, forgetting
factor ``alpha``, tolerance ``delta``, ``threshold``, ``min_instances``, modes up/down/both); the tests
check that both fire at the same indices, on river's documented example and on random streams.
It is not imported from river because ``river.drift`` imports its datasets module and, through
it, scikit-learn and scipy: about 75 MB and 1.4 s at start, which a replay process should not pay
for four additions and a comparison. ADWIN (Bifet and Gavalda, 2007, "Learning from time-changing
data with adaptive windowing") is river's, imported only when asked for.
"""

from __future__ import annotations

import math

from service.config import MonitorConfig

__all__ = ["ChangeDetector", "PageHinkley", "sign_test_pvalue"]


class PageHinkley:
    """The Page-Hinkley test on a stream of numbers (river's parameterization and defaults).

    Examples
    --------
    >>> import random
    >>> rng = random.Random(12345)
    >>> stream = rng.choices([0, 1], k=1000) + rng.choices(range(4, 8), k=1000)
    >>> ph = PageHinkley()
    >>> [i for i, x in enumerate(stream) if ph.update(x)]
    [1006]
    """

    MODES = ("up", "down", "both")

    def __init__(self, min_instances: int = 30, delta: float = 0.005, threshold: float = 50.0,
                 alpha: float = 1 - 0.0001, mode: str = "both") -> None:
        if mode not in self.MODES:
            raise ValueError(f"Invalid 'mode'. Valid values are: {', '.join(self.MODES)}")
        self.min_instances = min_instances
        self.delta = delta
        self.threshold = threshold
        self.alpha = alpha
        self.mode = mode
        self.drift_detected = False
        self._reset()

    def _reset(self) -> None:
        self.drift_detected = False
        self._n = 0.0
        self._mean = 0.0
        self._sum_increase = 0.0
        self._sum_decrease = 0.0
        self._min_increase = math.inf
        self._max_decrease = -1.0

    def update(self, x: float) -> bool:
        """Feed one value; return whether a change is detected at it (then the test starts anew)."""
        if self.drift_detected:
            self._reset()
        self._n += 1.0
        self._mean += (1.0 / self._n) * (x - self._mean)
        dev = x - self._mean
        self._sum_increase = self.alpha * self._sum_increase + dev - self.delta
        self._sum_decrease = self.alpha * self._sum_decrease + dev + self.delta
        self._min_increase = min(self._min_increase, self._sum_increase)
        self._max_decrease = max(self._max_decrease, self._sum_decrease)
        if self._n >= self.min_instances:
            up = self._sum_increase - self._min_increase > self.threshold
            down = self._max_decrease - self._sum_decrease > self.threshold
            self.drift_detected = up if self.mode == "up" else down if self.mode == "down" else (up or down)
        return self.drift_detected


def sign_test_pvalue(above: int, n: int) -> float:
    """One-sided sign test: ``P(Binomial(n, 1/2) >= above)``."""
    return sum(math.comb(n, i) for i in range(above, n + 1)) / 2.0**n if n else 1.0


class ChangeDetector:
    """A drift detector (``"page_hinkley"`` or ``"adwin"``) behind ``update(x) -> bool``.

    ``params`` go to the detector unchanged (none: river's defaults), so that this wrapper
    reproduces river's documented detections.
    """

    KINDS = ("adwin", "page_hinkley")

    def __init__(self, kind: str, **params) -> None:
        if kind not in self.KINDS:
            raise ValueError(f"Invalid detector {kind!r}. Valid values are: {', '.join(self.KINDS)}")
        self.kind = kind
        self.params = dict(params)
        self._det = self._make()

    def _make(self):
        if self.kind == "page_hinkley":
            return PageHinkley(**self.params)
        from river.drift import ADWIN  # heavy (imports scikit-learn and scipy): only when asked for

        return ADWIN(**self.params)

    @classmethod
    def for_monitor(cls, cfg: MonitorConfig) -> ChangeDetector | None:
        """The detector ``cfg`` asks for (``None`` for ``"off"``): Page-Hinkley on the per-check
        exceedance share, tuned by ``drift_*``; ADWIN on per-event exceedances, river's defaults
        but ``adwin_delta``."""
        if cfg.drift == "page_hinkley":
            return cls("page_hinkley", min_instances=cfg.drift_min_checks, delta=cfg.drift_delta,
                       threshold=cfg.drift_threshold, mode="up")
        if cfg.drift == "adwin":
            return cls("adwin", delta=cfg.adwin_delta)
        return None

    @property
    def detector(self):
        """The detector itself (:class:`PageHinkley` or river's ``ADWIN``)."""
        return self._det

    def update(self, x: float) -> bool:
        """Feed one value; ``True`` when the detector signals a change at this value."""
        self._det.update(float(x))
        return bool(self._det.drift_detected)

    def update_many(self, xs) -> bool:
        """Feed values in order; ``True`` when the detector signals a change at any of them."""
        fired = False
        for x in xs:
            fired = self.update(x) or fired
        return fired

    def reset(self) -> None:
        self._det = self._make()


