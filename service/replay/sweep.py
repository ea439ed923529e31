"""Config sweeps: a grid of configs derived from a base, replayed on Dask, ranked, kept.

``trimtab sweep FEED... -c BASE --vary KEY=V1,V2 [--vary ...] --out DIR`` derives one config per
combination of the varied values (:mod:`service.replay.sweep_grid`, every config validated before
anything runs), runs each through the replay engine on Dask (:mod:`service.replay.sweep_dask`: a
local cluster of ``--workers`` processes, or ``--cluster ADDRESS``) and writes:

* ``DIR/sweep.json``: the ranking (held-out loss of the serving iterate at the end of the feed,
  then progressive loss), each run's varied values, verdict, rollbacks, restarts, digest and
  files; failed runs with their reasons;
* ``DIR/sweep.html``: the ranking and the best runs' curves, plots embedded in the page;
* ``DIR/summary.json`` and ``DIR/<run>/model.json`` as ``trimtab replay`` writes them;
* ``DIR/<run>/config.toml`` (the derived config, ready for ``trimtab serve -c``),
  ``DIR/<run>/state.bin`` (the final engine state, :meth:`service.engine.Engine.to_bytes`) and
  ``DIR/<run>/state.json`` (its SHA-256, the model's ``state_digest``, the format).

Progress goes to stderr, the ranking to stdout. Exit status 1 when a run failed (the others are
still written), 2 for a bad grid, 0 otherwise.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import urllib.parse
from pathlib import Path

from models import InvalidSettings

from service.config import load_config
from service.replay.sweep_grid import build_grid, to_toml

__all__ = ["STATE_FORMAT", "rank", "sweep_main", "write_sweep"]

#: How ``state.bin`` is encoded until the checkpoint format reads engine states itself.
STATE_FORMAT = "trimtab checkpoint format (docs/checkpoint-format.md): Engine.to_bytes(); load with Engine.from_bytes"
#: Varied keys under which the runs' losses are not measured in the same units or on the same events.
_INCOMPARABLE = ("model.task", "model.loss", "model.huber_delta", "monitor.holdout_share", "monitor.enabled")


def _serving_holdout(summary: dict) -> float | None:
    value = (summary.get("holdout_loss") or {}).get(summary.get("serving"))
    return value if value is not None and math.isfinite(value) else None


def _order(value: float | None) -> tuple:
    return (value is None, value if value is not None else 0.0)


def rank(outcomes: list) -> list[dict]:
    """Completed runs, best first: held-out loss of the serving iterate, then progressive loss.

    Runs without a held-out loss (monitor off, nothing held out) follow the others, by progressive
    loss. Each row also carries its rank by progressive loss alone.
    """
    rows = []
    for out in outcomes:
        if out.result is None:
            continue
        s = out.result["summary"]
        rows.append({
            "name": out.run.name, "varied": out.run.varied, "holdout_loss": _serving_holdout(s),
            "holdout_loss_raw_averaged": s.get("holdout_loss"), "progressive_loss": s.get("progressive_loss"),
            "serving": s.get("serving"), "verdict": s.get("verdict"), "rollbacks": len(s.get("rollbacks") or []),
            "restarts": len(s.get("restarts") or []), "events": s.get("events"), "learned": s.get("learned"),
            "state_digest": s.get("state_digest"), "events_per_second": s.get("events_per_second"),
            "attempts": out.attempts, "lost_workers": out.lost, "worker": out.result.get("worker"),
            "parsed": out.result.get("parsed"),
        })
    by_progressive = sorted(rows, key=lambda r: (_order(r["progressive_loss"]), r["name"]))
    for k, row in enumerate(by_progressive, 1):
        row["rank_progressive"] = k
    rows.sort(key=lambda r: (_order(r["holdout_loss"]), _order(r["progressive_loss"]), r["name"]))
    for k, row in enumerate(rows, 1):
        row["rank"] = k
    return rows


def _keep_run(folder: Path, out) -> dict:
    """Write a run's config and (when it completed) its final state; the files' names and digest."""
    folder.mkdir(parents=True, exist_ok=True)
    header = (f"Run {out.run.name} of a trimtab sweep; varied: "
              + ", ".join(f"{k} = {json.dumps(v)}" for k, v in out.run.varied.items()))
    (folder / "config.toml").write_text(to_toml(out.run.config, header), encoding="utf-8")
    files = {"config_file": f"{folder.name}/config.toml"}
    if out.result is not None:
        blob = out.result["state"]
        (folder / "state.bin").write_bytes(blob)
        sha = hashlib.sha256(blob).hexdigest()
        meta = {"format": STATE_FORMAT, "sha256": sha, "bytes": len(blob),
                "state_digest": out.result["summary"]["state_digest"], "config": "config.toml"}
        (folder / "state.json").write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
        files.update(state_file=f"{folder.name}/state.bin", state_sha256=sha)
    return files


def _notes(axes: dict) -> list[str]:
    notes = []
    mixed = [k for k in axes if k in _INCOMPARABLE]
    if mixed:
        notes.append("the losses of these runs are not directly comparable: " + ", ".join(mixed)
                     + " changes the loss's units or the held-out events; compare within equal values")
    return notes


def write_sweep(out: str | Path, feeds: list[str], outcomes: list, meta: dict, *, report: bool = True) -> Path:
    """Write every run's files, ``summary.json``, ``sweep.json`` and (unless ``report=False``) ``sweep.html``."""
    from service.replay.report import CAUTION
    from service.replay.runner import write_outputs

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    done = [o for o in outcomes if o.result is not None]
    if done:
        write_outputs(out, feeds, [o.result for o in done], report=False)
    files = {o.run.name: _keep_run(out / o.run.name, o) for o in outcomes}
    ranking = rank(outcomes)
    for row in ranking:
        row.update(files[row["name"]])
    failed = [{"name": o.run.name, "varied": o.run.varied, "reason": o.error, "attempts": o.attempts,
               "lost_workers": o.lost, **files[o.run.name]} for o in outcomes if o.result is None]
    sweep = {"feeds": list(feeds), **meta, "runs": len(outcomes), "completed": len(done), "failed_runs": len(failed),
             "ranked_by": "held-out loss of the serving iterate at the end of the feed, then progressive loss",
             "ranking": ranking, "failed": failed, "notes": _notes(meta.get("vary", {})), "caution": CAUTION}
    (out / "sweep.json").write_text(json.dumps(sweep, indent=2) + "\n", encoding="utf-8")
    if report and ranking:
        from service.replay.sweep_report import write_sweep_report

        by_name = {o.run.name: o.result for o in done}
        return write_sweep_report(out, sweep, by_name)
    return out / "sweep.json"


