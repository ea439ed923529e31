"""Benchmark of the learning core: the compiled kernel against river, and the price of a big hash space.

Every figure is a ratio against a baseline measured in the same run (the machines are shared and
noisy); each timing is the best of ``--repeats`` runs. Run from the repository root::

    python3 benchmarks/core.py                # 100,000 events per stream
    python3 benchmarks/core.py --events 20000 --only kernel_vs_river

The script prints a table and, as its last line, one JSON object with every figure. Measurements
are plain functions in :data:`MEASUREMENTS` that take the parsed arguments and return a dict of
figures; one that cannot run raises :class:`Skipped` with the reason, which is printed and recorded.

* ``kernel_vs_river``: score then learn each event of a dense 20-feature stream. Ours: the compiled
  kernel (lazy, ball, anytime steps, uniform averaging, served from the average) on prebuilt
  :class:`models.Rows`, compilation excluded; river: ``LinearRegression`` ``predict_one`` then
  ``learn_one`` on the same dicts. ``learn_many_vs_river`` also counts our dict -> Rows mapping;
  ``bare_sgd_vs_river`` is a plain compiled SGD loop on the same rows, the floor of any kernel.
* ``sparse_cost``: per-event time with ``hash_bits=20`` over ``hash_bits=8``, 32 active buckets per
  event, ball projection and uniform averaging on, lazy kernel. Two controls separate the causes of
  a ratio above 1: the 20-bit model fed the 8-bit stream (the O(d) work, i.e. ``lazy_rebase``) and
  the cost of one ``lazy_rebase`` over 2**20 coordinates.

The stability monitor's per-event cost is no longer a goal here: its goal is end to end (replay with
the monitor on over off, ``monitor_on_vs_off`` in ``benchmarks/replay.py``).
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

import numba
import numpy as np

import models
from models import kernels as K

__all__ = ["MEASUREMENTS", "Skipped", "main", "measure_kernel_vs_river", "measure_sparse_cost"]

N_DENSE = 20
ACTIVE = 32


class Skipped(Exception):
    """A measurement that cannot run here; the message says why."""


def best_time(run, repeats: int) -> float:
    """Smallest wall time of ``run()`` over ``repeats`` calls (``run`` prepares its own fresh state)."""
    best = float("inf")
    for _ in range(repeats):
        best = min(best, run())
    return best


def _timed(fn, *args, **kwargs) -> float:
    start = time.perf_counter()
    fn(*args, **kwargs)
    return time.perf_counter() - start


# ------------------------------------------------------------------------- kernel against river

def dense_stream(n: int, seed: int) -> tuple[list[dict], np.ndarray]:
    """20 standardized probe channels of an invented van fleet and a linear target with noise."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, N_DENSE))
    y = x @ rng.normal(size=N_DENSE) + 1.5 + rng.normal(size=n) * 0.3
    names = [f"probe_{j:02d}" for j in range(N_DENSE)]
    return [dict(zip(names, row)) for row in x.tolist()], y


@numba.njit(cache=False)
def bare_sgd(indptr, indices, values, y, w, eta, pred):
    """Plain SGD on squared loss over CSR rows: no scaling, averaging, projection or guard (the floor)."""
    b = 0.0
    for i in range(indptr.shape[0] - 1):
        m = b
        for k in range(indptr[i], indptr[i + 1]):
            m += w[indices[k]] * values[k]
        pred[i] = m
        g = m - y[i]
        for k in range(indptr[i], indptr[i + 1]):
            w[indices[k]] -= eta * g * values[k]
        b -= eta * g


