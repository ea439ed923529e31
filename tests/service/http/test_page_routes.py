"""The page's routes without a browser: ``GET /`` and its files with a same-origin-only policy,
``GET /v1/health`` with the series the page draws, the pulse's arithmetic and the certificate's words.

Outside references: the Content-Security-Policy directives of the W3C CSP Level 3 recommendation
(``default-src 'none'`` blocks every fetch a directive does not allow); the published bound's own
numbers on the model card (the words must carry them); rates checked by hand on fixed samples.
"""

from __future__ import annotations

import re

import pytest

from service.http.app import create_app
from service.http.health import certificate_words
from service.http.page import ASSETS, page_weight
from service.http.pulse import Pulse
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready


@pytest.mark.asyncio
async def test_page_and_its_files_come_from_the_service_with_a_same_origin_policy(aiohttp_client, tmp_path):
    client = await aiohttp_client(create_app(make_config(tmp_path, token_for_reads=True), token=TOKEN))
    r = await client.get("/")
    assert r.status == 200 and r.content_type == "text/html"
    csp = r.headers["Content-Security-Policy"]
    assert "default-src 'none'" in csp and "connect-src 'self'" in csp and "script-src 'self'" in csp
    html = await r.text()
    for src in re.findall(r'(?:src|href)="([^"]+)"', html):
        assert src.startswith("/") or src.startswith("data:"), src  # nothing from another host
        if src.startswith("/page/"):
            asset = await client.get(src)
            assert asset.status == 200 and asset.headers["Content-Security-Policy"] == csp
    for body in ASSETS.values():
        assert not re.search(rb"https?://", body.replace(b"http://www.w3.org/2000/svg", b""))
    missing = await client.get("/page/nothing.js")
    assert missing.status == 404 and (await missing.json())["error"]["code"] == "not_found"
    print(f"page weight {page_weight():,} B: " + ", ".join(f"{k} {len(v):,} B" for k, v in ASSETS.items()))
    assert page_weight() < 64 * 1024  # hand-written SVG keeps it small (a chart library alone is larger)
    # the page needs no token, its data does when reads need one
    await wait_ready(client)
    assert (await client.get("/v1/health")).status == 401


@pytest.mark.asyncio
async def test_health_route_has_every_series_the_page_draws(aiohttp_client, tmp_path):
    client = await aiohttp_client(create_app(make_config(tmp_path), token=TOKEN), headers=AUTH)
    await wait_ready(client)
    assert (await client.post("/v1/events", json=demo_events(2000))).status == 200
    h = await (await client.get("/v1/health")).json()
    card = await (await client.get("/v1/model")).json()
    m = h["model"]
    for key in ("holdout_raw", "holdout_avg", "baseline_holdout", "progressive_loss", "baseline_progressive", "step",
                "distance"):
        s = m["checks"][key]
        assert len(s["event"]) == len(s["value"]) >= 10, key
        assert s["event"] == sorted(s["event"])
    assert m["serving"] == card["serving"] and m["events"] == card["counters"]["events"] == 2000
    assert h["version"]["seq"] == card["journal"]["applied_seq"]
    assert m["certificate"]["bound"] == card["certificate"]["bound"]
    assert f"{card['certificate']['bound']:.3g}" in m["certificate"]["words"]
    assert set(h["pulse"]) >= {"t", "rate", "queue", "rejected", "period_s"}
    assert "licensed practice" in h["caution"]
    await client.post("/v1/model/rollback", json={"reason": "health route test"})
    h = await (await client.get("/v1/health")).json()
    assert [(k["kind"], k["label"]) for k in h["model"]["marks"]] == [("rollback", "operator")]
    assert h["model"]["rollbacks"]["operator"] == 1


def test_pulse_rates_are_per_second_between_samples_and_bounded():
    class Ing:
        view = None
        queued_events = 0

        class engine:  # noqa: N801 (stands for the attribute of the same name)
            events = 0
            rejected = 0

    pulse, ing = Pulse(size=3), Ing()
    for t, events, rejected, queue in ((100.0, 0, 0, 0), (102.0, 500, 4, 7), (103.0, 800, 4, 0), (104.0, 100, 4, 0)):
        ing.engine.events, ing.engine.rejected, ing.queued_events = events, rejected, queue
        pulse.sample(ing, now=t)
    s = pulse.series()
    assert s["t"] == [102.0, 103.0, 104.0]  # the oldest sample went
    assert s["rate"] == [None, 300.0, 0.0]  # a step down (a restart) is no negative rate
    assert s["rejected"] == [None, 0.0, 0.0] and s["queue"] == [7, 0, 0]
    assert pulse.version(ing) is None  # nothing published yet


def test_certificate_words_carry_the_bound_or_say_why_there_is_none():
    applicable = {"applicable": True, "bound": 0.1234567, "T": 12000, "rule": "anytime", "G_estimated": True,
                  "scope": "the whole feed"}
    words = certificate_words(applicable, binding=True)
    assert "0.123" in words and "12,000 updates" in words and "indicative" in words and "binding" in words
    assert "drifting feed voids it" in words
    void = {"applicable": False, "reason": "a constant step has no vanishing bound"}
    assert certificate_words(void) == "No guarantee applies now: a constant step has no vanishing bound."
