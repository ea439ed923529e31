"""The report's figures, drawn with matplotlib's object API (Agg) into PNG bytes.

pyplot is not used: it keeps figures in a global registry and its import costs a fifth of the
drawing process's start-up, for nothing a page of static plots needs.

Each figure takes a run's thinned series (:func:`service.replay.plotdata.thin_trace`: ``{key: (x,
values)}``). Losses, steps and distances are drawn on log axes when there is anything positive to
draw; an axis with nothing (no held-out events, no check yet) stays linear and says so in words,
because a log axis over no positive value is an error, not an empty plot.
"""

from __future__ import annotations

import io
import textwrap

import numpy as np
from matplotlib import rcParams
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullLocator

__all__ = ["compare_figure", "prepare", "run_figure"]

_ROLLBACK = dict(color="#d95f02", linestyle="--", linewidth=1.0)
_RESTART = dict(color="#7570b3", linestyle="-", linewidth=1.6)
_BASELINE = dict(color="#666666", linestyle=(0, (4, 2)), linewidth=1.1)
_DPI = 100
_EMPTY = (np.zeros(0), np.zeros(0))
_PLAIN = FuncFormatter(lambda v, _: f"{v:g}")
#: Characters per line of a figure's title, wrapped here: matplotlib's own wrapping measures the
#: title word by word at every draw
_TITLE_CHARS = 120
#: Labelled ticks per axis, at most: each tick is several artists built anew for every figure, the
#: largest share of the drawing time once the labels are plain text
_X_TICKS, _Y_TICKS = 7, 5
#: Run figures built ahead by :func:`prepare`, empty, taken by :func:`run_figure`
_SPARE: list[tuple] = []


def _line(ax, xy: tuple, **style) -> bool:
    """Draw one series with its non-positive and missing values as gaps; True if anything showed."""
    x, values = xy
    y = np.where(np.asarray(values) > 0, values, np.nan)
    if not np.isfinite(y).any():
        return False
    ax.plot(x, y, **style)
    return True


def _axis(ax, drawn: bool, missing: str) -> None:
    """Log scale over drawn data; otherwise a linear axis that says what is missing."""
    if drawn:
        ax.set_yscale("log")
        # minor ticks on a log axis are dozens of tick objects per axis, most of the drawing time
        ax.yaxis.set_minor_locator(NullLocator())
        ax.yaxis.set_major_locator(LogLocator(numticks=_Y_TICKS))
        # plain labels ("0.01", "1e-05"): the default powers of ten are typeset with mathtext, which
        # parsed and measured every label anew for each figure (a third of the drawing time)
        ax.yaxis.set_major_formatter(_PLAIN)
    else:
        ax.set_yticks([])
        ax.text(0.5, 0.5, missing, transform=ax.transAxes, ha="center", va="center", fontsize=10, color="#555555")
    ax.grid(True, which="major", alpha=0.3)


def _notes(ax, notes: list[dict], label: bool) -> None:
    """Known facts about the feed: shaded spans (``start``, ``stop``) and dotted lines (``event``)."""
    for note in notes:
        text = note["label"] if label else None
        if "start" in note:
            ax.axvspan(note["start"], note["stop"], color="#fdb863", alpha=0.35, linewidth=0, label=text)
        else:
            ax.axvline(note["event"], color="#555555", linestyle=":", linewidth=1.4, label=text)


def _marks(ax, run: dict, label: bool) -> None:
    """Rollbacks and restarts as one collection of vertical lines each (one artist, however many)."""
    top = ax.get_xaxis_transform()
    for items, name, style in ((run.get("rollbacks") or [], "rollback", _ROLLBACK),
                               (run.get("restarts") or [], "restart", _RESTART)):
        if items:
            ax.vlines([i["event"] for i in items], 0, 1, transform=top, label=name if label else None,
                      colors=style["color"], linestyles=style["linestyle"], linewidths=style["linewidth"])


def _figure(rows: int, height: float, **kw) -> tuple:
    fig = Figure(figsize=(10, height))
    FigureCanvasAgg(fig)
    return fig, fig.subplots(rows, 1, sharex=True, **kw)


def _run_axes() -> tuple:
    """An empty run figure: loss over step size over distance, sharing the events axis."""
    fig, axes = _figure(3, 8.2, height_ratios=[2.2, 1, 1])
    fig.subplots_adjust(left=0.12, right=0.98, top=0.95, bottom=0.07, hspace=0.08)
    return fig, axes


def prepare(runs: int = 1) -> None:
    """Ready the first drawing while there is nothing to draw yet: load the text font and the PNG
    writer, and build ``runs`` empty run figures (a third of a figure's drawing is building its
    axes; none depends on the data)."""
    from matplotlib.font_manager import FontProperties, findfont, get_font
    from PIL import PngImagePlugin  # noqa: F401  (loaded by the first savefig otherwise)

    get_font(findfont(FontProperties()))
    _SPARE.extend(_run_axes() for _ in range(runs))


