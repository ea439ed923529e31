"""The monitor's change detectors against river's ``drift.PageHinkley`` and ``drift.ADWIN`` (the references).

E. S. Page, 1954, "Continuous inspection schemes", Biometrika 41; A. Bifet and R. Gavaldà, 2007,
"Learning from time-changing data with adaptive windowing". The monitor runs river's own classes
(loaded without ``river.drift``'s package import) behind a small wrapper that can save its state
without pickle: the wrapper must fire where river's package classes fire, on river's documented
example and on random streams, and a detector saved and restored at any point must go on firing at
the same indices as one that was never interrupted.
"""

from __future__ import annotations

import json
import random

import numpy as np
import pytest
from river import drift

from service.monitor.detectors import ChangeDetector


def _fires(detector, stream):
    out = []
    for i, x in enumerate(stream):
        detector.update(x)
        if detector.drift_detected:
            out.append(i)
    return out


def _steps(seed: int) -> list:
    rng = random.Random(seed)
    stream, level = [], 0.0
    for _ in range(8):
        level += rng.choice([-3.0, -1.0, 1.0, 3.0])
        stream += [level + rng.gauss(0, 1) for _ in range(rng.randint(50, 400))]
    return stream


@pytest.mark.parametrize("kind,index", [("page_hinkley", 1006), ("adwin", 1023)])
def test_river_documented_example(kind, index):
    """river's documentation (``drift/page_hinkley.py`` and ``drift/adwin.py`` docstrings):
    ``random.Random(12345)``, 1,000 draws of {0, 1} then 1,000 of 4..7: Page-Hinkley fires first at
    index 1006, ADWIN at 1023."""
    rng = random.Random(12345)
    stream = rng.choices([0, 1], k=1000) + rng.choices(range(4, 8), k=1000)
    det = ChangeDetector(kind)
    assert [i for i, x in enumerate(stream) if det.feed([float(x)])][0] == index


@pytest.mark.parametrize("mode", ["up", "down", "both"])
@pytest.mark.parametrize("params", [{}, {"min_instances": 5, "delta": 0.1, "threshold": 3.0},
                                    {"alpha": 0.99, "threshold": 1.0, "delta": 0.0}],
                         ids=["defaults", "sensitive", "forgetful"])
def test_same_detections_as_river_on_random_streams(mode, params):
    """Random piecewise streams (level shifts up and down, Gaussian noise): identical detection indices
    to ``river.drift.PageHinkley``, including the fresh start after each detection."""
    for seed in range(5):
        stream = _steps(seed)
        det = ChangeDetector("page_hinkley", mode=mode, **params)
        ours = [i for i, x in enumerate(stream) if det.feed([float(x)])]
        assert ours == _fires(drift.PageHinkley(mode=mode, **params), stream)
        if params:
            assert ours, "the stream should trigger the sensitive settings at least once"


@pytest.mark.parametrize("kind,params", [("page_hinkley", {"min_instances": 5, "delta": 0.1, "threshold": 3.0}),
                                         ("adwin", {})])
def test_saved_state_continues_identically(kind, params):
    """Saved (through JSON and an array, as the monitor's checkpoint does) and restored at random
    points, a detector fires at the same indices as river's, never interrupted."""
    reference = drift.PageHinkley(**params) if kind == "page_hinkley" else drift.ADWIN(**params)
    stream = _steps(7) + _steps(8)
    want = _fires(reference, stream)
    assert want
    cuts = sorted(random.Random(3).sample(range(1, len(stream)), 6))
    det, got, start = ChangeDetector(kind, **params), [], 0
    for cut in cuts + [len(stream)]:
        got += [start + i for i, x in enumerate(stream[start:cut]) if det.feed([float(x)])]
        fields, values = det.state()
        det = ChangeDetector(kind, **params)
        det.load_state(json.loads(json.dumps(fields)), np.frombuffer(values.tobytes()))
        start = cut
    assert got == want


def test_invalid_kind_names_the_valid_values():
    with pytest.raises(ValueError, match="Valid values are: adwin, page_hinkley"):
        ChangeDetector("cusum")


