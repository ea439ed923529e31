"""The held-out window's kept scaled values: a check that scales only its new rows gives the figures of
one that scales the whole window, bit for bit.

The reference is :meth:`LinearModel.score_window` without kept values (every row scaled afresh), which
``tests/models/test_score_window.py`` checks against numpy's own operations.
"""

from __future__ import annotations

import numpy as np

import pytest

from models import LinearModel
from service.monitor.window import HeldOutWindow


def _assert_same(kept, fresh):
    for name, a, b in zip(kept._fields, kept, fresh):
        if isinstance(a, np.ndarray):
            assert np.array_equal(a, b), name
        else:
            assert a == b, name  # sums, counts, the reference and the distance as exact floats


@pytest.mark.parametrize("kernel", ["lazy", "dense"])
def test_kept_scaled_values_give_the_figures_of_a_fresh_scaling(kernel):
    """Through the warm-up (the scaling changes under rows already kept), moves of the buffers (a small
    window fills them many times), a drop of older rows (a restart) and a rollback, every check's
    figures with kept scaled values equal those computed from the raw values."""
    rng = np.random.default_rng(31)
    model = LinearModel(numeric=["ambient_c", "load_kg"], categorical=["route"], scaling="warmup",
                        warmup_events=120, constraint="ball", radius=50.0, kernel=kernel)
    window = HeldOutWindow(40, numeric=2)
    event, checks, stale, reused, moves, buffer = 0, 0, 0, 0, 0, None
    for step in range(60):
        n = int(rng.integers(5, 30))
        feats = [{"ambient_c": float(rng.normal(20, 6)), "load_kg": float(rng.normal(900, 250)),
                  "route": f"r{rng.integers(0, 9)}"} for _ in range(n)]
        y = np.array([0.1 * f["ambient_c"] + 0.002 * f["load_kg"] for f in feats]) + rng.normal(size=n)
        rows = model.rows(feats)
        held = np.flatnonzero(rng.random(n) < 0.4)
        window.add(rows, y, held, event + held)
        model.learn_many(feats, y)
        event += n
        if step == 35:
            window.drop_before(event - 30)
        if step == 45:
            model.rollback(0.5)
        upto = event - int(rng.integers(0, 4))
        rows_w, y_w, events, scaled = window.view(upto, keep_scaled=True)
        if not len(events):
            continue
        moves += buffer is not None and scaled[0] is not buffer
        buffer = scaled[0]
        same_scale = np.array_equal(scaled[2], np.concatenate(model.scaling))
        stale += scaled[1] > 0 and not same_scale  # kept rows scaled under the warm-up's older scaling
        reused += scaled[1] > 0 and same_scale
        n_old = len(events) // 2
        kept = model.score_window(rows_w, y_w, n_old, 7, 30.0, n_old, scaled)
        window.scaled_kept()
        rows_f, y_f, _ = window.view(upto)
        fresh = model.score_window(rows_f, y_f, n_old, 7, 30.0, n_old)
        _assert_same(kept, fresh)
        checks += 1
    assert checks > 50 and stale >= 1 and reused > 40 and moves >= 3
    assert window._scaled_hi > 0 and np.array_equal(window._scale, np.concatenate(model.scaling))
