"""The report's figures, as inline SVG (:mod:`service.replay.svgchart`).

Each figure takes a run's thinned series (:func:`service.replay.plotdata.thin_trace`: ``{key: (x,
values)}``). Losses, steps and distances are drawn on log axes when there is anything positive to
draw; an axis with nothing (no held-out events, no check yet) stays empty and says so in words.
"""

from __future__ import annotations

import numpy as np

from service.replay.svgchart import Line, Mark, Panel, Span, chart

__all__ = ["compare_figure", "run_figure"]

_EMPTY = (np.zeros(0), np.zeros(0))
#: one colour per run in the comparison (ColorBrewer "Dark2", then again)
_RUN_COLORS = ("#1b9e77", "#d95f02", "#7570b3", "#e7298a", "#66a61e", "#e6ab02", "#a6761d", "#666666")
_BASELINE_DASH = "6 3"
_EVENTS = "events replayed (count)"


def _line(xy: tuple, color: str, width: float = 1.2, dash: str | None = None, label: str | None = None) -> Line:
    return Line(np.asarray(xy[0], dtype=float), np.asarray(xy[1], dtype=float), color=color, width=width, dash=dash,
                label=label)


def _feed_notes(notes: list[dict], label: bool) -> tuple[list[Span], list[Mark]]:
    """Known facts about the feed: shaded spans (``start``, ``stop``) and dotted lines (``event``)."""
    spans = [Span(n["start"], n["stop"], label=n["label"] if label else None) for n in notes if "start" in n]
    marks = [Mark([n["event"]], color="#555555", width=1.4, dash="1.5 2.5", label=n["label"] if label else None)
             for n in notes if "start" not in n]
    return spans, marks


def _run_marks(run: dict, label: bool) -> list[Mark]:
    """Rollbacks and restarts, one mark (and legend entry) each kind."""
    out = []
    for items, name, color, width, dash in ((run.get("rollbacks") or [], "rollback", "#d95f02", 1.0, "5 3"),
                                            (run.get("restarts") or [], "restart", "#7570b3", 1.6, None)):
        if items:
            out.append(Mark([i["event"] for i in items], color=color, width=width, dash=dash,
                            label=name if label else None))
    return out


def run_figure(run: dict, plot: dict, loss_unit: str, notes: list[dict]) -> str:
    """Loss (model and baseline), step size and iterate distance of one run, as an ``<svg>`` element."""
    get = lambda key: plot.get(key, _EMPTY)  # noqa: E731
    spans, moments = _feed_notes(notes, label=True)
    lines = [_line(get("progressive_loss"), "#bbbbbb", 0.9, label="progressive loss (serving iterate, before learning)"),
             _line(get("baseline_progressive"), "#666666", 1.1, _BASELINE_DASH,
                   "baseline, progressive (running mean / base rate)"),
             _line(get("holdout_raw"), "#1b9e77", 1.2, label="held-out loss, raw iterate"),
             _line(get("holdout_avg"), "#e7298a", 1.6, label="held-out loss, averaged iterate"),
             _line(get("baseline_holdout"), "#000000", 1.2, "1.5 2.5", "baseline on the held-out window")]
    held = any(((line.y > 0) & np.isfinite(line.y)).any() for line in lines[2:])
    loss = Panel(300, f"loss ({loss_unit})", lines, moments + _run_marks(run, label=True), spans,
                 missing="no loss recorded: no monitor check ran in this run", legend=True,
                 note=None if held else "no held-out loss: this run held no events out (monitor off or "
                                        "holdout_share = 0)")
    quiet_spans, quiet_moments = _feed_notes(notes, label=False)
    marks = quiet_moments + _run_marks(run, label=False)
    step = Panel(140, "step size \u03b7\n(model coordinates)", [_line(get("step"), "#1f78b4")], marks, quiet_spans,
                 missing="no step recorded")
    distance = Panel(140, "\u2016w_raw \u2212 w_avg\u2016\u2082\n(model coordinates)",
                     [_line(get("distance"), "#333333")], marks, quiet_spans,
                     missing="the raw and averaged iterates never differed")
    return chart([loss, step, distance], title=f"{run['name']}: {run['verdict']}", xlabel=_EVENTS)


def compare_figure(runs: list[dict], plots: list[dict], loss_unit: str, notes: list[dict]) -> str:
    """Progressive and held-out loss of every run (and each run's baseline, dashed), as an ``<svg>`` element."""
    panels = []
    for k, (key, base, ylabel, missing) in enumerate((
            ("progressive_loss", "baseline_progressive", f"progressive loss\n({loss_unit})",
             "no progressive loss recorded: no monitor check ran"),
            ("holdout_serving", "baseline_holdout", f"held-out loss of the\nserving iterate ({loss_unit})",
             "no held-out loss: no run held events out"))):
        lines = []
        for j, (run, plot) in enumerate(zip(runs, plots)):
            color = _RUN_COLORS[j % len(_RUN_COLORS)]
            lines.append(_line(plot.get(key, _EMPTY), color, 1.2, label=run["name"]))
            lines.append(_line(plot.get(base, _EMPTY), color, 0.9, _BASELINE_DASH, f"{run['name']}: baseline"))
        spans, moments = _feed_notes(notes, label=k == 0)
        panels.append(Panel(250, ylabel, lines, moments, spans, missing=missing, legend=True))
    return chart(panels, title="progressive loss between checks: each event scored by the serving iterate before "
                               "it is learned; dashed: the baseline", xlabel=_EVENTS)
