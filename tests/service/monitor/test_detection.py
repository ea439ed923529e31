"""A small version of the detection study ``benchmarks/drift.py``: abrupt changes are confirmed fast,
stationary streams restart nothing.

Outside references: the streams' truth (the loss rise of the pre-change truth on the post-change feed,
computed from the generator), and river's ``datasets.synth.FriedmanDrift`` with a global abrupt drift
(Ikonomovska, Gama and Džeroski, 2011, "Learning model trees from evolving data streams", the
generator river ships).
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

_PATH = Path(__file__).resolve().parents[3] / "benchmarks" / "drift.py"


@pytest.fixture(scope="module")
def study():
    spec = importlib.util.spec_from_file_location("drift_study", _PATH)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.study(seeds=2, dims=(8,), stationary=60_000, friedman_seeds=1)


@pytest.mark.slow
def test_abrupt_changes_are_confirmed_within_5000_events(study):
    """Every abrupt change of every family (and river's Friedman drift) is confirmed by a restart within
    5,000 events; where the loss rises ten-fold or more the median delay is at most 1,500 events."""
    for name, figures in study.items():
        if name.startswith("no_change"):
            continue
        print(name, figures["delays"], figures["median_loss_rise"])
        assert figures["detected"] == 1.0, name
        if figures["median_loss_rise"] is not None and figures["median_loss_rise"] >= 10.0:
            assert figures["median_delay"] <= 1_500, name


@pytest.mark.slow
def test_stationary_streams_restart_nothing(study):
    """No restart and no rollback before any change, nor on the stationary streams (some 300,000
    stationary events in all)."""
    events = sum(f["stationary_events"] for f in study.values())
    assert events >= 250_000
    for name, figures in study.items():
        assert figures["false_restarts_per_million"] == 0.0, name
        assert figures["false_rollbacks_per_million"] == 0.0, name
