"""Detection study: how fast the monitor confirms an abrupt change, and how often it restarts for nothing.

Seeded linear streams (``d`` standard normal features, true weights of norm 2 drawn uniformly in
direction, intercept 1, Gaussian noise of sd 1; the noise floor of the half squared loss is 0.5)
change abruptly at event ``CHANGE_AT`` in one of these ways:

* ``sign_flip``: every true weight changes sign (same scale, same noise);
* ``target_scale_x3``: the target is multiplied by 3 (noise included, as a change of units would);
* ``target_offset_3sd``: the target moves up by 3 noise standard deviations;
* ``one_weight_x10``: the weight of one feature (the largest in magnitude) is multiplied by 10;
* ``no_change``: nothing changes (false alarms only).

As an outside reference, river's ``datasets.synth.FriedmanDrift`` with global abrupt drift
(``drift_type="gra"``, first drift at ``CHANGE_AT``, the second beyond the stream) is run the same way.

Every stream goes through ``Engine.apply`` under the documented defaults (``[monitor]`` as shipped),
as replay and the service run it. Per family the study prints: the share of changes confirmed (a
restart) within ``WITHIN`` events, the median and 90th percentile of the delay (events from the
change to the restart), the loss rise (mean loss of the pre-change truth on the post-change feed over
the noise floor), and false alarms (restarts, and separately rollbacks) per million stationary events
(every event before a change, and whole ``no_change`` streams).

Run ``python3 benchmarks/drift.py [--seeds 12] [--dims 8 64]``; the last line printed is JSON.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

FAMILIES = ("sign_flip", "target_scale_x3", "target_offset_3sd", "one_weight_x10", "no_change")
CHANGE_AT = 30_000
AFTER = 8_000  # events run after the change
WITHIN = 5_000  # a change confirmed later than this counts as missed
STATIONARY = 150_000  # events of each no_change stream
NOISE_SD = 1.0

__all__ = ["CHANGE_AT", "FAMILIES", "friedman", "main", "run_stream", "study", "synthetic"]


def synthetic(family: str, d: int, seed: int, n: int, change_at: int = CHANGE_AT) -> tuple:
    """``(x, y, loss_rise)`` for ``family`` (see the module docstring)."""
    rng = np.random.default_rng([seed, d, FAMILIES.index(family)])
    x = rng.normal(size=(n, d))
    w = rng.normal(size=d)
    w *= 2.0 / np.linalg.norm(w)
    noise = NOISE_SD * rng.normal(size=n)
    y = x @ w + 1.0 + noise
    late = slice(change_at, n)
    if family == "sign_flip":
        y[late] = x[late] @ -w + 1.0 + noise[late]
    elif family == "target_scale_x3":
        y[late] *= 3.0
    elif family == "target_offset_3sd":
        y[late] += 3.0 * NOISE_SD
    elif family == "one_weight_x10":
        j = int(np.argmax(np.abs(w)))
        y[late] += 9.0 * w[j] * x[late, j]
    old = x[late] @ w + 1.0
    rise = float(np.mean((y[late] - old) ** 2) / NOISE_SD**2) if n > change_at else 1.0
    return x, y, rise


def friedman(seed: int, n: int, change_at: int = CHANGE_AT) -> tuple:
    """river's Friedman stream with a global abrupt drift at ``change_at``: ``(x, y, None)``."""
    from river.datasets import synth

    data = synth.FriedmanDrift(drift_type="gra", position=(change_at, 10 * n), seed=seed)
    x = np.zeros((n, 10))
    y = np.zeros(n)
    for i, (features, target) in enumerate(data.take(n)):
        x[i] = [features[k] for k in range(10)]
        y[i] = target
    return x, y, None


def run_stream(x: np.ndarray, y: np.ndarray, name: str, monitor: dict | None = None):
    """Apply the stream through an engine (documented defaults); return the engine."""
    from models import Rows
    from service.config import config_from_dict
    from service.engine import Engine, PreparedBatch, holdout_fraction

    n, d = x.shape
    config = config_from_dict({"name": "drift-study", "features": {"numeric": [f"x{j}" for j in range(d)]},
                               "monitor": monitor or {}})
    engine = Engine(config, trace_limit=0, incidents_kept=None)
    share = config.monitor.holdout_share
    ids = [f"{name}-{i}" for i in range(n)]
    held = np.array([holdout_fraction(i) < share for i in ids])
    mode = np.where(held, 2, 1).astype(np.int8)
    for lo in range(0, n, 10_000):
        hi = min(n, lo + 10_000)
        m = hi - lo
        rows = Rows(np.arange(0, m * d + 1, d, dtype=np.int64), np.tile(np.arange(d, dtype=np.int64), m),
                    np.ascontiguousarray(x[lo:hi]).reshape(-1))
        engine.apply(PreparedBatch(ids[lo:hi], np.full(m, np.nan), rows, y[lo:hi].copy(), mode[lo:hi].copy()))
    return engine


