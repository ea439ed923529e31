"""Start-up of a real ``trimtab serve`` process: it never runs with writes open by accident.

With ``service.auth = "token"`` (the default) an unset, empty or blank token variable ends the
process with exit status 2 (a config error, README "Command line") and a message that names the
variable and the ``auth = "none"`` escape, before anything listens. With ``auth = "none"`` the
process starts, warns on stderr, and its model card carries the warning; writes need no token.
"""

from __future__ import annotations

import os
import subprocess
import sys
import urllib.request

import orjson
import pytest

from tests.service.servicekit import AUTH, ROOT, TOKEN_ENV, ServeProcess, demo_events, make_config, toml_text


def _config(tmp_path, **service):
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(make_config(tmp_path / "data", **service)))
    return conf


@pytest.mark.parametrize("value", [None, "", "  \t"], ids=["unset", "empty", "blank"])
def test_serve_refuses_to_start_without_a_token(tmp_path, value):
    env = {k: v for k, v in os.environ.items() if k != TOKEN_ENV}
    if value is not None:
        env[TOKEN_ENV] = value
    proc = subprocess.run([sys.executable, "-m", "service.cli", "serve", "-c", str(_config(tmp_path)), "--port", "0"],
                          cwd=ROOT, env=env, capture_output=True, timeout=120)
    err = proc.stderr.decode()
    assert proc.returncode == 2, err
    assert f"${TOKEN_ENV}" in err and 'service.auth = "none"' in err, err
    assert ("not set" if value is None else "empty") in err
    assert "listening on" not in err
    assert not (tmp_path / "data").exists(), "nothing may be created before the token is checked"


def _get(url: str, path: str, headers: dict | None = None) -> dict:
    with urllib.request.urlopen(urllib.request.Request(url + path, headers=headers or {}), timeout=30) as r:
        return orjson.loads(r.read())


def _post(url: str, path: str, obj) -> int:
    # the first write of a fresh process may compile the learning kernels (a cold cache)
    req = urllib.request.Request(url + path, data=orjson.dumps(obj), headers={"Content-Type": "application/json"})
    with urllib.request.urlopen(req, timeout=120) as r:
        return r.status


def test_auth_none_starts_with_a_warning_on_stderr_and_the_card(tmp_path):
    server = ServeProcess(_config(tmp_path, auth="none"), env={TOKEN_ENV: ""})
    try:
        server.wait_ready()
        assert any('service.auth = "none"' in line and "open to anyone" in line for line in server.log), server.log
        assert _post(server.url, "/v1/events", demo_events(5)) == 200
        card = _get(server.url, "/v1/model")
        assert 'service.auth = "none"' in card["warning"] and card["journal"]["applied_seq"] == 5
    finally:
        server.stop()


def test_a_token_leaves_no_warning(tmp_path):
    server = ServeProcess(_config(tmp_path))
    try:
        server.wait_ready()
        assert "warning" not in _get(server.url, "/v1/model", AUTH)
        assert not any("open to anyone" in line for line in server.log)
    finally:
        server.stop()
