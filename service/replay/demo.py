"""``trimtab demo``: the invented cold-chain fleet replayed under a guarded and an unguarded config.

The feed (``replay_data/coldchain-demo.ndjson.gz``, three simulated days of 24 refrigerated vans,
made by :mod:`service.replay.scenario`) contains a faulty gateway that sends Fahrenheit numbers labelled
Celsius for about 86 minutes, a probe recalibration part-way through and a sprinkling of malformed
lines. ``replay_data/configs/guarded.toml`` (anytime steps in a ball, averaged model, monitor free
to roll back and restart) and ``unguarded.toml`` (constant step in the same ball, raw iterate served,
a monitor that only observes) are replayed side by side; the report goes to ``--out`` (default
``trimtab-demo``) and the verdicts to stdout. ``--events N`` builds a fresh feed of N events
instead of using the shipped copy. All data is invented; the output is decision support only.
"""

from __future__ import annotations

import math
import os
import sys
import time
from pathlib import Path

from models import TrimtabError

__all__ = ["DEMO_FEED", "demo_main", "demo_paths", "run_demo"]

_DATA = Path(__file__).resolve().parents[2] / "replay_data"
DEMO_FEED = "coldchain-demo.ndjson.gz"


def demo_paths() -> tuple[Path, list[Path]]:
    """The shipped demo feed and the two demo configs (raises if the configs are not there)."""
    configs = [_DATA / "configs" / "guarded.toml", _DATA / "configs" / "unguarded.toml"]
    missing = [str(p) for p in configs if not p.is_file()]
    if missing:
        raise TrimtabError(f"the demo configs are missing ({', '.join(missing)}); run the demo from a "
                           "trimtab source checkout", where="replay_data/configs")
    return _DATA / DEMO_FEED, configs


def _feed(out: Path, events: int | None) -> tuple[Path, dict | None]:
    """The feed to replay, and its manifest when it was built here."""
    from service.replay.scenario import write_ndjson

    shipped, _ = demo_paths()
    if events is None and shipped.is_file():
        return shipped, None
    n = 103_680 if events is None else events
    path = out / f"coldchain-demo-{n}.ndjson.gz"
    print(f"building the demo feed ({n:,} events) in {path}", file=sys.stderr)
    return path, write_ndjson(path, n, seed=7)


def run_demo(out: str | Path, events: int | None = None, *, mode: str = "lines") -> dict:
    """Replay the demo feed under both configs and write the report; return what it found."""
    from service.config import load_config
    from service.replay.runner import run_all

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    _, config_paths = demo_paths()
    feed, _ = _feed(out, events)
    configs = [load_config(p) for p in config_paths]
    start = time.perf_counter()
    results = run_all([feed], configs, [str(p) for p in config_paths], jobs=min(2, os.cpu_count() or 1), mode=mode)
    report, truth = _finish(out, feed, results)
    return {"feed": str(feed), "truth": truth, "report": str(report), "seconds": time.perf_counter() - start,
            "runs": [r["summary"] for r in results]}


def _finish(out: Path, feed: Path, results: list[dict]) -> tuple[Path, dict]:
    """Mark the scenario's known events in the results and write the outputs; the report's path and the truth."""
    from service.replay.report import DEMO_CAUTION
    from service.replay.runner import write_outputs
    from service.replay.scenario import ground_truth

    # the feed has no repeated ids, so the valid events are the generator's n_events (seed 7 throughout)
    t = ground_truth(results[0]["summary"]["events"])
    truth = {"events": t.n_events, "fault": (t.fault_start, t.fault_stop), "recalibration": t.recalibration_index}
    notes = [{"start": t.fault_start, "stop": t.fault_stop, "label": "faulty gateway (Fahrenheit labelled Celsius)"},
             {"event": t.recalibration_index, "label": "probe recalibration (a real change)"}]
    for r in results:
        r["summary"]["progressive_loss_outside_fault"] = outside_window(r["trace"], t.fault_start, t.fault_stop)
    return write_outputs(out, [feed], results, notes=notes, caution=DEMO_CAUTION), truth


def outside_window(trace: dict, start: int, stop: int) -> float | None:
    """Progressive loss over the monitor checks whose stretch of events misses ``start..stop``.

    The demo knows where its gateway sent wrong labels; a model that declines to chase them pays
    their full loss, so the plain progressive loss favours the model that chases garbage. Outside
    the fault every label is right, and there the figure compares what users care about.
    """
    events, losses = trace.get("event", []), trace.get("progressive_loss", [])
    kept, prev = [], -1
    for ev, loss in zip(events, losses):
        if (ev < start or prev >= stop) and math.isfinite(loss):
            kept.append(loss)
        prev = ev
    return sum(kept) / len(kept) if kept else None


def _fmt(x) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{x:.4g}"


def demo_main(args) -> int:
    """``trimtab demo [--out DIR] [--events N]``: print the verdicts and where the report is."""
    from service.replay.progress import progress_mode

    if args.events is not None and args.events < 1000:
        from models import InvalidSettings

        raise InvalidSettings("the demo needs at least 1000 events", where="--events")
    found = run_demo(args.out, args.events, mode=progress_mode(False))
    t = found["truth"]
    print("trimtab demo: an invented cold-chain van fleet (all data fictional; decision support only)")
    print(f"feed: {found['feed']} ({t['events']:,} events); faulty gateway at events {t['fault'][0]:,}-"
          f"{t['fault'][1]:,}, probe recalibration at event {t['recalibration']:,}")
    for run in found["runs"]:
        h = run["holdout_loss"]
        print(f"\n{run['name']}: {run['verdict']}")
        print(f"  progressive loss {_fmt(run['progressive_loss'])} (outside the gateway fault "
              f"{_fmt(run['progressive_loss_outside_fault'])}); held-out loss at the end raw {_fmt(h['raw'])}, "
              f"averaged {_fmt(h['averaged'])}; {run['rejected']:,} malformed lines rejected; "
              f"{run['events_per_second']:,.0f} events/s")
    print(f"\nreport: {Path(found['report']).resolve()}")
    return 0
