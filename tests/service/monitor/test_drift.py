"""Our Page-Hinkley test against river's ``drift.PageHinkley`` (the reference implementation).

E. S. Page, 1954, "Continuous inspection schemes", Biometrika 41: river implements the test with a
running mean, a forgetting factor and a tolerance; ours follows the same steps, so both must fire at
the same indices on every stream, for every mode and parameter set. That holds for both of ours: the
Python class (``service.monitor.drift.PageHinkley``) and the compiled update the monitor's check runs
(``service.monitor.rules``).
"""

from __future__ import annotations

import random

import numpy as np
import pytest
from river import drift

from service.monitor import rules
from service.monitor.drift import ChangeDetector, PageHinkley


def _fires(detector, stream):
    out = []
    for i, x in enumerate(stream):
        detector.update(x)
        if detector.drift_detected:
            out.append(i)
    return out


def _compiled_fires(stream, **params):
    """The monitor's compiled Page-Hinkley (``rules.ph_feed``) with the settings of ``PageHinkley(**params)``."""
    m = np.zeros(rules.N_STATE)
    rules.ph_load(m, PageHinkley(**params))
    return list(rules.ph_feed(m, np.asarray(stream, dtype=np.float64)))


def test_river_documented_example():
    """river's documentation: ``random.Random(12345)``, 1,000 draws of {0, 1} then 1,000 of 4..7:
    Page-Hinkley fires at index 1006 (river ``drift/page_hinkley.py`` docstring)."""
    rng = random.Random(12345)
    stream = rng.choices([0, 1], k=1000) + rng.choices(range(4, 8), k=1000)
    assert _fires(PageHinkley(), stream) == [1006]
    det = ChangeDetector("page_hinkley")
    assert [i for i, x in enumerate(stream) if det.update(x)] == [1006]
    assert _compiled_fires(stream) == [1006]


@pytest.mark.parametrize("mode", ["up", "down", "both"])
@pytest.mark.parametrize("params", [{}, {"min_instances": 5, "delta": 0.1, "threshold": 3.0},
                                    {"alpha": 0.99, "threshold": 1.0, "delta": 0.0}],
                         ids=["defaults", "sensitive", "forgetful"])
def test_same_detections_as_river_on_random_streams(mode, params):
    """Random piecewise streams (several level shifts up and down, Gaussian noise): identical
    detection indices, including the restarts after each detection."""
    for seed in range(5):
        rng = random.Random(seed)
        stream = []
        level = 0.0
        for _ in range(8):
            level += rng.choice([-3.0, -1.0, 1.0, 3.0])
            stream += [level + rng.gauss(0, 1) for _ in range(rng.randint(50, 400))]
        ours = _fires(PageHinkley(mode=mode, **params), stream)
        theirs = _fires(drift.PageHinkley(mode=mode, **params), stream)
        assert ours == theirs
        assert _compiled_fires(stream, mode=mode, **params) == theirs
        if params:
            assert ours, "the stream should trigger the sensitive settings at least once"


def test_invalid_mode_names_the_valid_values():
    with pytest.raises(ValueError, match="Valid values are: up, down, both"):
        PageHinkley(mode="sideways")