@pytest.mark.parametrize("name", ["PageHinkley", "ADWIN"])
def test_threads_loading_a_detector_at_once_all_get_river_s_class(name, monkeypatch):
    """Parse threads each build an engine, so the first load of a detector's module can happen on
    several threads at once: none may see the module before it finished executing (it once raised
    AttributeError on a two-thread replay)."""
    import sys
    import threading

    from service.monitor.detectors import river_detector

    module = {"PageHinkley": "page_hinkley", "ADWIN": "adwin"}[name]
    monkeypatch.delitem(sys.modules, f"_trimtab_river_{module}", raising=False)
    monkeypatch.delitem(sys.modules, f"river.drift.{module}", raising=False)
    start, got = threading.Barrier(8), []

    def load():
        start.wait()
        try:
            got.append(river_detector(module))
        except Exception as exc:  # recorded, so that the assertion below names it
            got.append(exc)

    threads = [threading.Thread(target=load) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(isinstance(c, type) and c.__name__ == name for c in got), got
    assert len({id(c) for c in got}) == 1  # one module, loaded once
    assert issubclass(got[0], drift.PageHinkley.__mro__[1])  # river's DriftDetector base


@pytest.mark.parametrize("kind", ChangeDetector.KINDS)
def test_unfed_detector_saved_and_restored_fires_as_river(kind):
    """A detector saved before its first value (river's class not built yet) and restored fires at
    the indices where ``river.drift``'s class fires on the same stream."""
    stream = _steps(3)
    saved = ChangeDetector(kind)
    fields, values = saved.state()
    restored = ChangeDetector(kind)
    restored.load_state(json.loads(json.dumps(fields)), values)
    reference = drift.PageHinkley() if kind == "page_hinkley" else drift.ADWIN()
    expected = _fires(reference, stream)
    assert expected, "the stream should hold changes"
    assert [i for i, x in enumerate(stream) if restored.feed((x,))] == expected


@pytest.mark.parametrize("kind", ["page_hinkley", "adwin"])
def test_a_preloaded_detector_loads_river_s_module_in_the_background(kind, monkeypatch):
    """A new detector loads nothing; :meth:`ChangeDetector.preload` (the monitor's first check) loads
    river's module on a thread of its own, so that the check that first feeds it finds it loaded;
    the detector then is river's class, fed as usual."""
    import sys
    import threading

    monkeypatch.delitem(sys.modules, f"_trimtab_river_{kind}", raising=False)
    monkeypatch.delitem(sys.modules, f"river.drift.{kind}", raising=False)
    det = ChangeDetector(kind)
    assert f"_trimtab_river_{kind}" not in sys.modules
    det.preload()
    for t in [t for t in threading.enumerate() if t.name == "trimtab-river-load"]:
        t.join(timeout=60)
    assert f"_trimtab_river_{kind}" in sys.modules  # loaded before any value was fed
    assert det._fresh is None
    det.feed([0.0, 1.0])
    assert type(det._fresh).__module__ == f"_trimtab_river_{kind}"


LIGHT_LOAD = """
import json, random, sys
from service.monitor.detectors import ChangeDetector, river_detector
cls = river_detector("page_hinkley")
heavy = sorted({m.split(".")[0] for m in sys.modules if m.startswith(("narwhals", "scipy", "river.stats"))})
from river import drift, stats  # the usual import, after ours: river's own package
rng = random.Random(int(sys.argv[1]))
stream = [rng.gauss(0.0, 1.0) + (3.0 if 300 <= i < 600 else 0.0) for i in range(1500)]
det, ref = ChangeDetector("page_hinkley", threshold=5.0, mode="both"), drift.PageHinkley(threshold=5.0, mode="both")
ours = [i for i, x in enumerate(stream) if det.feed([x])]
theirs = []
for i, x in enumerate(stream):
    ref.update(x)
    if ref.drift_detected:
        theirs.append(i)
print(json.dumps({"module": cls.__module__, "heavy": heavy, "ours": ours, "theirs": theirs,
                  "stats_is_package": stats.__name__ == "river.stats" and hasattr(stats, "Var")}))
"""


def test_page_hinkley_loaded_without_river_stats_package_fires_as_river_s():
    """In a fresh process, Page-Hinkley loads with river's ``Mean`` from its own file (no ``river.stats``
    package, narwhals or scipy); it then fires at the same indices as ``river.drift.PageHinkley``
    imported the usual way afterwards, and ``river.stats`` is river's whole package."""
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[3]
    for seed in (1, 2):
        out = subprocess.run([sys.executable, "-c", LIGHT_LOAD, str(seed)], capture_output=True, text=True,
                             cwd=root, env={**__import__("os").environ, "PYTHONPATH": str(root)}, timeout=120)
        assert out.returncode == 0, out.stderr[-2000:]
        got = json.loads(out.stdout.strip().splitlines()[-1])
        assert got["module"] == "_trimtab_river_page_hinkley"
        assert got["heavy"] == []
        assert got["ours"] == got["theirs"] and got["ours"]
        assert got["stats_is_package"]