def _feed_ref(feed: str) -> str:
    """A local feed checked and made absolute (workers do not share our working folder); a URL as given."""
    from service.feeds.files import detect_format

    if urllib.parse.urlsplit(feed).scheme in ("http", "https", "file"):
        return feed
    detect_format(feed)
    return str(Path(feed).resolve())


def _print_ranking(sweep_path: Path, outcomes: list, out: Path) -> None:
    ranking = rank(outcomes)
    for row in ranking:
        held = "-" if row["holdout_loss"] is None else f"{row['holdout_loss']:.5g}"
        prog = "-" if row["progressive_loss"] is None else f"{row['progressive_loss']:.5g}"
        print(f"{row['rank']:>3}. {row['name']}: held-out loss {held}, progressive loss {prog}, "
              f"digest {row['state_digest'][:16]}")
        print(f"     {row['verdict']}")
    for o in outcomes:
        if o.result is None:
            print(f"  failed: {o.run.name}: {o.error}")
    if ranking:
        print(f"best: {ranking[0]['name']} (config {out / ranking[0]['name'] / 'config.toml'}, "
              f"state {out / ranking[0]['name'] / 'state.bin'})")
    print(f"wrote {sweep_path}")


def sweep_main(args) -> int:
    """``trimtab sweep``: validate the whole grid, run it on Dask, rank and write the results."""
    from service.replay.sweep_dask import execute

    if args.cluster and args.workers is not None:
        raise InvalidSettings("--workers sizes the local cluster; a --cluster has its own workers", where="--workers")
    workers = args.workers if args.workers is not None else (os.cpu_count() or 1)
    if workers < 1:
        raise InvalidSettings("must be at least 1", where="--workers")
    base = load_config(args.config)
    grid = build_grid(base, args.vary)
    feeds = [_feed_ref(f) for f in args.feeds]
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InvalidSettings("exists and is not a folder", where=str(out))
    outcomes, executor = execute(feeds, grid, address=args.cluster, workers=min(workers, len(grid)),
                                 quiet=args.no_progress, reuse=not args.parse_each_run)
    meta = {"base": str(args.config), "vary": _axes(grid), "executor": executor}
    written = write_sweep(out, feeds, outcomes, meta, report=not args.no_report)
    _print_ranking(written, outcomes, out)
    return 1 if any(o.result is None for o in outcomes) else 0


def _axes(grid: list) -> dict:
    axes: dict[str, list] = {}
    for run in grid:
        for key, value in run.varied.items():
            if value not in axes.setdefault(key, []):
                axes[key].append(value)
    return axes