def measure_kernel_vs_river(args) -> dict:
    try:
        from river import linear_model
    except ImportError as exc:
        raise Skipped(f"river is not importable ({exc})") from None
    events, y = dense_stream(args.events, args.seed)
    targets = y.tolist()
    spec = models.ModelSpec(numeric=tuple(events[0]), scaling="none", constraint="ball", radius=20.0,
                            rule="anytime", averaging="uniform", kernel="lazy")
    n = len(events)
    rows = models.LinearModel(spec).rows(events)
    mode = np.ones(n, np.int8)
    models.LinearModel(spec).process(rows, y, mode, models.Outcome.empty(n), stop=min(n, 100))  # compile/load

    ours_err = []

    def ours():
        model = models.LinearModel(spec)
        out = models.Outcome.empty(n)
        took = _timed(model.process, rows, y, mode, out, serve="averaged")
        ours_err.append(float(np.mean(np.abs(out.pred - y))))
        return took

    def ours_mapping():
        return _timed(models.LinearModel(spec).learn_many, events, targets, serve="averaged")

    river_err = []

    def river():
        model = linear_model.LinearRegression()
        err = 0.0
        start = time.perf_counter()
        for x, t in zip(events, targets):
            err += abs(model.predict_one(x) - t)
            model.learn_one(x, t)
        took = time.perf_counter() - start
        river_err.append(err / n)
        return took

    def bare():
        return _timed(bare_sgd, rows.indptr, rows.indices, rows.values, y, np.zeros(N_DENSE), 0.01, np.zeros(n))

    bare_sgd(rows.indptr, rows.indices, rows.values, y, np.zeros(N_DENSE), 0.01, np.zeros(n))  # compile
    t_river = best_time(river, args.repeats)
    t_ours = best_time(ours, args.repeats)
    t_map = best_time(ours_mapping, args.repeats)
    t_bare = best_time(bare, args.repeats)
    return {
        "kernel_vs_river": t_river / t_ours,
        "learn_many_vs_river": t_river / t_map,
        "river_events_per_s": n / t_river,
        "kernel_ns_per_event": 1e9 * t_ours / n,
        "learn_many_ns_per_event": 1e9 * t_map / n,
        "river_ns_per_event": 1e9 * t_river / n,
        "bare_sgd_ns_per_event": 1e9 * t_bare / n,
        "bare_sgd_vs_river": t_river / t_bare,
        "kernel_progressive_mae": ours_err[-1],
        "river_progressive_mae": river_err[-1],
    }


# ------------------------------------------------------------------------------ sparse cost

def distinct_indices(rng, n: int, k: int, space: int) -> np.ndarray:
    """``n`` rows of ``k`` distinct bucket indices drawn uniformly from ``range(space)``, sorted."""
    if space <= 4096:
        parts = [np.argsort(rng.random((min(10_000, n - lo), space), dtype=np.float32), axis=1)[:, :k]
                 for lo in range(0, n, 10_000)]
        idx = np.concatenate(parts)
    else:
        idx = rng.integers(0, space, size=(n, k))
        while True:
            srt = np.sort(idx, axis=1)
            bad = np.flatnonzero(np.any(srt[:, 1:] == srt[:, :-1], axis=1))
            if not len(bad):
                break
            idx[bad] = rng.integers(0, space, size=(len(bad), k))
    return np.sort(idx, axis=1).astype(np.int64)


def sparse_rows(n: int, hash_bits: int, seed: int) -> tuple[models.Rows, np.ndarray]:
    """Rows of 32 signed buckets (what 32 hashed categorical values give) and a learnable target."""
    rng = np.random.default_rng(seed)
    idx = distinct_indices(rng, n, ACTIVE, 1 << hash_bits)
    signs = rng.choice(np.array([-1.0, 1.0]), size=(n, ACTIVE))
    truth = rng.normal(size=1 << hash_bits) * 0.3
    y = np.einsum("ij,ij->i", truth[idx], signs) + rng.normal(size=n) * 0.3
    indptr = np.arange(0, n * ACTIVE + 1, ACTIVE, dtype=np.int64)
    return models.Rows(indptr, idx.reshape(-1), signs.reshape(-1)), y


def hashed_events(n: int, values_per_feature: int, seed: int) -> tuple[list[dict], np.ndarray]:
    """Events of 32 categorical features with ``values_per_feature`` values each, uniformly drawn."""
    rng = np.random.default_rng(seed)
    codes = rng.integers(0, values_per_feature, size=(n, ACTIVE))
    names = [f"tag_{j:02d}" for j in range(ACTIVE)]
    events = [{name: f"v{c}" for name, c in zip(names, row)} for row in codes.tolist()]
    return events, rng.normal(size=n)


def _sparse_spec(hash_bits: int, categorical=("cell",)) -> models.ModelSpec:
    return models.ModelSpec(categorical=tuple(categorical), hash_bits=hash_bits, scaling="none", constraint="ball",
                            rule="anytime", averaging="uniform", kernel="lazy")


def _per_event(spec, rows, y, repeats) -> float:
    n = len(rows)
    mode = np.ones(n, np.int8)

    def run():
        return _timed(models.LinearModel(spec).process, rows, y, mode, models.Outcome.empty(n), serve="averaged")

    return 1e9 * best_time(run, repeats) / n


