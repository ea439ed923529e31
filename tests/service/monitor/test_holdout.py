"""The held-out window's running sums give the figures of a full pass over the window.

A check of a squared-loss window reads the window's losses from running sums (``G = sum x x'``
and friends) and rescores only the events it must; these tests recompute every check's figures
with the full pass (every event scored with both iterates, the reference implementation) on the
same model state and require the same figures: counts and the median exactly, sums to 1e-9. The
streams are seeded feeds of the tests' invented cold-chain fleet with a label burst (absurd events
to leave out) and a real change, one with missing features, and one whose categorical feature has
more values than the sums follow (they must step aside).
"""

from __future__ import annotations

import numpy as np
import pytest

from models import Rows
from service.monitor import holdout, rules, window_scoring
from service.config import config_from_dict
from service.engine import Engine, PreparedBatch, holdout_fraction

from . import monitor_feeds as feeds

EXACT = (holdout.ST_KEPT, holdout.ST_NEW, holdout.ST_NEW_ABOVE, holdout.ST_REC_N, holdout.ST_MEDIAN,
         holdout.ST_DIST)
CLOSE = (holdout.ST_RAW, holdout.ST_AVG, holdout.ST_REC_RAW, holdout.ST_REC_AVG)
RECENT = (holdout.ST_REC_RAW, holdout.ST_REC_AVG)


@pytest.fixture
def compared(monkeypatch):
    """Every check's figures side by side with a full pass's on the same state: counts per path."""
    seen = {"sums": 0, "full": 0, "excluded": 0, "recent": 0}
    decide = rules.decide

    def checked(f, i, g, k, indptr, indices, values, mode, y, lo, hi, first, lazy, state, sc, mon, event):
        prm, out = mon[rules.O_PRM:rules.O_OUT], mon[rules.O_OUT:rules.O_RES]
        cut, pending = prm[holdout.P_CUT], prm[holdout.P_UNSCALED] > 0
        flags = decide(f, i, g, k, indptr, indices, values, mode, y, lo, hi, first, lazy, state, sc, mon, event)
        if flags & rules.F_WIDEN:
            return flags
        if pending:  # rows scaled by this very check: the full pass ran
            seen["full"] += 1
            return flags
        again = prm.copy()
        again[holdout.P_CUT] = cut  # the cut this check used (it sets the next one)
        want = np.zeros_like(out)
        holdout._score_every(f, i, g, k, lazy, state, sc, again, want, np.zeros((holdout.N_WORK, f.shape[1])))
        for q in EXACT:
            if q == holdout.ST_REC_N and out[q] < 0:
                continue
            assert out[q] == want[q] or (np.isnan(out[q]) and np.isnan(want[q])), (q, out[q], want[q], prm, again)
        for q in CLOSE:
            if q in RECENT and out[holdout.ST_REC_N] < 0:  # not needed by this check's loss rule
                continue
            assert out[q] == pytest.approx(want[q], rel=1e-9, abs=1e-12), (q, out[q], want[q])
        gst = g[-1]
        used = gst[holdout.G_SUMS] > 0 and gst[holdout.G_VALID] > 0 and gst[holdout.G_SINCE] > 0
        seen["sums" if used else "full"] += 1
        seen["recent"] += int(used and out[holdout.ST_REC_N] >= 0)  # asked for by the loss rule
        seen["excluded"] += int(gst[holdout.G_COUNT] - out[holdout.ST_KEPT])
        return flags

    monkeypatch.setattr(rules, "decide", checked)
    return seen


def _run(eng: Engine, b: PreparedBatch, chunk: int = 3_000) -> None:
    for lo in range(0, len(b), chunk):
        hi = min(lo + chunk, len(b))
        eng.apply(PreparedBatch(b.ids[lo:hi], b.ts[lo:hi], b.rows.take(np.arange(lo, hi)), b.y[lo:hi],
                                b.mode[lo:hi]))


def test_sums_match_the_full_pass_through_a_burst_and_a_change(compared):
    eng = Engine(config_from_dict(feeds.config_dict()), trace_limit=None)
    s = feeds.stream(70_000, 7, burst=(20_000, 21_500), change_at=45_000)
    _run(eng, feeds.batch(eng, s))
    kinds = [i["kind"] for i in eng.incidents]
    print(compared, kinds)
    assert compared["sums"] > 0.8 * (compared["sums"] + compared["full"])
    assert compared["excluded"] > 0  # the burst's targets were left out, by both paths alike
    assert compared["recent"] > 0  # the loss rule asked the running sums for the recent events' figures
    assert "restart" in kinds


