"""The replay report: one HTML page that opens from disk, with real PNG plots embedded and plain-words verdicts.

The page is parsed with Python's ``html.parser``; every image must be a ``data:`` URI (RFC 2397)
holding base64 (RFC 4648) whose bytes carry the PNG signature (ISO/IEC 15948, section 5.2: the
eight bytes ``89 50 4E 47 0D 0A 1A 0A``) and read back with matplotlib's own reader, so a blank,
broken or missing image fails. The report must render in every shape a run can take: with the
monitor off, with ``holdout_share = 0``, with no held-out event at all, and with one config.
"""

from __future__ import annotations

import base64
import io
import os
import json
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
PNG = b"\x89PNG\r\n\x1a\n"


class _Page(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.images, self.links, self.scripts, self.text = [], [], 0, []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src"))
        if tag in ("a", "link") and a.get("href"):
            self.links.append(a["href"])
        if tag == "script":
            self.scripts += 1

    def handle_data(self, data):
        self.text.append(data)


def check_report(folder: Path, names: list[str], caution: str = CAUTION) -> _Page:
    """The report in ``folder`` opens offline; every image is embedded, a non-empty PNG with ink on it."""
    import matplotlib.image as mpimg

    page = _Page()
    page.feed((folder / "report.html").read_text(encoding="utf-8"))
    assert page.scripts == 0 and not any("://" in u for u in page.links + page.images)
    assert len(page.images) == len(names) + (1 if len(names) > 1 else 0)
    for src in page.images:
        head, _, payload = src.partition(",")
        assert head == "data:image/png;base64", src[:40]
        data = base64.b64decode(payload, validate=True)
        assert data[:8] == PNG and len(data) > 20_000
        pixels = mpimg.imread(io.BytesIO(data), format="png")
        assert pixels.shape[0] > 400 and np.std(pixels[..., :3]) > 0.05  # not a blank canvas
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
    page = check_report(out, [run["name"]])
    assert "baseline progressive loss" in " ".join(page.text)
    assert "cold-chain" not in " ".join(page.text).lower()


def test_cautions_fit_the_feed():
    """The cold-chain caution is the demo's (``test_demo`` checks the demo's page carries it); every other
    feed gets the general one (the replays above check their pages carry it and never say cold-chain)."""
    assert "cold-chain" in DEMO_CAUTION and "cold-chain" not in CAUTION.lower()
    for words in ("decision support", "safety", "health", "credit", "local regulations", "licensed practice"):
        assert words in CAUTION.lower()


def test_replay_whose_painter_fails_finishes_its_run_and_says_the_report_failed(tmp_path, monkeypatch, capsys):
    """A painter that cannot load matplotlib (a stand-in package that refuses to import, first on the
    painter's path) fails only the page: the run's files are written, its line is printed with the same
    digest as a run without a report, and stderr says the report failed, with the painter's reason."""
    feed = tmp_path / "feed.ndjson"
    write_ndjson(feed, 3_000, seed=12)
    broken = tmp_path / "broken" / "matplotlib"
    broken.mkdir(parents=True)
    (broken / "__init__.py").write_text('raise ImportError("this matplotlib refuses to load")\n')
    assert main(["replay", str(feed), "-c", str(GUARDED), "--out", str(tmp_path / "plain"), "--no-progress",
                 "--no-report"]) == 0
    capsys.readouterr()
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [str(broken.parent), os.environ.get("PYTHONPATH")])))
    out = tmp_path / "out"
    assert main(["replay", str(feed), "-c", str(GUARDED), "--out", str(out), "--no-progress"]) == 1
    said = capsys.readouterr()
    assert "the report failed" in said.err and "this matplotlib refuses to load" in said.err
    assert not (out / "report.html").exists()
    run = json.loads((out / "summary.json").read_text())["runs"][0]
    plain = json.loads((tmp_path / "plain" / "summary.json").read_text())["runs"][0]
    assert run["state_digest"] == plain["state_digest"] and run["state_digest"][:16] in said.out
    assert (out / "guarded" / "model.json").exists() and (out / "guarded" / "state.bin").exists()


def test_a_figure_built_ahead_draws_the_same_image(tmp_path):
    """The painter builds its figures before the data arrives (``figures.prepare``); the PNG must be the
    very bytes of a figure built at drawing time."""
    from service.replay import figures
    from service.replay.plotdata import thin_trace

    x = np.arange(1, 3_001, dtype=float) * 100
    trace = {"event": x, "progressive_loss": 1 + np.sin(x / 7e3) ** 2, "holdout_raw": 1 / np.sqrt(x),
             "holdout_avg": 0.5 / np.sqrt(x), "baseline_progressive": np.full_like(x, 2.0),
             "baseline_holdout": np.full_like(x, 1.5), "step": 0.1 / np.sqrt(x), "distance": 1 / x,
             "step_scale": np.ones_like(x), "serving": ["averaged"] * len(x)}
    run = {"name": "ahead", "verdict": verdict({"rollbacks": [{"event": 90_000}], "restarts": [], "serving": "raw"}),
           "rollbacks": [{"event": 90_000}], "restarts": []}
    plot = thin_trace(trace)
    fresh = figures.run_figure(run, plot, "loss", [])
    figures.prepare(1)
    assert figures._SPARE
    ahead = figures.run_figure(run, plot, "loss", [])
    assert not figures._SPARE and ahead[:8] == PNG
    assert ahead == fresh
