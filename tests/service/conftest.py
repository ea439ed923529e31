"""Fixtures of the service tests that start real processes: no ``trimtab serve`` outlives a test (one
that fails half-way included), and a ``redis-server`` with its append-only file on."""

import pytest

from tests.service.faults.faultkit import STARTED
from tests.service.rediskit import RedisServer


@pytest.fixture(autouse=True)
def _no_server_left():
    yield
    while STARTED:
        server = STARTED.pop()
        if server.proc.poll() is None:
            server.kill()


@pytest.fixture
def aof_redis(tmp_path):
    """A ``redis-server`` on a free loopback port that persists to its append-only file."""
    server = RedisServer(tmp_path / "redis", appendonly=True)
    yield server
    server.stop()
