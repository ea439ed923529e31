"""The remote scorer's OpenAPI document lists exactly the routes that role answers.

The app is built as ``trimtab serve --role scorer`` builds it (nothing is started: no Redis is
needed); its own route table is the reference the document is checked against.
"""

from __future__ import annotations

import orjson
import pytest

from service.config import PublishConfig
from service.http.handlers import SERVICE
from service.http.schemas import openapi_document
from tests.service.servicekit import make_config

pytest.importorskip("redis")


def _routed(app) -> dict[str, set[str]]:
    """path -> methods the app answers itself (the catch-all that refuses learner routes left out)."""
    out: dict[str, set[str]] = {}
    for route in app.router.routes():
        path = route.resource.canonical
        if route.method in ("HEAD", "*") or "{tail" in path:
            continue
        out.setdefault(path, set()).add(route.method.lower())
    return out


def test_remote_scorer_document_lists_only_its_routes(tmp_path):
    from service.http.remote_scorer import ModelFollower, create_remote_scorer_app
    from service.publish.redis_channel import RedisReader

    cfg = make_config(tmp_path / "data")
    cfg = cfg.model_copy(update={"publish": PublishConfig(source="redis://127.0.0.1:1/0", key="coldchain.model")})
    follower = ModelFollower(RedisReader(cfg.publish.source, cfg.publish_key()), 0.05, 0.5)
    app = create_remote_scorer_app(cfg, "tok", follower)
    doc = orjson.loads(app[SERVICE].openapi)
    listed = {path: set(ops) for path, ops in doc["paths"].items()}
    assert listed == _routed(app)
    assert "/v1/events" not in listed and "/v1/model/rollback" not in listed
    # the learner's own document still lists its write routes, with the same score operation
    full = openapi_document(cfg, doc["info"]["version"])
    assert {"/v1/events", "/v1/labels", "/v1/checkpoints"} <= set(full["paths"])
    assert full["paths"]["/v1/score"] == doc["paths"]["/v1/score"]
