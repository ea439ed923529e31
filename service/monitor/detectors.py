"""river's change detectors behind one small interface whose state is plain data (no pickle).

Page-Hinkley (E. S. Page, 1954, "Continuous inspection schemes", Biometrika 41) and ADWIN (A. Bifet and
R. Gavaldà, 2007, "Learning from time-changing data with adaptive windowing", SIAM SDM) are river's own
classes, loaded from their modules without ``river.drift``'s package import (which imports scikit-learn:
1.9 s of a start) by a thread that :meth:`ChangeDetector.preload` starts at the monitor's first check
(about 0.03 s of CPU: :func:`_page_hinkley_without_stats`), while learning goes on; a feed too short to be checked never
loads river. Page-Hinkley is saved by its fields; river's ADWIN hides its buckets in compiled code, so it
is saved as the values fed since its last reset (at most ``ADWIN_MEMORY``; beyond, the newest half) and
rebuilt by feeding them again (it is deterministic), alike with and without checkpoints.
"""

from __future__ import annotations

import importlib.util
import math
import sys
import threading
import types
from pathlib import Path

import numpy as np

__all__ = ["ADWIN_MEMORY", "ChangeDetector", "river_detector"]

ADWIN_MEMORY = 1 << 16
_LOADING = threading.Lock()
_PH_FIELDS = ("_sum_increase", "_sum_decrease", "_min_increase", "_max_decrease")
_CLASSES = {"adwin": "ADWIN", "page_hinkley": "PageHinkley"}  # module: river's class


def river_detector(module: str):
    """river's detector class of ``module`` (``"page_hinkley"`` or ``"adwin"``), see the module docstring."""
    with _LOADING:  # a background load and the threads that use it: none may see a module still executing
        loaded = sys.modules.get(f"river.drift.{module}") or sys.modules.get(f"_trimtab_river_{module}")
        if loaded is None:
            loaded = (module == "page_hinkley" and _page_hinkley_without_stats()) or _from_file(f"drift/{module}.py")
            sys.modules[loaded.__name__] = loaded
    return getattr(loaded, _CLASSES[module])


def _from_file(relative: str):
    """Execute river's module at ``relative`` (to river's folder) under a name of ours, without its package's
    ``__init__``."""
    path = Path(importlib.util.find_spec("river").origin).parent / relative
    spec = importlib.util.spec_from_file_location(f"_trimtab_river_{Path(relative).stem}", path)
    loaded = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(loaded)
    return loaded


def _page_hinkley_without_stats():
    """river's Page-Hinkley module with the one statistic it uses, river's ``Mean``, loaded from its own file:
    the ``river.stats`` package imports every statistic, and through ``river.utils`` narwhals and scipy
    (0.07 s of the 0.1 s CPU the detector cost to load). The modules read ``stats`` from the ``river``
    package, which names a namespace with river's ``stats.base`` and ``Mean`` while they execute. Returns
    ``None`` when ``river.stats`` is loaded already, or when this version of river's modules needs more
    (checked by one update): the caller then loads the module the usual way."""
    import river

    if "river.stats" in sys.modules or hasattr(river, "stats"):
        return None
    light = types.SimpleNamespace()
    river.stats = light  # what ``from river import stats`` reads before it would import the package
    try:
        light.base = _from_file("stats/base.py")
        light.Mean = _from_file("stats/mean.py").Mean
        loaded = _from_file("drift/page_hinkley.py")
        probe = loaded.PageHinkley(min_instances=1)
        probe.update(1.0)
        probe.update(0.0)
        return loaded if probe._x_mean.get() == 0.5 else None
    except Exception:  # another layout of river's modules: the usual import
        return None
    finally:
        if river.__dict__.get("stats") is light:
            del river.stats


class ChangeDetector:
    """A river detector, ``"page_hinkley"`` or ``"adwin"``; ``params`` go to river's class unchanged
    (none: river's defaults). After a detection it starts afresh at the next value, as river's do."""

    KINDS = tuple(_CLASSES)

    def __init__(self, kind: str, **params) -> None:
        if kind not in self.KINDS:
            raise ValueError(f"Invalid detector {kind!r}. Valid values are: {', '.join(self.KINDS)}")
        self.kind, self.params, self._loading = kind, dict(params), False
        self.reset()

    def preload(self) -> None:
        """Start loading river's module on a thread of its own (once), ahead of the first value."""
        if not self._loading:
            self._loading = True
            threading.Thread(target=river_detector, args=(self.kind,), name="trimtab-river-load", daemon=True).start()

    def reset(self) -> None:
        self._fresh = None  # river's detector, built on first use (see the module docstring)
        self._fed: list[float] | None = [] if self.kind == "adwin" else None  # ADWIN's input since its reset

    @property
    def _det(self):
        if self._fresh is None:
            self._fresh = river_detector(self.kind)(**self.params)
        return self._fresh

    def rearm(self) -> None:
        """Look for a change again after a dismissed alarm. Page-Hinkley keeps the mean it learned (it still
        describes the feed; a fresh start would learn it from whatever comes next, so a change that began
        while the alarm was open would look normal) and restarts its sums; ADWIN starts afresh."""
        if self.kind == "adwin":
            return self.reset()
        det = self._det
        det._sum_increase = det._sum_decrease = 0.0
        det._min_increase, det._max_decrease, det._drift_detected = math.inf, -1.0, False

    def feed(self, values) -> bool:
        """Feed ``values`` in order up to the first that signals a change (``True``; the rest are not fed)."""
        det = self._det
        if det.drift_detected:  # at the last value of the previous feed (a feed stops at a detection)
            self.reset()
            det = self._det
        if self._fed is None:  # Page-Hinkley: river's update per value and nothing else (the monitor's hot path)
            update = det.update
            for x in values:
                update(x)
                if det.drift_detected:
                    return True
            return False
        for x in values:  # ADWIN: its input is kept too (see the module docstring)
            if len(self._fed) >= ADWIN_MEMORY:  # rebuilt from the newest half, as a restored state is
                self.load_state({"kind": "adwin"}, np.asarray(self._fed[len(self._fed) // 2:]))
                det = self._det
            self._fed.append(x)
            det.update(x)
            if det.drift_detected:
                return True
        return False

    def state(self) -> tuple[dict, np.ndarray]:
        """``(fields, values)``: Page-Hinkley's fields (``{"fresh": true}`` when it was not fed since its
        reset), or the values ADWIN was fed since its reset."""
        if self._fed is not None:
            return {"kind": "adwin"}, np.asarray(self._fed, dtype=np.float64)
        if self._fresh is None:  # never fed since its reset: nothing to save, and no river to load
            return {"kind": self.kind, "fresh": True}, np.zeros(0)
        det = self._det
        return {**{k: float(getattr(det, k)) for k in _PH_FIELDS}, "kind": "page_hinkley", "n": float(det._x_mean.n),
                "mean": float(det._x_mean._mean), "detected": bool(det._drift_detected)}, np.zeros(0)

    def load_state(self, fields: dict, values: np.ndarray) -> None:
        if fields.get("kind") != self.kind:
            raise ValueError(f"detector state of kind {fields.get('kind')!r}, this config's is {self.kind!r}")
        self.reset()
        if self._fed is not None:
            for x in values.tolist():  # on past a detection, as the first time
                self.feed((x,))
        elif not fields.get("fresh"):
            det = self._det
            for k in _PH_FIELDS:
                setattr(det, k, float(fields[k]))
            det._x_mean.n, det._x_mean._mean = float(fields["n"]), float(fields["mean"])
            det._drift_detected = bool(fields["detected"])
