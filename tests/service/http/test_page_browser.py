"""The live page at ``GET /`` in a real headless Chromium, against a real ``trimtab serve``.

The module starts ``trimtab serve`` with the guarded demo config on a loopback port, replays the
first 34,000 lines of the invented cold-chain demo feed into it (through the faulty gateway's burst,
where the guarded config rolls back) and opens the page in Debian's Chromium, driven by Playwright
with the system browser (it never downloads one). The checks read the DOM: every chart has drawn
data, the incident list names the scenario's rollback, the serving iterate is named and agrees with
``GET /v1/model``; the browser's request log shows no host but the service; after the service is
stopped and started again the page recovers without a reload. Page weight and render time are
printed. Screenshots at 1280x800 and at phone width, live and while the service is away, go to the
test's tmp dir; when ``TRIMTAB_PAGE_SHOTS`` names a folder the live pair goes there too (that is how
``docs/page-1280.png`` and ``docs/page-phone.png`` were made).

Chromium is installed by ``.ci/run`` (``apt-get install -y chromium``). Where it (or Playwright) is
missing the tests skip with that reason locally and fail under ``CI=true``.
"""

from __future__ import annotations

import asyncio
import gzip
import os
import shutil
import signal
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from urllib.parse import urlsplit

import orjson
import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.feeds.into_service import replay_live
from service.http.modelmetrics import FAMILIES
from service.http.page import page_weight

from tests.service.servicekit import AUTH, TOKEN, free_port

ROOT = Path(__file__).resolve().parents[3]
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"
DEMO = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
#: the demo feed's lines replayed: through the faulty gateway (valid events 31,104-33,177), where
#: the guarded config rolls back (replay_data/README.md)
LINES = 34_000
CHROMIUM = "/usr/bin/chromium"
#: Chromium's own background traffic (updates, sync, field trials) is switched off: only the page talks
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--disable-default-apps", "--mute-audio"]
PHONE = {"width": 390, "height": 844}
DESKTOP = {"width": 1280, "height": 800}

pytestmark = pytest.mark.slow


def _need_browser():
    """Playwright's sync API, or skip (fail under CI) saying what is missing."""
    why = None
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        why = "the playwright package is not installed (pip install -e '.[test]')"
    if why is None and not os.path.exists(CHROMIUM):
        why = f"Chromium is not installed at {CHROMIUM} (apt-get install -y chromium; .ci/run installs it)"
    if why is not None:
        if os.environ.get("CI"):
            pytest.fail(f"CI must run the browser test: {why}")
        pytest.skip(why)
    return sync_playwright


class Serve:
    """``trimtab serve -c guarded.toml`` on a fixed loopback port (so a restart comes back at the same URL)."""

    def __init__(self, data_dir: Path) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.data_dir = data_dir
        self.proc: subprocess.Popen | None = None

    def start(self, timeout: float = 180.0) -> float:
        """Start and wait until ``/readyz`` answers 200; return the monotonic time it did."""
        env = dict(os.environ, TRIMTAB_TOKEN=TOKEN)
        self.proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "-c", str(GUARDED), "--port",
                                      str(self.port), "--data-dir", str(self.data_dir)], cwd=ROOT, env=env,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"trimtab serve exited with {self.proc.returncode}")
            try:
                with urllib.request.urlopen(self.url + "/readyz", timeout=2):
                    return time.monotonic()
            except OSError:
                time.sleep(0.1)
        raise AssertionError("trimtab serve did not become ready")

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(signal.SIGTERM)
        try:
            self.proc.wait(90)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(30)

    def get(self, path: str, auth: bool = False) -> bytes:
        req = urllib.request.Request(self.url + path, headers=AUTH if auth else {})
        with urllib.request.urlopen(req, timeout=30) as r:
            return r.read()


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """A served, replayed demo, a browser, and the page open at 1280x800 with its request log."""
    sync_playwright = _need_browser()
    tmp = tmp_path_factory.mktemp("page")
    feed = tmp / "demo-head.ndjson"
    with gzip.open(DEMO) as src:
        feed.write_bytes(b"".join(line for _, line in zip(range(LINES), src)))
    serve = Serve(tmp / "data")
    serve.start()
    try:
        acks = asyncio.run(replay_live([feed], serve.url, batch=1000, token=TOKEN))["acks"]
        print(f"replayed {acks['lines']:,} lines: {acks['accepted']:,} accepted, {acks['rejected']:,} rejected")
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS, headless=True)
            context = browser.new_context(viewport=DESKTOP)
            requests: list[str] = []
            context.on("request", lambda r: requests.append(r.url))
            page = context.new_page()
            start = time.perf_counter()
            page.goto(serve.url + "/")
            page.wait_for_selector("body[data-drawn='1']", timeout=60_000)
            loaded = time.perf_counter() - start
            yield {"serve": serve, "page": page, "context": context, "requests": requests, "tmp": tmp,
                   "acks": acks, "loaded_s": loaded}
            browser.close()
    finally:
        serve.stop()