def measure_sparse_cost(args) -> dict:
    n = args.events
    small, y_small = sparse_rows(n, 8, args.seed)
    large, y_large = sparse_rows(n, 20, args.seed + 1)
    models.LinearModel(_sparse_spec(8)).process(small, y_small, np.ones(n, np.int8), models.Outcome.empty(n),
                                                stop=min(n, 100))
    t8 = _per_event(_sparse_spec(8), small, y_small, args.repeats)
    t20 = _per_event(_sparse_spec(20), large, y_large, args.repeats)
    t20_local = _per_event(_sparse_spec(20), small, y_small, args.repeats)

    values = args.values_per_feature
    events, y_h = hashed_events(n, values, args.seed + 2)
    names = tuple(events[0])
    hashed = {bits: (models.LinearModel(_sparse_spec(bits, names)).rows(events)) for bits in (8, 20)}
    th8 = _per_event(_sparse_spec(8, names), hashed[8], y_h, args.repeats)
    th20 = _per_event(_sparse_spec(20, names), hashed[20], y_h, args.repeats)

    probe = models.LinearModel(_sparse_spec(20))
    probe.process(large, y_large, np.ones(n, np.int8), models.Outcome.empty(n), stop=min(n, 1000))
    st, sc = probe._st, probe._sc
    rebase_s = best_time(lambda: _timed(K.lazy_rebase, st, sc), max(3, args.repeats))
    return {
        "sparse_cost_ratio": t20 / t8,
        "sparse_cost_ratio_hashed": th20 / th8,
        "sparse_cost_ratio_local_indices": t20_local / t8,
        "sparse_ns_per_event_bits8": t8,
        "sparse_ns_per_event_bits20": t20,
        "sparse_ns_per_event_bits20_local": t20_local,
        "hashed_ns_per_event_bits8": th8,
        "hashed_ns_per_event_bits20": th20,
        "hashed_values_per_feature": values,
        "lazy_rebase_ms_bits20": 1e3 * rebase_s,
        "lazy_rebase_ns_per_event_amortized": 1e9 * rebase_s / K.NORM_REFRESH,
    }


#: Each measurement returns a dict of figures; the ones named in ``HEADLINE`` are the goals.
MEASUREMENTS = {
    "kernel_vs_river": measure_kernel_vs_river,
    "sparse_cost": measure_sparse_cost,
}

HEADLINE = {"kernel_vs_river": ">= 50", "learn_many_vs_river": "(info)", "sparse_cost_ratio": "<= 2",
            "sparse_cost_ratio_hashed": "(info)", "sparse_cost_ratio_local_indices": "(info)"}


def machine() -> dict:
    model = platform.processor() or "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        import river
        river_version = river.__version__
    except ImportError:
        river_version = None
    return {"cpu": model, "cores": os.cpu_count(), "python": platform.python_version(),
            "numpy": np.__version__, "numba": numba.__version__, "river": river_version}


def parse_args(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=100_000, help="events per stream (default 100000)")
    parser.add_argument("--repeats", type=int, default=3, help="runs per timing, the best is kept (default 3)")
    parser.add_argument("--values-per-feature", type=int, default=1000,
                        help="values of each categorical feature in the hashed stream (default 1000)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--only", nargs="*", choices=sorted(MEASUREMENTS), help="run only these measurements")
    args = parser.parse_args(argv)
    if args.events < 1000 or args.repeats < 1:
        parser.error("--events must be >= 1000 and --repeats >= 1")
    return args


def main(argv=None) -> dict:
    args = parse_args(argv)
    figures: dict = {"events": args.events, "repeats": args.repeats}
    skipped: dict[str, str] = {}
    for name, measure in MEASUREMENTS.items():
        if args.only and name not in args.only:
            continue
        try:
            figures.update(measure(args))
        except Skipped as why:
            skipped[name] = str(why)
    figures["skipped"] = skipped
    figures["machine"] = machine()

    print(f"{'figure':<38} {'value':>14}  goal")
    print("-" * 62)
    for key, value in figures.items():
        if isinstance(value, float):
            print(f"{key:<38} {value:>14.3f}  {HEADLINE.get(key, '')}")
    for name, why in skipped.items():
        print(f"{name:<38} {'skipped':>14}  {why}")
    print(json.dumps(figures, sort_keys=True))
    return figures


if __name__ == "__main__":
    # run as a script, this folder comes first on sys.path, and its service.py would shadow the
    # service package that the measurements import
    _here = Path(__file__).resolve().parent
    sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != _here]
    main()