def test_sums_match_the_full_pass_with_missing_features(compared):
    eng = Engine(config_from_dict(feeds.config_dict()), trace_limit=None)
    evs = feeds.events(feeds.stream(20_000, 8, burst=(9_000, 9_400)))
    rng = np.random.default_rng(4)
    for e, drop in zip(evs, rng.random((len(evs), 3)) < 0.15):
        for name, gone in zip(feeds.NUMERIC, drop):
            if gone:
                del e.features[name]
    for lo in range(0, len(evs), 2_500):
        eng.apply_events(evs[lo:lo + 2_500])
    print(compared)
    assert compared["sums"] > 0.7 * (compared["sums"] + compared["full"])


def test_sums_step_aside_when_the_window_uses_too_many_coordinates(compared):
    """A categorical feature with 300 values: the sums cannot follow the window's coordinates, every
    check is a full pass (and the figures stay right); once the values narrow down, sums again."""
    eng = Engine(config_from_dict(feeds.config_dict()), trace_limit=None)
    s = feeds.stream(100_000, 9)
    b = feeds.batch(eng, s)
    n = len(s)
    wide = np.arange(n) < 40_000
    buckets = np.where(wide, np.random.default_rng(3).integers(0, 300, n), s.route)
    cols = np.array([eng.model.mapper.bucket("route", f"r{v}")[0] for v in range(300)])
    idx = b.rows.indices.reshape(n, 4).copy()
    idx[:, 3] = np.where(wide, cols[buckets], idx[:, 3])
    b = PreparedBatch(b.ids, b.ts, Rows(b.rows.indptr, idx.reshape(-1), b.rows.values), b.y, b.mode)
    _run(eng, b.__class__(b.ids[:40_000], b.ts[:40_000], b.rows.take(np.arange(40_000)), b.y[:40_000],
                          b.mode[:40_000]))
    assert compared["sums"] == 0 and compared["full"] > 100
    assert eng.monitor.window._g[-1, holdout.G_VALID] == 0
    _run(eng, b.__class__(b.ids[40_000:], b.ts[40_000:], b.rows.take(np.arange(40_000, n)), b.y[40_000:],
                          b.mode[40_000:]))
    print(compared)
    assert compared["sums"] > 0


def test_holdout_share_is_what_the_stream_says():
    """(A guard on the streams above: the hash holds out about 5% of ids.)"""
    ids = feeds.stream(20_000, 7).ids
    share = np.mean([holdout_fraction(i) < 0.05 for i in ids])
    assert 0.04 < share < 0.06


def test_median_with_a_carried_band_is_numpys_median():
    """The check's median (``window_scoring._median``: a band carried from the last check, sorted
    only within it, else the whole sample) equals ``numpy.median`` bit for bit on slowly moving
    samples (the band is hit), jumps (it is missed), ties, even and odd sizes, an empty sample and a
    NaN; the band it carries cannot change the result, only the work."""
    median = window_scoring._median  # compiled (inlined where the checks call it)
    rng = np.random.default_rng(5)
    out = np.zeros(holdout.N_STATS)
    hits = 0
    base = rng.chisquare(1, 400)
    for t in range(4000):
        k = int(rng.integers(1, 300)) if t % 50 == 0 else 251 + t % 2
        if t % 200 == 0:
            base = rng.chisquare(1, 400) * rng.uniform(0.1, 10.0)  # a jump
        base[rng.integers(0, 400)] = rng.chisquare(1)  # one value replaced per check, as the sample turns over
        x = base * (1.0 + 0.001 * np.sin(t / 30.0))
        if t % 9 == 0:
            x = np.round(x, 2)  # ties
        lo, hi = out[holdout.ST_BAND_LO], out[holdout.ST_BAND_HI]
        hits += int(np.count_nonzero(x[:k] < lo) <= (k - 1) // 2 and np.count_nonzero(x[:k] <= hi) > k // 2)
        got, want = median(x.copy(), k, out), np.median(x[:k])
        assert got == want, (t, k, got, want)
    assert hits > 3000  # most checks take the band's short way
    assert np.isnan(median(np.array([1.0, np.nan, 2.0]), 3, out))
    assert np.isnan(median(np.zeros(3), 0, out))
