"""What the stability monitor costs per event: monitor on (defaults) vs off, same stream, same run.

The stream is the invented cold-chain demo feed (``service.scenario``), stationary (no
recalibration, no gateway fault), 4 numeric and 2 categorical features per event.

``monitor_overhead``
    ``Engine.apply`` on prepared batches, the learning loop that the live service and replay
    share, where all of the monitor's work falls (held-out bookkeeping, window scoring, checks).
    Preparing the batches (feature mapping, holdout assignment) is left out, so this is the
    strictest ratio.
``monitor_overhead_with_prepare``
    ``Engine.prepare`` + ``Engine.apply`` from validated events, which adds the per-event mapping
    both runs pay and the holdout hash only the monitored run pays (parsing is still left out).

Both runs use the same batches and alternate; each keeps its fastest repeat, timed in process CPU
time (the machine is shared: the minimum is the least noisy estimate).
Run ``python benchmarks/monitor_overhead.py``; the last line printed is JSON.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service import scenario  # noqa: E402
from service.config import config_from_dict  # noqa: E402
from service.engine import Engine  # noqa: E402
from service.events import EventValidator  # noqa: E402

__all__ = ["measure_monitor_overhead"]

_FEATURES = {"numeric": list(scenario.NUMERIC), "categorical": list(scenario.CATEGORICAL)}


def _config(enabled: bool):
    return config_from_dict({"name": "overhead", "features": _FEATURES, "monitor": {"enabled": enabled}})


def _events(config, n_events: int, seed: int) -> list:
    validator = EventValidator(config)
    feed = scenario.generate(n_events, seed=seed, recalibration_at=1.0, fault_share=0.0)
    return [validator.validate(e, f"[{i}]") for i, e in enumerate(feed)]


def _apply(config, batches) -> tuple[float, Engine]:
    engine = Engine(config)
    start = time.process_time()
    for b in batches:
        engine.apply(b)
    return time.process_time() - start, engine


def _prepare_and_apply(config, events: list, batch: int) -> float:
    engine = Engine(config)
    start = time.process_time()
    for lo in range(0, len(events), batch):
        engine.apply(engine.prepare(events[lo:lo + batch]))
    return time.process_time() - start


def measure_monitor_overhead(n_events: int = 200_000, repeats: int = 7, batch: int = 10_000, seed: int = 3,
                             prepare_events: int = 40_000, prepare_repeats: int = 3) -> dict:
    """Per-event cost with the monitor on (defaults) and off, and their ratios.

    Returns ``{"monitor_overhead": on / off (apply only), "monitor_overhead_with_prepare": ...,
    "us_per_event_on": ..., "us_per_event_off": ..., "events": ..., "checks": ..., "rollbacks": ...,
    "restarts": ...}`` (microseconds of process CPU time per event).
    """
    cfg = {True: _config(True), False: _config(False)}
    events = _events(cfg[True], n_events, seed)
    batches = {on: [Engine(c).prepare(events[lo:lo + batch]) for lo in range(0, n_events, batch)]
               for on, c in cfg.items()}
    for on in (True, False):  # compile (or load) the kernels before timing
        _apply(cfg[on], batches[on][:2])
    best = {True: float("inf"), False: float("inf")}
    engine_on = None
    for _ in range(repeats):
        for on in (False, True):
            t, engine = _apply(cfg[on], batches[on])
            best[on] = min(best[on], t)
            engine_on = engine if on else engine_on
    prep = {True: float("inf"), False: float("inf")}
    for _ in range(prepare_repeats):
        for on in (False, True):
            prep[on] = min(prep[on], _prepare_and_apply(cfg[on], events[:prepare_events], batch))
    kinds = [i["kind"] for i in engine_on.incidents]
    return {"monitor_overhead": best[True] / best[False],
            "monitor_overhead_with_prepare": prep[True] / prep[False],
            "us_per_event_on": best[True] / n_events * 1e6, "us_per_event_off": best[False] / n_events * 1e6,
            "events": n_events, "checks": len(engine_on.trace), "rollbacks": kinds.count("rollback"),
            "restarts": kinds.count("restart")}


def main() -> None:
    result = measure_monitor_overhead()
    print(f"{'path':<34}{'monitor on / off':>18}")
    print(f"{'Engine.apply (us per event)':<34}{result['us_per_event_on']:>8.3f} / {result['us_per_event_off']:.3f}")
    print(f"{'Engine.apply ratio':<34}{result['monitor_overhead']:>18.3f}")
    print(f"{'prepare + apply ratio':<34}{result['monitor_overhead_with_prepare']:>18.3f}")
    print(json.dumps(result))


if __name__ == "__main__":
    main()
