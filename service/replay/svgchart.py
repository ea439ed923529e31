"""Charts written as inline SVG: panels of lines over one shared events axis, with no plotting library.

A report's figures are a few panels stacked over the events replayed: lines (with gaps where a value
is missing or, on a log axis, not positive), vertical marks (rollbacks, restarts, known moments),
shaded spans (known faults), a legend, a title and axis labels. Writing them as SVG text takes a few
milliseconds and no process of its own; the page stays one self-contained file, its text searchable
and its lines sharp at any zoom.

Scales: the events axis is linear, with at most :data:`X_TICKS` labelled ticks at 1, 2 or 5 times a
power of ten. A panel is on a log axis when it has anything positive to draw, with labelled ticks at
powers of ten (every second, third... power when there are many decades, at most :data:`Y_TICKS`);
otherwise it stays empty and says in words what is missing.
"""

from __future__ import annotations

import html
import math
import textwrap
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Line", "Mark", "Panel", "Span", "Stroke", "chart"]

X_TICKS, Y_TICKS = 7, 5
_LEFT, _RIGHT, _TOP, _BOTTOM, _GAP = 96, 14, 34, 46, 10  # margins and the space between panels, px
_TITLE_CHARS = 120
_FONT = "system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif"


@dataclass(kw_only=True)
class Stroke:
    """How a line is drawn: ``dash`` is an SVG dash pattern (``"6 3"``); ``label`` its legend entry."""

    color: str
    width: float = 1.2
    dash: str | None = None
    label: str | None = None


@dataclass
class Line(Stroke):
    """A series ``(x, y)`` drawn as a polyline."""

    x: np.ndarray
    y: np.ndarray


@dataclass
class Mark(Stroke):
    """Vertical lines at events ``at``, one style and one legend entry for all of them."""

    at: list[float]


@dataclass
class Span:
    """A shaded stretch of events ``start..stop``."""

    start: float
    stop: float
    color: str = "#fdb863"
    opacity: float = 0.35
    label: str | None = None


@dataclass
class Panel:
    """One axis: its lines, marks and spans; ``ylabel`` may hold a line break; ``missing`` is said in the
    middle when nothing positive is drawn; ``note`` is a small line at the bottom left."""

    height: int
    ylabel: str
    lines: list[Line] = field(default_factory=list)
    marks: list[Mark] = field(default_factory=list)
    spans: list[Span] = field(default_factory=list)
    missing: str = "nothing to draw"
    note: str | None = None
    legend: bool = False


def chart(panels: list[Panel], *, title: str, xlabel: str, width: int = 1000) -> str:
    """The ``<svg>`` element of ``panels`` stacked top to bottom over one events axis."""
    lo, hi = _x_range(panels)
    plot_w = width - _LEFT - _RIGHT
    sx = lambda v: _LEFT + (np.asarray(v, dtype=float) - lo) / (hi - lo) * plot_w  # noqa: E731
    lines = textwrap.wrap(title, _TITLE_CHARS) or [""]
    top = _TOP + 15 * (len(lines) - 1)
    height = top + sum(p.height for p in panels) + _GAP * (len(panels) - 1) + _BOTTOM
    out = [f"<svg xmlns='http://www.w3.org/2000/svg' viewBox='0 0 {width} {height}' width='{width}' "
           f"height='{height}' font-family='{_FONT}' font-size='11' role='img'>",
           f"<rect width='{width}' height='{height}' fill='#ffffff'/>"]
    out += [f"<text x='{_LEFT}' y='{18 + 15 * k}' font-size='12.5'>{_esc(t)}</text>" for k, t in enumerate(lines)]
    xticks = _nice_ticks(lo, hi, X_TICKS)
    y = top
    for k, panel in enumerate(panels):
        out.append(_panel(panel, y, sx, (lo, hi), xticks, width, last=k == len(panels) - 1))
        y += panel.height + _GAP
    y -= _GAP
    out += [f"<text x='{sx(t):.1f}' y='{y + 16}' text-anchor='middle'>{t:,.0f}</text>" for t in xticks]
    out.append(f"<text x='{_LEFT + plot_w / 2:.1f}' y='{y + 36}' text-anchor='middle' font-size='12'>"
               f"{_esc(xlabel)}</text></svg>")
    return "".join(out)


def _x_range(panels: list[Panel]) -> tuple[float, float]:
    xs = [v for p in panels for line in p.lines for v in (np.nanmin(line.x), np.nanmax(line.x)) if len(line.x)]
    xs += [v for p in panels for m in p.marks for v in m.at] + [v for p in panels for s in p.spans
                                                                for v in (s.start, s.stop)]
    lo, hi = (min(xs), max(xs)) if xs else (0.0, 1.0)
    return (lo, hi) if hi > lo else (lo - 0.5, hi + 0.5)


def _y_range(panel: Panel) -> tuple[float, float] | None:
    """Powers of ten around every positive, finite value of the panel's lines (``None``: none)."""
    values = [y[(y > 0) & np.isfinite(y)] for y in (np.asarray(line.y, dtype=float) for line in panel.lines)]
    values = [v for v in values if len(v)]
    if not values:
        return None
    lo, hi = min(float(v.min()) for v in values), max(float(v.max()) for v in values)
    a, b = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
    return float(a), float(b if b > a else a + 1)


