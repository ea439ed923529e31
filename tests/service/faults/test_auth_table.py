"""Must-show 4: who may call what, decided for every route the app registers.

The table below holds one decision per ``(method, path)``; the first test compares it with the
app's own route list (``app.router.routes()``), so a route added without a decision fails here.
The others hold a real ``trimtab serve`` process to the table: every route that changes state
answers 401 without the token and with a wrong one (RFC 6750, "The OAuth 2.0 Authorization
Framework: Bearer Token Usage", Jones and Hardt, 2012, section 3: ``WWW-Authenticate: Bearer``),
and nothing changed; reads answer as decided (open by default, token with
``service.token_for_reads = true``); the probes stay open.
"""

from __future__ import annotations

import http.client

import orjson
import pytest

from service.http.app import create_app
from tests.service.servicekit import AUTH, TOKEN, ServeProcess, demo_events, make_config, toml_text

WRITE, READ, OPEN, SCORE = "write", "read", "open", "score: open, remember needs the token"
DECISIONS = {
    ("POST", "/v1/events"): WRITE,
    ("POST", "/v1/labels"): WRITE,
    ("POST", "/v1/model/rollback"): WRITE,
    ("POST", "/v1/checkpoints"): WRITE,
    ("POST", "/v1/score"): SCORE,
    ("GET", "/v1/model"): READ,
    ("GET", "/v1/model/serving"): READ,
    ("GET", "/v1/checkpoints"): READ,
    ("GET", "/v1/incidents"): READ,
    ("GET", "/metrics"): READ,
    ("GET", "/healthz"): OPEN,
    ("GET", "/readyz"): OPEN,
    ("GET", "/v1/openapi.json"): OPEN,
    ("GET", "/v1/health"): READ,
    ("GET", "/"): OPEN,  # the page itself; every action it offers asks for the token
    ("GET", "/page/{name}"): OPEN,
}
#: aiohttp answers HEAD on every GET route with the GET handler: the same decision
DECISIONS.update({("HEAD", path): d for (method, path), d in list(DECISIONS.items()) if method == "GET"})
WRONG = [f"Bearer {TOKEN}x", f"Bearer {TOKEN[:-1]}", f"Basic {TOKEN}", "Bearer", TOKEN, "Bearer  "]


def _route_table(tmp_path) -> set[tuple[str, str]]:
    app = create_app(make_config(tmp_path), token=TOKEN)
    return {(r.method, r.resource.canonical) for r in app.router.routes()}


def test_every_route_has_an_auth_decision(tmp_path):
    assert _route_table(tmp_path) == set(DECISIONS)


def _body(method: str, path: str) -> bytes | None:
    body = {"/v1/events": demo_events(3, tag="auth-"), "/v1/labels": [{"id": "auth-0", "target": 1.0}],
            "/v1/model/rollback": {"reason": "auth table"},
            "/v1/score": {"features": demo_events(1)[0]["features"]}}.get(path)
    return None if body is None or method != "POST" else orjson.dumps(body)


def _call(url: str, method: str, path: str, body: bytes | None, auth: str | None) -> tuple[int, bytes, dict]:
    path = path.replace("{name}", "trimtab-page.js")  # the page's one parametrized route: a real file
    host, port = url.removeprefix("http://").split(":")
    conn = http.client.HTTPConnection(host, int(port), timeout=60)
    headers = {"Content-Type": "application/json"} if body is not None else {}
    if auth is not None:
        headers["Authorization"] = auth
    try:
        conn.request(method, path, body=body, headers=headers)
        r = conn.getresponse()
        return r.status, r.read(), dict(r.getheaders())
    finally:
        conn.close()


def _refused(url, method, path, body, auth, expect: str) -> None:
    """401 with the error shape, its message holding ``expect`` (a HEAD answer has no body)."""
    status, raw, headers = _call(url, method, path, body, auth)
    assert status == 401, (method, path, auth, status, raw[:200])
    assert headers["WWW-Authenticate"].startswith("Bearer")
    if method == "HEAD":
        return
    err = orjson.loads(raw)["error"]
    assert err["code"] == "unauthorized" and err["where"] == "Authorization", err
    assert expect in err["message"], (method, path, auth, err)


def _state(url: str) -> dict:
    card = orjson.loads(_call(url, "GET", "/v1/model", None, AUTH["Authorization"])[1])
    cps = orjson.loads(_call(url, "GET", "/v1/checkpoints", None, AUTH["Authorization"])[1])["checkpoints"]
    metrics = _call(url, "GET", "/metrics", None, AUTH["Authorization"])[1].decode()
    remembered = next(line for line in metrics.splitlines() if line.startswith("trimtab_remembered"))
    return {"digest": card["state_digest"], "journal": card["journal"], "updates": card["updates"],
            "serving": card["serving"], "checkpoints": len(cps), "remembered": remembered}


@pytest.mark.parametrize("token_for_reads", [False, True], ids=["reads-open", "reads-need-token"])
def test_trimtab_serve_follows_the_table(tmp_path, token_for_reads):
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(make_config(tmp_path / "data", token_for_reads=token_for_reads)))
    server = ServeProcess(conf)
    try:
        server.wait_ready()
        url = server.url
        before = _state(url)
        score_remember = orjson.dumps({"features": demo_events(1)[0]["features"], "id": "auth-0", "remember": True})
        for (method, path), decision in sorted(DECISIONS.items()):
            body = _body(method, path)
            guarded = decision == WRITE or (decision in (READ, SCORE) and token_for_reads)
            if guarded:
                _refused(url, method, path, body, None, "needs 'Authorization: Bearer <token>'")
                for wrong in WRONG:
                    _refused(url, method, path, body, wrong, "wrong token")
            else:
                for auth in (None, *WRONG):
                    status, raw, _ = _call(url, method, path, body, auth)
                    assert status == 200, (method, path, auth, raw[:200])
            if decision == SCORE:  # remembering features changes state whatever the read setting
                _refused(url, method, path, score_remember, None, "needs 'Authorization: Bearer <token>'")
                for wrong in WRONG:
                    _refused(url, method, path, score_remember, wrong, "wrong token")
        assert _state(url) == before, "a refused request changed state"
        # the token opens every route
        for (method, path), decision in sorted(DECISIONS.items()):
            status, raw, _ = _call(url, method, path, _body(method, path), AUTH["Authorization"])
            assert status == 200, (method, path, raw[:200])
        status, raw, _ = _call(url, "POST", "/v1/score", score_remember, AUTH["Authorization"])
        assert status == 200 and orjson.loads(raw)["remembered"] == 1
        after = _state(url)
        assert after["journal"]["applied_seq"] > 0 and after["checkpoints"] >= 1
        assert after["remembered"] != before["remembered"]
    finally:
        server.stop()
