"""The report's chart writer: well-formed SVG (parsed by the standard library's XML parser), gaps where
a value is missing or not positive on a log axis, ticks at 1, 2 or 5 times a power of ten, and any
text escaped."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np

from service.replay.svgchart import Line, Mark, Panel, Span, _nice_ticks, chart

SVG = "{http://www.w3.org/2000/svg}"


def test_gaps_split_a_line_where_values_are_missing_or_not_positive():
    x = np.arange(10.0)
    y = np.array([1, 2, np.nan, 3, 4, 0, -1, 5, 6, 7.0])
    svg = ET.fromstring(chart([Panel(200, "loss", [Line(x, y, color="#123456")])], title="t", xlabel="events"))
    (path,) = [p for p in svg.iter(f"{SVG}path")]
    d = path.get("d")
    assert d.count("M") == 3 and d.count("L") == 4  # three stretches: 1-2, 3-4, 5-7 (7 points)


def test_ticks_are_one_two_or_five_times_a_power_of_ten():
    for lo, hi in ((0, 400_000), (0, 103_680), (12_345, 98_765), (0, 7), (0.5, 1.5)):
        ticks = _nice_ticks(lo, hi, 7)
        assert 2 <= len(ticks) <= 7 and lo <= ticks[0] and ticks[-1] <= hi
        step = ticks[1] - ticks[0]
        mantissa = step / 10 ** np.floor(np.log10(step))
        assert any(abs(mantissa - m) < 1e-9 for m in (1, 2, 5))


def test_text_is_escaped_and_an_empty_panel_says_what_is_missing():
    name = "run <b>&'\"</b>"
    panels = [Panel(200, "loss\n(unit)", [Line(np.arange(3.0), np.ones(3), color="#000", label=name)],
                    [Mark([1.0], color="#d95f02", label="rollback")], [Span(0.5, 1.5, label="fault")], legend=True),
              Panel(100, "step", [Line(np.arange(3.0), np.zeros(3), color="#000")], missing="no step recorded")]
    svg = ET.fromstring(chart(panels, title=name, xlabel="events"))
    texts = [t.text for t in svg.iter(f"{SVG}text")]
    assert texts.count(name) == 2  # the title and the legend, read back unharmed
    assert "no step recorded" in texts and "rollback" in texts and "fault" in texts
    assert [t.text for t in svg.iter(f"{SVG}tspan")] == ["loss", "(unit)", "step"]