def _panel(panel: Panel, top: float, sx, xr: tuple[float, float], xticks: list[float], width: int,
           last: bool) -> str:
    h, right = panel.height, width - _RIGHT
    out = [f"<g><rect x='{_LEFT}' y='{top}' width='{right - _LEFT}' height='{h}' fill='none' stroke='#999'/>"]
    for s in panel.spans:
        x0, x1 = sx(s.start), sx(s.stop)
        out.append(f"<rect x='{x0:.1f}' y='{top}' width='{max(x1 - x0, 1.0):.1f}' height='{h}' fill='{s.color}' "
                   f"fill-opacity='{s.opacity}'/>")
    out += [f"<line x1='{sx(t):.1f}' x2='{sx(t):.1f}' y1='{top}' y2='{top + h}' stroke='#ddd'/>" for t in xticks]
    yr = _y_range(panel)
    if yr is None:
        out.append(f"<text x='{(_LEFT + right) / 2:.1f}' y='{top + h / 2:.1f}' text-anchor='middle' "
                   f"font-size='12' fill='#555'>{_esc(panel.missing)}</text>")
    else:
        a, b = yr
        sy = lambda v: top + h - (np.log10(v) - a) / (b - a) * h  # noqa: E731
        step = max(1, math.ceil((b - a + 1) / Y_TICKS))
        for e in range(int(a), int(b) + 1, step):
            yy = float(sy(10.0 ** e))
            out.append(f"<line x1='{_LEFT}' x2='{right}' y1='{yy:.1f}' y2='{yy:.1f}' stroke='#ddd'/>"
                       f"<text x='{_LEFT - 5}' y='{yy + 4:.1f}' text-anchor='end'>{10.0 ** e:g}</text>")
        out += [_path(line, sx, sy) for line in panel.lines]
    for m in panel.marks:
        dash = f" stroke-dasharray='{m.dash}'" if m.dash else ""
        out += [f"<line x1='{sx(v):.1f}' x2='{sx(v):.1f}' y1='{top}' y2='{top + h}' stroke='{m.color}' "
                f"stroke-width='{m.width}'{dash}/>" for v in m.at]
    if panel.note:
        out.append(f"<text x='{_LEFT + 6}' y='{top + h - 6}' fill='#555'>{_esc(panel.note)}</text>")
    label = panel.ylabel.split("\n")
    mid = top + h / 2
    out.append(f"<text transform='translate({_LEFT - 58},{mid:.1f}) rotate(-90)' text-anchor='middle' "
               f"font-size='11.5'>" + "".join(f"<tspan x='0' dy='{0 if k == 0 else 13}'>{_esc(t)}</tspan>"
                                              for k, t in enumerate(label)) + "</text>")
    if panel.legend:
        out.append(_legend(panel, top, right))
    return "".join(out) + "</g>"


def _path(line: Line, sx, sy) -> str:
    """One ``<path>``: a move to the first point after every gap (missing or not positive)."""
    x, y = np.asarray(line.x, dtype=float), np.asarray(line.y, dtype=float)
    ok = (y > 0) & np.isfinite(y) & np.isfinite(x)
    if not ok.any():
        return ""
    px, py = sx(x[ok]), sy(y[ok])
    starts = np.flatnonzero(np.diff(np.flatnonzero(ok)) > 1) + 1  # first point of each stretch after a gap
    cmd = np.full(len(px), "L")
    cmd[0], cmd[starts] = "M", "M"
    d = "".join(f"{c}{a:.1f} {b:.1f}" for c, a, b in zip(cmd, px, py))
    dash = f" stroke-dasharray='{line.dash}'" if line.dash else ""
    return (f"<path d='{d}' fill='none' stroke='{line.color}' stroke-width='{line.width}' "
            f"stroke-linejoin='round'{dash}/>")


def _legend(panel: Panel, top: float, right: float) -> str:
    """The panel's labelled lines, marks and spans in a box at its top right."""
    items = [(x.label, x) for x in (*panel.lines, *panel.marks, *panel.spans) if x.label]
    if not items:
        return ""
    w = 40 + 5.8 * max(len(label) for label, _ in items)
    x0, y0 = right - w - 8, top + 8
    out = [f"<rect x='{x0:.1f}' y='{y0}' width='{w:.1f}' height='{8 + 15 * len(items)}' fill='#fff' "
           f"fill-opacity='0.9' stroke='#ccc'/>"]
    for k, (label, item) in enumerate(items):
        yy = y0 + 12 + 15 * k
        if isinstance(item, Span):
            out.append(f"<rect x='{x0 + 8:.1f}' y='{yy - 5}' width='22' height='9' fill='{item.color}' "
                       f"fill-opacity='{item.opacity}'/>")
        else:
            dash = f" stroke-dasharray='{item.dash}'" if item.dash else ""
            out.append(f"<line x1='{x0 + 8:.1f}' x2='{x0 + 30:.1f}' y1='{yy}' y2='{yy}' stroke='{item.color}' "
                       f"stroke-width='{max(item.width, 1.2)}'{dash}/>")
        out.append(f"<text x='{x0 + 36:.1f}' y='{yy + 4}' font-size='10.5'>{_esc(label)}</text>")
    return "".join(out)


def _nice_ticks(lo: float, hi: float, most: int) -> list[float]:
    """At most ``most`` ticks inside ``lo..hi`` at a step of 1, 2 or 5 times a power of ten."""
    raw = (hi - lo) / max(most - 1, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step) * step
    return [first + k * step for k in range(int((hi - first) // step) + 1)]


def _esc(text: str) -> str:
    return html.escape(text, quote=True)
