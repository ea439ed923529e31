"""A first run on a machine where nothing is compiled yet: ``trimtab serve`` with an empty numba cache.

numba compiles a function on its first call and keeps the machine code in its cache directory
(``NUMBA_CACHE_DIR``; numba documentation, "Environment variables" and "Notes on caching"). With
that directory empty, every kernel compiles in the process; the service must do it before it
says it is ready, so that the first write after ``/readyz`` runs at normal speed.
"""

from __future__ import annotations

import time
import urllib.error
import urllib.request

import orjson

from tests.service.servicekit import AUTH, ServeProcess, demo_events, make_config, toml_text

#: The bound of the first 500-event ingest after ``/readyz`` said 200 (issue 14). Compiling the
#: learning kernel alone takes several seconds of CPU (about 3 s on a quiet 2-core machine), so an
#: ingest that still compiled could not meet it; a compiled ingest of 500 events takes about 0.1 s,
#: so 2 s leaves room for a machine shared with other work.
FIRST_INGEST_S = 2.0


def _get(url: str) -> tuple[int, dict]:
    try:
        with urllib.request.urlopen(url, timeout=30) as r:
            return r.status, orjson.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, orjson.loads(exc.read())


def _post(url: str, body: bytes) -> tuple[int, dict]:
    req = urllib.request.Request(url, data=body, headers={**AUTH, "Content-Type": "application/json"})
    try:
        with urllib.request.urlopen(req, timeout=120) as r:
            return r.status, orjson.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, orjson.loads(exc.read())


def test_first_ingest_after_ready_is_fast_with_an_empty_compile_cache(tmp_path):
    """Empty ``NUMBA_CACHE_DIR``: ``/healthz`` answers while the kernels compile, ``/readyz`` says
    503 "compiling" until they are done, then 500 events are acknowledged within ``FIRST_INGEST_S``
    (the cache directory, empty at the start, then holds the compiled kernels)."""
    cache = tmp_path / "numba-cache"
    cache.mkdir()
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(make_config(tmp_path / "data")))
    server = ServeProcess(conf, env={"NUMBA_CACHE_DIR": str(cache)})
    try:
        states, live = [], False
        deadline = time.monotonic() + 240
        while time.monotonic() < deadline:
            status, body = _get(server.url + "/readyz")
            if status == 200:
                break
            states.append(body.get("error", {}).get("message", str(body)))
            live = live or _get(server.url + "/healthz")[0] == 200
            time.sleep(0.05)
        else:
            raise AssertionError("not ready within 240 s:\n" + "".join(server.log))
        assert live, "/healthz did not answer while the service was compiling"
        assert any("compiling the learning kernels" in s for s in states), states[:5]
        events = orjson.dumps(demo_events(500, "first"))
        start = time.perf_counter()
        status, receipt = _post(server.url + "/v1/events", events)
        took = time.perf_counter() - start
        assert status == 200, receipt
        assert receipt["accepted"] == 500, receipt
        print(f"\nfirst 500-event ingest after ready: {took:.3f} s; ready after {len(states)} polls "
              f"that said not ready")
        assert took <= FIRST_INGEST_S, f"first ingest took {took:.2f} s (bound {FIRST_INGEST_S} s)"
        assert any(cache.rglob("*lazy_process*.nbc")), "the kernels were not compiled into the empty cache"
    finally:
        assert server.stop() == 0
