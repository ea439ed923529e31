"""The model-health families of ``/metrics``, parsed with ``prometheus_client``'s own text parser.

Outside references: the exposition parser of ``prometheus_client`` (format and types), and
scikit-learn's ``accuracy_score``, ``roc_auc_score``, ``brier_score_loss`` and ``log_loss`` computed
on the held-out window's own events, scored through ``POST /v1/score`` with each iterate: the binary
figures and the held-out log loss that ``/metrics`` exports must be theirs.
"""

from __future__ import annotations

import gzip

import numpy as np
import orjson
import pytest
from prometheus_client.parser import text_string_to_metric_families
from sklearn.metrics import accuracy_score, brier_score_loss, log_loss, roc_auc_score

from service.config import config_from_dict
from service.engine import holdout_fraction
from service.http.app import create_app
from service.http.modelmetrics import BINARY_FAMILIES, FAMILIES
from tests.service.servicekit import AUTH, FEATURES, ROOT, TOKEN, TOKEN_ENV, demo_events, make_config, wait_ready

pytestmark = pytest.mark.asyncio

BINARY_FEED = ROOT / "replay_data" / "coldchain-demo-binary.ndjson.gz"
SHARE, WINDOW = 0.2, 400


async def _families(client) -> dict:
    r = await client.get("/metrics")
    assert r.status == 200
    return {f.name: f for f in text_string_to_metric_families(await r.text())}


def _by(family, label: str) -> dict:
    return {s.labels[label]: s.value for s in family.samples if not s.name.endswith("_created")}


def _binary_events(n: int) -> list[dict]:
    """The first ``n`` well-formed events of the shipped binary demo feed (invented data)."""
    out = []
    for line in gzip.open(BINARY_FEED).read().split(b"\n"):
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue
        if (isinstance(obj, dict) and set(obj) == {"id", "ts", "features", "target"} and obj["target"] in (0, 1)
                and isinstance(obj["id"], str) and set(obj["features"]) <= set(FEATURES["numeric"] + FEATURES["categorical"])
                and all(isinstance(v, (int, float, str)) and not isinstance(v, bool) for v in obj["features"].values())):
            out.append(obj)
        if len(out) == n:
            break
    return out


async def test_every_model_family_is_exported_and_agrees_with_the_model_card(aiohttp_client, tmp_path):
    client = await aiohttp_client(create_app(make_config(tmp_path), token=TOKEN), headers=AUTH)
    await wait_ready(client)
    events = demo_events(3000)
    for k in range(0, 3000, 1000):  # bodies under aiohttp's 1 MiB client warning
        assert (await client.post("/v1/events", json=events[k:k + 1000])).status == 200
    fams = await _families(client)
    assert not [name for name in FAMILIES if name not in fams]
    assert not [name for name in BINARY_FAMILIES if name in fams]  # a regression task has none
    assert fams["trimtab_rollbacks"].type == fams["trimtab_restarts"].type == "counter"
    assert all(s.name.endswith("_total") for s in fams["trimtab_rollbacks"].samples)
    card = await (await client.get("/v1/model")).json()
    loss = _by(fams["trimtab_holdout_loss"], "iterate")
    assert loss == pytest.approx({"raw": card["holdout_loss"]["raw"], "averaged": card["holdout_loss"]["averaged"]},
                                 rel=1e-12)
    assert _by(fams["trimtab_baseline_loss"], "over") == pytest.approx(
        {"holdout": card["baseline_loss"]["holdout"], "progressive": card["baseline_loss"]["progressive"]}, rel=1e-12)
    assert fams["trimtab_progressive_loss"].samples[0].value == pytest.approx(card["counters"]["progressive_loss"])
    assert fams["trimtab_iterate_distance"].samples[0].value == pytest.approx(card["distance"], rel=1e-12)
    assert fams["trimtab_certificate_bound"].samples[0].value == pytest.approx(card["certificate"]["bound"])
    assert fams["trimtab_certificate_applicable"].samples[0].value == 1.0
    assert fams["trimtab_model_version"].samples[0].value == card["journal"]["applied_seq"] == 3000
    assert fams["trimtab_events_since_restart"].samples[0].value == 3000
    assert _by(fams["trimtab_serving_iterate"], "iterate") == {"raw": 0.0, "averaged": 1.0}
    assert fams["trimtab_model_age_seconds"].samples[0].value >= 0.0
    assert set(_by(fams["trimtab_rollbacks"], "reason").values()) == {0.0}

    r = await client.post("/v1/model/rollback", json={"reason": "metrics test"})
    assert r.status == 200
    fams = await _families(client)
    assert _by(fams["trimtab_rollbacks"], "reason")["operator"] == 1.0
    assert sum(_by(fams["trimtab_rollbacks"], "reason").values()) == 1.0
    assert fams["trimtab_iterate_distance"].samples[0].value == 0.0  # raw := averaged


async def test_binary_window_metrics_match_scikit_learn(aiohttp_client, tmp_path):
    config = config_from_dict({"name": "binary", "features": FEATURES, "model": {"task": "binary", "loss": "logistic"},
                               "monitor": {"check_every": 100, "window": WINDOW, "holdout_share": SHARE, "drift": "off"},
                               "service": {"host": "127.0.0.1", "port": 0, "data_dir": str(tmp_path),
                                           "token_env": TOKEN_ENV}})
    client = await aiohttp_client(create_app(config, token=TOKEN), headers=AUTH)
    await wait_ready(client)
    events = _binary_events(4000)
    for k in range(0, len(events), 1000):
        assert (await client.post("/v1/events", json=events[k:k + 1000])).status == 200
    fams = await _families(client)
    assert not [name for name in FAMILIES + BINARY_FAMILIES if name not in fams]
    assert sum(_by(fams["trimtab_restarts"], "reason").values()) == 0  # drift is off: the window is never cut
    held = [e for e in events if holdout_fraction(e["id"]) < SHARE][-WINDOW:]
    y = np.array([e["target"] for e in held])
    assert 0 < y.sum() < len(y)
    for iterate in ("raw", "averaged"):
        r = await client.post("/v1/score", json={"events": [{"features": e["features"]} for e in held],
                                                 "iterate": iterate})
        p = np.array((await r.json())["scores"])
        assert _by(fams["trimtab_holdout_accuracy_ratio"], "iterate")[iterate] == pytest.approx(
            accuracy_score(y, p >= 0.5), abs=1e-12)
        assert _by(fams["trimtab_holdout_roc_auc_ratio"], "iterate")[iterate] == pytest.approx(
            roc_auc_score(y, p), rel=1e-9)
        assert _by(fams["trimtab_holdout_brier_score"], "iterate")[iterate] == pytest.approx(
            brier_score_loss(y, p), rel=1e-9)
        assert _by(fams["trimtab_holdout_loss"], "iterate")[iterate] == pytest.approx(log_loss(y, p), rel=1e-9)
