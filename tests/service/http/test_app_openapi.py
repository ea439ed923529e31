"""``/v1/openapi.json`` is a valid OpenAPI 3.1 document that describes the real routes and the real
answers, and ``/metrics`` is valid Prometheus text exposition.

Outside references: ``openapi-spec-validator`` (checks a document against the OpenAPI 3.1
specification), ``jsonschema`` (JSON Schema 2020-12, the dialect OpenAPI 3.1 uses) and the
exposition parser of ``prometheus_client``.
"""

from __future__ import annotations

import jsonschema
import pytest
from openapi_spec_validator import validate as validate_spec
from prometheus_client.parser import text_string_to_metric_families
from referencing import Registry
from referencing.jsonschema import DRAFT202012

from service.http.app import create_app
from tests.service.servicekit import AUTH, TOKEN, demo_events, make_config, wait_ready

pytestmark = pytest.mark.asyncio


def schema_checker(doc: dict, name: str) -> jsonschema.Draft202012Validator:
    """A validator for ``#/components/schemas/<name>`` with the document's own $refs resolvable."""
    registry = Registry().with_resource("urn:openapi", DRAFT202012.create_resource(doc))
    schema = {"$ref": f"urn:openapi#/components/schemas/{name}"}
    return jsonschema.Draft202012Validator(schema, registry=registry)


async def test_document_is_valid_and_describes_the_answers(aiohttp_client, tmp_path):
    app = create_app(make_config(tmp_path), token=TOKEN)
    client = await aiohttp_client(app, headers=AUTH)
    await wait_ready(client)
    doc = await (await client.get("/v1/openapi.json")).json()
    assert doc["openapi"].startswith("3.1")
    validate_spec(doc)
    routes = {(r.method.lower(), r.resource.canonical) for r in app.router.routes() if r.method != "HEAD"}
    described = {(m, p) for p, ops in doc["paths"].items() for m in ops}
    assert routes == described

    events = demo_events(50)
    bad = dict(events[3], target="warm")
    answers = {
        "IngestResponse": await (await client.post("/v1/events", json=events[:3] + [bad])).json(),
        "ScoreResponse": await (await client.post("/v1/score", json={"features": events[0]["features"]})).json(),
        "ErrorResponse": await (await client.post("/v1/score", json={"features": 3})).json(),
    }
    for name, body in answers.items():
        schema_checker(doc, name).validate(body)
    request_ok = schema_checker(doc, "EventIn")
    for e in events:
        request_ok.validate(e)
    assert not schema_checker(doc, "EventIn").is_valid({"id": "x"})  # features are required
    assert not schema_checker(doc, "ScoreRequest").is_valid({"features": {}, "remember": "yes"})


async def test_metrics_are_prometheus_text(aiohttp_client, tmp_path):
    client = await aiohttp_client(create_app(make_config(tmp_path), token=TOKEN), headers=AUTH)
    await wait_ready(client)
    await client.post("/v1/events", json=demo_events(250))
    for _ in range(7):
        await client.post("/v1/score", json={"features": {"ambient_c": 3.0}})
    await client.post("/v1/score", json={"features": {"ambient_c": "warm"}})
    r = await client.get("/metrics")
    assert r.status == 200 and r.headers["Content-Type"].startswith("text/plain")
    families = {f.name: f for f in text_string_to_metric_families(await r.text())}
    requests = {(s.labels["route"], s.labels["status"]): s.value for s in families["trimtab_http_requests"].samples
                if s.name == "trimtab_http_requests_total"}
    assert requests[("/v1/score", "200")] == 7 and requests[("/v1/score", "422")] == 1
    events = {s.labels["outcome"]: s.value for s in families["trimtab_events"].samples
              if s.name == "trimtab_events_total"}
    assert events["accepted"] == 250
    gauges = {f.name: f.samples[0].value for f in families.values() if f.type == "gauge" and f.samples}
    assert gauges["trimtab_applied_seq"] == 250 and gauges["trimtab_ready"] == 1.0
    assert gauges["trimtab_model_updates"] > 0
