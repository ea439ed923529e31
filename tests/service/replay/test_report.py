"""The replay report: an HTML page that opens from disk, with real PNG plots and plain-words verdicts.

The page is parsed with Python's ``html.parser`` and the images checked against the PNG signature
(ISO/IEC 15948, section 5.2: the eight bytes ``89 50 4E 47 0D 0A 1A 0A``) and read back with
matplotlib's own reader, so a blank or broken file fails.
"""

from __future__ import annotations

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

from service.cli import main
from service.replay.report import CAUTION, verdict
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


def check_report(folder: Path, names: list[str]) -> _Page:
    """The report in ``folder`` opens offline, every image is a non-empty PNG with ink on it."""
    import matplotlib.image as mpimg

    page = _Page()
    page.feed((folder / "report.html").read_text(encoding="utf-8"))
    assert page.scripts == 0 and not any("://" in u for u in page.links + page.images)
    assert len(page.images) == len(names) + 1
    for src in page.images:
        path = folder / src
        data = path.read_bytes()
        assert data[:8] == PNG and len(data) > 20_000, src
        pixels = mpimg.imread(path)
        assert pixels.shape[0] > 400 and np.std(pixels[..., :3]) > 0.05, src  # not a blank canvas
    text = " ".join(page.text)
    assert CAUTION in text
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