def _png(fig) -> bytes:
    buf = io.BytesIO()
    # zlib level 1: the plots are flat colours, which compress well at any level, and level 6 took
    # a fifth of the drawing time
    fig.savefig(buf, format="png", dpi=_DPI, pil_kwargs={"compress_level": 1})
    return buf.getvalue()


def _events_axis(ax) -> None:
    ax.set_xlabel("events replayed (count)")
    ax.xaxis.set_major_locator(MaxNLocator(nbins=_X_TICKS))  # shared by the figure's axes
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: f"{x:,.0f}"))


def _panel(ax, run: dict, notes: list[dict], series, *, color: str, label: str, empty: str, ylabel: str) -> None:
    """One series of a run on its own axis, with the feed's notes and the run's rollbacks and restarts."""
    drawn = _line(ax, series, color=color, linewidth=1.2, label=label)
    _notes(ax, notes, label=False)
    _marks(ax, run, label=False)
    _axis(ax, drawn, empty)
    ax.set_ylabel(ylabel)


def run_figure(run: dict, plot: dict, loss_unit: str, notes: list[dict]) -> bytes:
    """Loss (model and baseline), step size and iterate distance of one run, as PNG bytes."""
    get = lambda key: plot.get(key, _EMPTY)  # noqa: E731
    fig, axes = _SPARE.pop() if _SPARE else _run_axes()
    ax = axes[0]
    drawn = [_line(ax, get("progressive_loss"), color="#bbbbbb", linewidth=0.9,
                   label="progressive loss (serving iterate, before learning)"),
             _line(ax, get("baseline_progressive"), label="baseline, progressive (running mean / base rate)",
                   **_BASELINE),
             _line(ax, get("holdout_raw"), color="#1b9e77", linewidth=1.2, label="held-out loss, raw iterate"),
             _line(ax, get("holdout_avg"), color="#e7298a", linewidth=1.6, label="held-out loss, averaged iterate"),
             _line(ax, get("baseline_holdout"), color="#000000", linestyle=":", linewidth=1.2,
                   label="baseline on the held-out window")]
    _notes(ax, notes, label=True)
    _marks(ax, run, label=True)
    _axis(ax, any(drawn), "no loss recorded: no monitor check ran in this run")
    ax.set_ylabel(f"loss ({loss_unit})")
    ax.set_title(textwrap.fill(f"{run['name']}: {run['verdict']}", _TITLE_CHARS), fontsize=10, loc="left")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="upper right", fontsize=8, framealpha=0.9)
    if not any(drawn[2:]):
        ax.text(0.01, 0.02, "no held-out loss: this run held no events out (monitor off or holdout_share = 0)",
                transform=ax.transAxes, fontsize=8, color="#555555")
    _panel(axes[1], run, notes, get("step"), color="#1f78b4", label="step size of the last update",
           empty="no step recorded", ylabel="step size \u03b7\n(model coordinates)")
    ax = axes[2]
    _panel(ax, run, notes, get("distance"), color="#333333", label="\u2016raw \u2212 averaged\u2016",
           empty="the raw and averaged iterates never differed",
           ylabel="\u2016w_raw \u2212 w_avg\u2016\u2082\n(model coordinates)")
    _events_axis(ax)
    return _png(fig)


def compare_figure(runs: list[dict], plots: list[dict], loss_unit: str, notes: list[dict]) -> bytes:
    """Progressive and held-out loss of every run (and each run's baseline, dashed), as PNG bytes."""
    fig, axes = _figure(2, 6.4)
    fig.subplots_adjust(left=0.12, right=0.98, top=0.94, bottom=0.09, hspace=0.1)
    for k, ax in enumerate(axes):
        _notes(ax, notes, label=k == 0)
    colors = rcParams["axes.prop_cycle"].by_key()["color"]
    drawn = [False, False]
    for k, (run, plot) in enumerate(zip(runs, plots)):
        color = colors[k % len(colors)]
        get = lambda key: plot.get(key, _EMPTY)  # noqa: E731
        drawn[0] |= _line(axes[0], get("progressive_loss"), color=color, linewidth=1.2, label=run["name"])
        _line(axes[0], get("baseline_progressive"), color=color, linestyle=(0, (4, 2)), linewidth=0.9,
              label=f"{run['name']}: baseline")
        drawn[1] |= _line(axes[1], get("holdout_serving"), color=color, linewidth=1.2, label=run["name"])
        _line(axes[1], get("baseline_holdout"), color=color, linestyle=(0, (4, 2)), linewidth=0.9,
              label=f"{run['name']}: baseline")
    axes[0].set_ylabel(f"progressive loss\n({loss_unit})")
    axes[0].set_title("progressive loss between checks: each event scored by the serving iterate before it "
                      "is learned; dashed: the baseline", fontsize=10, loc="left")
    axes[1].set_ylabel(f"held-out loss of the\nserving iterate ({loss_unit})")
    _axis(axes[0], drawn[0], "no progressive loss recorded: no monitor check ran")
    _axis(axes[1], drawn[1], "no held-out loss: no run held events out")
    for ax in axes:
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="upper right", fontsize=8)
    _events_axis(axes[1])
    return _png(fig)
