"""Bearer token (must-show 5): writes without or with a wrong token get 401; reads follow the config.

The scheme and status follow RFC 6750 ("The OAuth 2.0 Authorization Framework: Bearer Token
Usage", Jones and Hardt, 2012, section 3): ``Authorization: Bearer <token>``; a missing or invalid
token is answered 401 with ``WWW-Authenticate: Bearer``.
"""

from __future__ import annotations

import pytest

from service.config import ConfigError
from service.http.app import _loopback, create_app
from tests.service.servicekit import demo_events, make_config, wait_ready

TOKEN = "s3cret-token-for-tests"
GOOD = {"Authorization": f"Bearer {TOKEN}"}
WRITES = [("POST", "/v1/events"), ("POST", "/v1/labels"), ("POST", "/v1/model/rollback"), ("POST", "/v1/checkpoints")]
READS = [("POST", "/v1/score"), ("GET", "/v1/model"), ("GET", "/v1/checkpoints"), ("GET", "/v1/incidents"),
         ("GET", "/metrics"), ("GET", "/v1/health")]
OPEN = [("GET", "/healthz"), ("GET", "/readyz"), ("GET", "/v1/openapi.json"), ("GET", "/"),
        ("GET", "/page/trimtab-page.js")]


def _body(path: str):
    return {"/v1/events": demo_events(3), "/v1/labels": [], "/v1/score": {"features": {"ambient_c": 3.0}},
            "/v1/model/rollback": {"reason": "auth test"}}.get(path)


async def _call(client, method, path, headers=None):
    body = _body(path)
    if method == "GET":
        return await client.get(path, headers=headers)
    return await client.post(path, json=body, headers=headers)


@pytest.mark.asyncio
@pytest.mark.parametrize("token_for_reads", [False, True], ids=["reads-open", "reads-need-token"])
async def test_token_guards_writes_and_optionally_reads(aiohttp_client, tmp_path, monkeypatch, token_for_reads):
    monkeypatch.setenv("TRIMTAB_TEST_TOKEN", TOKEN)
    cfg = make_config(tmp_path, token_for_reads=token_for_reads)
    client = await aiohttp_client(create_app(cfg))
    await wait_ready(client)
    guarded = WRITES + (READS if token_for_reads else [])
    for method, path in guarded:
        r = await _call(client, method, path)
        err = (await r.json())["error"]
        assert r.status == 401 and err["code"] == "unauthorized" and err["where"] == "Authorization", path
        assert "needs 'Authorization: Bearer <token>'" in err["message"] and "$TRIMTAB_TEST_TOKEN" in err["message"]
        assert r.headers["WWW-Authenticate"].startswith("Bearer")
        for wrong in (f"Bearer {TOKEN}x", f"Basic {TOKEN}", "Bearer", f"Bearer {TOKEN[:-1]}"):
            r = await _call(client, method, path, {"Authorization": wrong})
            assert r.status == 401 and "wrong token" in (await r.json())["error"]["message"], (path, wrong)
    # rejected writes changed nothing
    assert (await (await client.get("/v1/model", headers=GOOD)).json())["journal"]["applied_seq"] == 0
    for method, path in WRITES + READS + OPEN:
        r = await _call(client, method, path, GOOD)
        assert r.status == 200, (path, await r.text())
    if not token_for_reads:
        for method, path in READS + OPEN:
            assert (await _call(client, method, path)).status == 200, path
    for method, path in OPEN:
        assert (await _call(client, method, path)).status == 200, path


@pytest.mark.parametrize("value", [None, "", "   "], ids=["unset", "empty", "spaces"])
def test_no_usable_token_refuses_to_build_the_app(tmp_path, monkeypatch, value):
    """With ``service.auth = "token"`` (the default) writes are never open by accident."""
    if value is None:
        monkeypatch.delenv("TRIMTAB_TEST_TOKEN", raising=False)
    else:
        monkeypatch.setenv("TRIMTAB_TEST_TOKEN", value)
    with pytest.raises(ConfigError, match=r"\$TRIMTAB_TEST_TOKEN .*service.auth = \"none\"") as exc:
        create_app(make_config(tmp_path))
    assert exc.value.where == "service.auth"


@pytest.mark.asyncio
async def test_auth_none_opens_writes_with_a_warning(aiohttp_client, tmp_path, monkeypatch):
    monkeypatch.setenv("TRIMTAB_TEST_TOKEN", TOKEN)  # ignored: the config says auth = "none"
    client = await aiohttp_client(create_app(make_config(tmp_path, auth="none")))
    await wait_ready(client)
    r = await client.post("/v1/events", json=demo_events(3))
    assert r.status == 200 and (await r.json())["accepted"] == 3
    card = await (await client.get("/v1/model")).json()
    assert "open to anyone" in card["warning"] and 'auth = "none"' in card["warning"]


def test_loopback_detection_for_the_start_warning():
    assert _loopback("127.0.0.1") and _loopback("::1") and _loopback("localhost") and _loopback("127.8.0.1")
    assert not _loopback("0.0.0.0") and not _loopback("10.1.2.3") and not _loopback("example.org")