def _shots(page, tmp: Path, tag: str) -> list[Path]:
    """Screenshots at 1280x800 and at phone width (full page), saved under tmp and maybe TRIMTAB_PAGE_SHOTS."""
    out = []
    folder = tmp / "screens"
    folder.mkdir(exist_ok=True)
    for name, size in (("1280", DESKTOP), ("phone", PHONE)):
        page.set_viewport_size(size)
        page.wait_for_timeout(400)  # the charts redraw after a resize (150 ms debounce)
        path = folder / f"page-{name}{tag}.png"
        page.screenshot(path=str(path), full_page=True)
        out.append(path)
        extra = os.environ.get("TRIMTAB_PAGE_SHOTS")
        if extra and not tag:  # the README's pair: the live page, not the "service away" one
            shutil.copy(path, Path(extra) / path.name)
    page.set_viewport_size(DESKTOP)
    page.wait_for_timeout(400)
    return out


def _wait_until(page, expression: str, timeout: float = 30.0) -> None:
    """Poll ``expression`` in the page until it is truthy. (Playwright's wait_for_function evaluates a
    string inside the page, which the page's Content-Security-Policy forbids, rightly.)"""
    deadline = time.monotonic() + timeout
    while not page.evaluate(expression):
        if time.monotonic() > deadline:
            raise AssertionError(f"the page never showed {expression}")
        page.wait_for_timeout(100)


def _chart_points(page) -> dict:
    """Drawn points per series of each chart; a series whose line is not drawn at a visible size counts 0."""
    return page.evaluate("""() => Object.fromEntries([...document.querySelectorAll('figure.chart')].map(
        f => [f.dataset.chart, [...f.querySelectorAll('svg.plot path.series')].map(
            p => p.getBoundingClientRect().width > 4 ? +p.dataset.points : 0)]))""")