def _record(engine, change_at: int | None) -> dict:
    restarts = [i["event"] for i in engine.incidents if i["kind"] == "restart"]
    rollbacks = [i["event"] for i in engine.incidents if i["kind"] == "rollback"]
    end = change_at if change_at is not None else engine.events
    hits = [e for e in restarts if change_at is not None and change_at <= e <= change_at + WITHIN]
    return {"stationary_events": end, "false_restarts": sum(e < end for e in restarts),
            "false_rollbacks": sum(e < end for e in rollbacks), "delay": hits[0] - change_at if hits else None}


def study(seeds: int = 12, dims=(8, 64), friedman_seeds: int | None = None, stationary: int = STATIONARY,
          monitor: dict | None = None) -> dict:
    """Run every family for every seed and dimension (``[monitor]`` settings ``monitor`` over the
    defaults); return per-family figures."""
    rows: dict[str, list] = {}
    for d in dims:
        for family in FAMILIES:
            for seed in range(seeds):
                n = stationary if family == "no_change" else CHANGE_AT + AFTER
                x, y, rise = synthetic(family, d, seed, n)
                rec = _record(run_stream(x, y, f"{family}-{d}-{seed}", monitor), None if family == "no_change" else CHANGE_AT)
                rows.setdefault(f"{family} d={d}", []).append({**rec, "rise": rise})
    for seed in range(seeds if friedman_seeds is None else friedman_seeds):
        x, y, _ = friedman(seed, CHANGE_AT + AFTER)
        rows.setdefault("river FriedmanDrift gra", []).append(
            {**_record(run_stream(x, y, f"friedman-{seed}", monitor), CHANGE_AT), "rise": None})
    return {name: _summarize(recs, change=not name.startswith("no_change")) for name, recs in rows.items()}


def _summarize(recs: list, change: bool) -> dict:
    delays = [r["delay"] for r in recs if r["delay"] is not None]
    events = sum(r["stationary_events"] for r in recs)
    rises = [r["rise"] for r in recs if r["rise"] is not None]
    return {"runs": len(recs), "detected": len(delays) / len(recs) if change else None,
            "median_delay": float(np.median(delays)) if delays else None,
            "p90_delay": float(np.percentile(delays, 90)) if delays else None,
            "delays": delays, "median_loss_rise": float(np.median(rises)) if rises and change else None,
            "stationary_events": events,
            "false_restarts_per_million": 1e6 * sum(r["false_restarts"] for r in recs) / events,
            "false_rollbacks_per_million": 1e6 * sum(r["false_rollbacks"] for r in recs) / events}


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=12)
    parser.add_argument("--dims", type=int, nargs="+", default=[8, 64])
    parser.add_argument("--stationary", type=int, default=STATIONARY, help="events of each no_change stream")
    args = parser.parse_args(argv)
    found = study(args.seeds, tuple(args.dims), stationary=args.stationary)
    print(f"{'family':<28} {'detected':>9} {'median':>7} {'p90':>7} {'rise':>6} {'false restarts/M':>17} "
          f"{'false rollbacks/M':>18}")
    for name, f in found.items():
        det = "-" if f["detected"] is None else f"{f['detected']:.0%}"
        med = "-" if f["median_delay"] is None else f"{f['median_delay']:.0f}"
        p90 = "-" if f["p90_delay"] is None else f"{f['p90_delay']:.0f}"
        rise = "-" if f["median_loss_rise"] is None else f"{f['median_loss_rise']:.1f}"
        print(f"{name:<28} {det:>9} {med:>7} {p90:>7} {rise:>6} {f['false_restarts_per_million']:>17.2f} "
              f"{f['false_rollbacks_per_million']:>18.2f}")
    events = sum(f["stationary_events"] for f in found.values())
    restarts = sum(f["false_restarts_per_million"] * f["stationary_events"] / 1e6 for f in found.values())
    summary = {"families": {k: {kk: vv for kk, vv in v.items() if kk != "delays"} for k, v in found.items()},
               "stationary_events": events, "false_restarts_per_million": 1e6 * restarts / events,
               "seeds": args.seeds, "dims": args.dims}
    print(json.dumps(summary, sort_keys=True))
    return summary


if __name__ == "__main__":
    # run as a script, this folder comes first on sys.path, and its service.py would shadow the package
    _here = Path(__file__).resolve().parent
    sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != _here]
    main()
