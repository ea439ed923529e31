"""A test that fails half-way must not leave a ``trimtab serve`` running: kill what is left."""

import pytest

from tests.service.faults.faultkit import STARTED


@pytest.fixture(autouse=True)
def _no_server_left():
    yield
    while STARTED:
        server = STARTED.pop()
        if server.proc.poll() is None:
            server.kill()