def test_page_draws_every_chart_names_the_iterate_and_lists_the_demo_rollback(site):
    """Must-show 1 and 4. Outside reference: ``GET /v1/model`` and ``GET /v1/incidents`` of the same
    service (the page must agree with the API), and the scenario's documented fault (a burst of
    Fahrenheit labels at valid events 31,104-33,177, replay_data/README.md), where the guarded config
    rolls back."""
    page, serve = site["page"], site["serve"]
    # the ingest charts plot the service's pulse, sampled once a second, and a rate needs two samples:
    # a replay that ends within a second or two leaves them empty until the page's next refresh
    _wait_until(page, "[...document.querySelectorAll('figure.chart')].every("
                      "f => f.querySelector('svg.plot path.series'))")
    points = _chart_points(page)
    print("points per chart and series:", points)
    assert set(points) == {"holdout", "progressive", "step", "distance", "rate", "queue", "rejected"}
    for chart, series in points.items():
        assert series and max(series) >= 2, f"chart {chart} has no drawn series: {series}"
    assert len(points["holdout"]) == 3  # raw, averaged, baseline
    card = orjson.loads(serve.get("/v1/model", auth=True))
    assert page.get_attribute("#serving", "data-iterate") == card["serving"]
    assert page.inner_text("#serving").lower() == f"{card['serving']} iterate"
    incidents = orjson.loads(serve.get("/v1/incidents"))["incidents"]
    rollbacks = [i for i in incidents if i["kind"] == "rollback"]
    assert rollbacks and all(31_104 <= i["event"] <= 34_000 for i in rollbacks), rollbacks
    listed = page.locator("#incidents li[data-kind='rollback']")
    assert listed.count() == len(rollbacks)
    assert f"at event {rollbacks[-1]['event']:,}" in listed.first.inner_text()
    assert "held-out loss of the raw iterate" in listed.first.inner_text()
    # the rollbacks are marked on the event axis of the loss chart, at their events
    assert page.locator("figure[data-chart='holdout'] g.mark[data-kind='rollback']").count() == len(rollbacks)
    assert "guarantee" in page.inner_text("#cert-h").lower() and page.inner_text("#certificate") != "–"
    assert "licensed practice" in page.inner_text("#caution")
    weight = page_weight()
    render_ms = page.evaluate("performance.getEntriesByName('trimtab:first-draw')[0].startTime")
    dcl_ms = page.evaluate("performance.getEntriesByType('navigation')[0].domContentLoadedEventEnd")
    print(f"page weight {weight:,} B (HTML+JS+CSS, uncompressed); first draw {render_ms:.0f} ms after navigation "
          f"start (DOMContentLoaded {dcl_ms:.0f} ms); page ready in {site['loaded_s']:.2f} s")
    shots = _shots(page, site["tmp"], "")
    print("screenshots:", *shots)
    assert all(p.stat().st_size > 10_000 for p in shots)
    # at phone width nothing is wider than the screen (no sideways scrolling)
    page.set_viewport_size(PHONE)
    page.wait_for_timeout(400)
    assert page.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
    assert all(max(s) >= 2 for s in _chart_points(page).values())
    page.set_viewport_size(DESKTOP)


def test_model_health_metrics_parse_and_count_the_demo_rollbacks(site):
    """``/metrics`` parsed by prometheus_client's own parser (the reference for the text format):
    every model-health family is there, and the rollback counter by rule equals the incidents."""
    serve = site["serve"]
    text = serve.get("/metrics").decode()
    families = {f.name: f for f in text_string_to_metric_families(text)}
    missing = [name for name in FAMILIES if name not in families]
    assert not missing, missing
    rollbacks = {s.labels["reason"]: s.value for s in families["trimtab_rollbacks"].samples
                 if s.name == "trimtab_rollbacks_total"}
    incidents = orjson.loads(serve.get("/v1/incidents"))["incidents"]
    by_rule = sum(1 for i in incidents if i["kind"] == "rollback" and i["reason"].startswith("held-out loss of the raw"))
    assert rollbacks["raw_persistently_worse"] == by_rule > 0
    card = orjson.loads(serve.get("/v1/model", auth=True))
    loss = {s.labels["iterate"]: s.value for s in families["trimtab_holdout_loss"].samples}
    assert loss["averaged"] == pytest.approx(card["holdout_loss"]["averaged"], rel=1e-12)
    serving = {s.labels["iterate"]: s.value for s in families["trimtab_serving_iterate"].samples}
    assert serving[card["serving"]] == 1.0 and sum(serving.values()) == 1.0


def test_page_requests_nothing_but_the_service(site):
    """Must-show 2: every request in the browser's log goes to the service's own origin."""
    page, serve = site["page"], site["serve"]
    page.wait_for_timeout(2500)  # at least one more poll
    origin = urlsplit(serve.url)
    hosts = {(u.scheme, u.netloc) for u in map(urlsplit, site["requests"]) if u.scheme != "data"}
    print(f"{len(site['requests'])} requests, origins {sorted(hosts)}")
    assert hosts == {(origin.scheme, origin.netloc)}
    paths = {urlsplit(u).path for u in site["requests"]}
    assert {"/", "/page/trimtab-page.js", "/page/trimtab-page.css", "/v1/health", "/v1/incidents"} <= paths


