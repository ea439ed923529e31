"""The replay report: one HTML page that opens from disk, with its plots inline and plain-words verdicts.

The page is parsed with Python's ``html.parser``: no script, nothing fetched from elsewhere, and every
figure an inline ``<svg>`` (W3C, "Scalable Vector Graphics (SVG) 1.1", 2011) that parses as XML on
its own, with lines that carry many points, so a blank, broken or missing figure fails. The report
must render in every shape a run can take: with the monitor off, with ``holdout_share = 0``, with no
held-out event at all, and with one config.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

from service.cli import main
import pytest

from service.replay.report import CAUTION, DEMO_CAUTION, verdict
from service.replay.scenario import write_ndjson

ROOT = Path(__file__).resolve().parents[3]
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"
UNGUARDED = ROOT / "replay_data" / "configs" / "unguarded.toml"
SVG = "{http://www.w3.org/2000/svg}"


class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.images, self.links, self.scripts, self.text, self.figures = [], [], 0, [], []
        self._svg_depth = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src"))
        if tag in ("a", "link") and a.get("href"):
            self.links.append(a["href"])
        if tag == "script":
            self.scripts += 1
        if tag == "figure":
            self.figures.append(a.get("aria-label"))
        self._svg_depth += tag == "svg"

    def handle_endtag(self, tag):
        self._svg_depth -= tag == "svg"

    def handle_data(self, data):
        if not self._svg_depth:  # the page's words, not the figures' tick labels
            self.text.append(data)


def svg_figures(html_text: str) -> list[ET.Element]:
    """Every inline ``<svg>...</svg>`` of a page, parsed as XML on its own."""
    out, at = [], 0
    while (start := html_text.find("<svg", at)) >= 0:
        end = html_text.index("</svg>", start) + len("</svg>")
        out.append(ET.fromstring(html_text[start:end]))
        at = end
    return out


def path_points(d: str) -> np.ndarray:
    """The points of an SVG path made of ``M`` and ``L`` commands, as an ``(n, 2)`` array."""
    return np.array([[float(v) for v in part.split()] for part in d.replace("M", "|").replace("L", "|").split("|")
                     if part.strip()])


def check_report(folder: Path, names: list[str], caution: str = CAUTION, min_points: int = 20) -> _Page:
    """The report in ``folder`` opens offline; every figure is inline SVG with a line of at least
    ``min_points`` points (a run records one per monitor check)."""
    html_text = (folder / "report.html").read_text(encoding="utf-8")
    page = _Page()
    page.feed(html_text)
    assert page.scripts == 0 and not page.images and not any("://" in u for u in page.links)
    figures = svg_figures(html_text)
    assert len(figures) == len(page.figures) == len(names) + (1 if len(names) > 1 else 0)
    assert all(page.figures)  # each with its text alternative
    for svg in figures:
        assert svg.tag == f"{SVG}svg" and float(svg.get("width")) >= 900
        lines = [path_points(p.get("d")) for p in svg.iter(f"{SVG}path")]
        assert lines and max(len(p) for p in lines) >= min_points  # ink, not a blank canvas
        assert len([t for t in svg.iter(f"{SVG}text") if t.text]) > 10  # ticks, labels, legend
    text = " ".join(page.text)
    assert caution in text
    for name in names:
        assert name in text
    return page


def test_verdicts_say_what_happened_in_plain_words():
    assert verdict({"rollbacks": [], "restarts": [], "serving": "averaged"}) == (
        "stable: no rollbacks or restarts; serving the averaged iterate")
    text = verdict({"rollbacks": [{"event": 31_608}, {"event": 32_398}], "restarts": [{"event": 57_800}],
                    "serving": "raw"})
    assert text == ("rolled back 2 times at events 31,608, 32,398; restarted at event 57,800 after a change; "
                    "serving the raw iterate")
    many = verdict({"rollbacks": [{"event": k} for k in range(9)], "restarts": [], "serving": "averaged"})
    assert "and 3 more" in many


def test_report_of_two_runs_opens_offline_with_plots_table_and_verdicts(tmp_path):
    """A replay of a small generated feed under both demo configs gives a complete report."""
    feed = tmp_path / "feed.ndjson.gz"
    write_ndjson(feed, 15_000, seed=8)
    out = tmp_path / "out"
    assert main(["replay", str(feed), "-c", str(GUARDED), "-c", str(UNGUARDED), "--out", str(out),
                 "--no-progress", "--jobs", "1"]) == 0
    page = check_report(out, ["guarded", "unguarded"])
    runs = json.loads((out / "summary.json").read_text())["runs"]
    text = " ".join(page.text)
    for run in runs:
        assert run["verdict"] in text
        assert run["state_digest"][:16] in (out / "report.html").read_text()
    assert "progressive loss" in text and "certificate" in text


def _config(tmp_path: Path, name: str, *, replace: dict[str, str] | None = None, add: str = "") -> Path:
    """The guarded demo config under another name, with lines replaced and ``[monitor]`` keys added."""
    text = GUARDED.read_text().replace('name = "guarded"', f'name = "{name}"')
    for old, new in (replace or {}).items():
        assert old in text
        text = text.replace(old, new)
    text = text.replace("[monitor]\n", f"[monitor]\n{add}")
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("case", ["monitor_off", "holdout_share_0", "no_held_out_event", "one_config"])
def test_report_renders_one_run_in_every_shape(tmp_path, case):
    """The report renders with its images embedded for a single config, whether the run holds events out
    or not (before, ``holdout_share = 0`` crashed on a log axis with no positive value)."""
    n = 300 if case == "no_held_out_event" else 6_000
    feed = tmp_path / "feed.ndjson"
    write_ndjson(feed, n, seed=11)
    variants = {"monitor_off": {"add": "enabled = false\n"},
                "holdout_share_0": {"replace": {"holdout_share = 0.05": "holdout_share = 0.0"}},
                "no_held_out_event": {"replace": {"holdout_share = 0.05": "holdout_share = 0.0005"}},
                "one_config": {}}
    config = _config(tmp_path, case.replace("_", "-"), **variants[case])
    out = tmp_path / "out"
    assert main(["replay", str(feed), "-c", str(config), "--out", str(out), "--no-progress"]) == 0
    run = json.loads((out / "summary.json").read_text())["runs"][0]
    assert (run["held_out"] > 0) == (case == "one_config")
    assert (run["baseline_loss"]["holdout"] is None) == (case != "one_config")
    assert run["baseline_loss"]["progressive"] > 0 and isinstance(run["warnings"], list)
    page = check_report(out, [run["name"]], min_points=1 if n < 1_000 else 20)
    assert "baseline progressive loss" in " ".join(page.text)
    assert "cold-chain" not in " ".join(page.text).lower()


def test_cautions_fit_the_feed():
    """The cold-chain caution is the demo's (``test_demo`` checks the demo's page carries it); every other
    feed gets the general one (the replays above check their pages carry it and never say cold-chain)."""
    assert "cold-chain" in DEMO_CAUTION and "cold-chain" not in CAUTION.lower()
    for words in ("decision support", "safety", "health", "credit", "local regulations", "licensed practice"):
        assert words in CAUTION.lower()


def test_replay_whose_report_cannot_be_written_finishes_its_run_and_says_the_report_failed(tmp_path, capsys):
    """A page that cannot be written (a folder stands where ``report.html`` would go) fails only the page:
    the run's files are written, its line is printed with the same digest as a run without a report, and
    stderr says the report failed, and why."""
    feed = tmp_path / "feed.ndjson"
    write_ndjson(feed, 3_000, seed=12)
    assert main(["replay", str(feed), "-c", str(GUARDED), "--out", str(tmp_path / "plain"), "--no-progress",
                 "--no-report"]) == 0
    capsys.readouterr()
    out = tmp_path / "out"
    (out / "report.html").mkdir(parents=True)
    assert main(["replay", str(feed), "-c", str(GUARDED), "--out", str(out), "--no-progress"]) == 1
    said = capsys.readouterr()
    assert "the report failed" in said.err and "Is a directory" in said.err and "report.html" in said.err
    assert not (out / "report.html").is_file()
    run = json.loads((out / "summary.json").read_text())["runs"][0]
    plain = json.loads((tmp_path / "plain" / "summary.json").read_text())["runs"][0]
    assert run["state_digest"] == plain["state_digest"] and run["state_digest"][:16] in said.out
    assert (out / "guarded" / "model.json").exists() and (out / "guarded" / "state.bin").exists()


def test_a_figure_s_lines_are_the_run_s_values_on_its_log_axis():
    """Read back from the SVG alone: the averaged iterate's held-out line, mapped through the axis's own
    labelled ticks (powers of ten), gives the thinned series' values (to a pixel's rounding), and the
    rollback is a vertical line at its event on every panel."""
    from service.replay import figures
    from service.replay.plotdata import thin_trace

    x = np.arange(1, 3_001, dtype=float) * 100
    trace = {"event": x, "progressive_loss": 1 + np.sin(x / 7e3) ** 2, "holdout_raw": 1 / np.sqrt(x),
             "holdout_avg": 0.5 / np.sqrt(x), "baseline_progressive": np.full_like(x, 2.0),
             "baseline_holdout": np.full_like(x, 1.5), "step": 0.1 / np.sqrt(x), "distance": 1 / x,
             "step_scale": np.ones_like(x), "serving": ["averaged"] * len(x)}
    run = {"name": "read-back", "verdict": verdict({"rollbacks": [{"event": 90_000}], "restarts": [], "serving": "raw"}),
           "rollbacks": [{"event": 90_000}], "restarts": []}
    plot = thin_trace(trace)
    svg = ET.fromstring(figures.run_figure(run, plot, "loss", []))
    loss_panel = next(iter(svg.iter(f"{SVG}g")))
    ticks = {float(t.text): float(t.get("y")) - 4 for t in loss_panel.iter(f"{SVG}text")
             if t.get("text-anchor") == "end"}
    (lo, y_lo), (hi, y_hi) = min(ticks.items()), max(ticks.items())
    magenta = [p for p in loss_panel.iter(f"{SVG}path") if p.get("stroke") == "#e7298a"]
    assert len(magenta) == 1
    pts = path_points(magenta[0].get("d"))
    values = 10 ** (np.log10(lo) + (pts[:, 1] - y_lo) / (y_hi - y_lo) * (np.log10(hi) - np.log10(lo)))
    want = plot["holdout_avg"][1]
    assert len(values) == len(want)
    # 0.05 px of rounding on an axis of 300 px over a few decades: well under 1% of the value
    np.testing.assert_allclose(values, want, rtol=0.01)
    marks = [e for e in svg.iter(f"{SVG}line") if e.get("stroke") == "#d95f02" and e.get("x1") == e.get("x2")]
    assert len(marks) == 3  # one per panel, at one place
    assert len({m.get("x1") for m in marks}) == 1
    assert any(t.text == "rollback" for t in svg.iter(f"{SVG}text"))  # the legend names it