def test_operator_actions_need_the_token_which_stays_in_memory(site):
    """A checkpoint without the token is refused on the page, with it written; a rollback needs a
    second click; afterwards no storage, cookie or URL of the tab holds the token."""
    page, serve = site["page"], site["serve"]
    before = orjson.loads(serve.get("/v1/checkpoints", auth=True))["checkpoints"]
    page.fill("#token", "not-the-token")
    page.click("#do-checkpoint")
    _wait_until(page, "document.getElementById('ops-result').textContent.startsWith('Refused (401)')")
    page.fill("#token", TOKEN)
    page.click("#do-checkpoint")
    _wait_until(page, "document.getElementById('ops-result').textContent.startsWith('Checkpoint written')")
    after = orjson.loads(serve.get("/v1/checkpoints", auth=True))["checkpoints"]
    assert after and after[0]["id"] > (before[0]["id"] if before else 0)  # newest first: a new one
    page.fill("#reason", "page test: operator rollback")
    page.click("#do-rollback")
    assert page.inner_text("#do-rollback") == "Click again to roll back"
    page.click("#do-rollback")
    _wait_until(page, "document.getElementById('ops-result').textContent.startsWith('Rolled back')")
    _wait_until(page, "[...document.querySelectorAll('#incidents li')].some("
                           "li => li.textContent.includes('page test: operator rollback'))", timeout=15)
    # marked on the event axis too, after the last check
    _wait_until(page, "document.querySelectorAll(\"figure[data-chart='holdout'] g.mark\").length === "
                f"{len(orjson.loads(serve.get('/v1/health'))['model']['marks'])}", timeout=15)
    metrics = serve.get("/metrics").decode()
    assert 'trimtab_rollbacks_total{reason="operator"} 1.0' in metrics
    kept = page.evaluate("[localStorage.length, sessionStorage.length, document.cookie, location.href]")
    assert kept[:3] == [0, 0, ""] and TOKEN not in kept[3]
    page.click("#forget")
    assert page.input_value("#token") == ""


def test_incident_filter_asks_the_service_with_since_and_limit(site):
    """The "last 24 hours" filter asks ``/v1/incidents`` with ``since`` (the demo's rollbacks carry
    their events' own times, days before the run, so none is listed there); "newest 40" asks with
    ``limit`` and lists them again."""
    page = site["page"]
    page.select_option("#inc-filter", "day")
    _wait_until(page, "document.querySelector('#incidents li').dataset.kind === 'none'", timeout=15)
    assert any("since=" in u and "limit=200" in u for u in site["requests"])
    page.select_option("#inc-filter", "newest")
    _wait_until(page, "document.querySelectorAll(\"#incidents li[data-kind='rollback']\").length > 0", timeout=15)
    assert any(u.endswith("/v1/incidents?limit=40") for u in site["requests"])


def test_page_recovers_by_itself_after_the_service_restarts(site):
    """Must-show 3: stop the service, see the page say so, start it again on the same port: the
    same page (no reload: a mark set in the tab survives) goes live again with the recovered state."""
    page, serve = site["page"], site["serve"]
    page.evaluate("window.__sameTab = 42")
    started = page.get_attribute("body", "data-started")
    serve.stop()
    page.wait_for_selector("body[data-conn='lost']", timeout=30_000)
    assert "Cannot reach the service" in page.inner_text("#conn")
    _shots(page, site["tmp"], "-lost")
    ready = serve.start()
    _wait_until(page, f"document.body.dataset.conn === 'live' && document.body.dataset.started !== '{started}'",
                           timeout=60)
    print(f"page live again {time.monotonic() - ready:.1f} s after the restarted service was ready "
          "(the page polls every 2 s)")
    assert page.evaluate("window.__sameTab") == 42
    assert page.locator("#incidents li[data-kind='rollback']").count() >= 1
    # the check records come back with the checkpoint; the pulse starts again with the new process
    assert min(_chart_points(page)["holdout"]) >= 2
