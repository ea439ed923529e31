"""A full disk under a running ``trimtab serve``: writes answer 503 with the reason, ``/readyz`` is 503,
an incident is recorded, nothing acknowledged is lost, and writes are taken again once space returns.

The disk is a real size-limited tmpfs mounted for the test (root only); where mounting is not
allowed, the server's file-size limit (``RLIMIT_FSIZE``, set and lifted with ``prlimit``) stands in
for it. The reference for "nothing lost" is an offline :class:`Engine` replay of the journal file.
"""

from __future__ import annotations

import errno
import os
import resource
import subprocess
from pathlib import Path

import pytest

from tests.service.faults.faultkit import Client, journal_replay, start, write_config
from tests.service.servicekit import demo_events


def _mount_tmpfs(where: Path, megabytes: int) -> bool:
    where.mkdir(parents=True)
    if os.geteuid() != 0:
        return False
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={megabytes}m", "tmpfs", str(where)],
                          capture_output=True)
    return done.returncode == 0


def _fill_up(disk: Path) -> Path:
    """Write a ballast file until the file system refuses (ENOSPC)."""
    ballast = disk / "ballast"
    chunk = b"\0" * (1 << 20)
    with open(ballast, "wb") as f:
        try:
            while True:
                f.write(chunk)
                f.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC, exc
    return ballast


@pytest.fixture
def disk(tmp_path):
    where = tmp_path / "disk"
    mounted = _mount_tmpfs(where, 96)
    yield where, mounted
    if mounted:
        subprocess.run(["umount", "-l", str(where)], check=False)


def test_a_full_disk_refuses_writes_with_the_reason_and_recovers(tmp_path, disk):
    where, mounted = disk
    data = where / "data"
    cfg, conf = write_config(tmp_path, data, checkpoint_every=10**6, prune_journal=False)
    server = start(conf)
    try:
        client = Client(server.url)
        first = demo_events(500, tag="f-")
        assert client.events(first)["accepted"] == 500
        before = client.card()

        if mounted:
            ballast = _fill_up(where)
        else:  # no mount: the server may not write past the first 4 KiB of any file
            limits = resource.prlimit(server.proc.pid, resource.RLIMIT_FSIZE)
            resource.prlimit(server.proc.pid, resource.RLIMIT_FSIZE, (4096, limits[1]))  # the soft limit only
        batch = demo_events(5000, tag="g-")
        status, refused = client.call("POST", "/v1/events", batch)
        assert status == 503 and refused["error"]["code"] == "journal_unavailable", refused
        reason = refused["error"]["message"]
        assert ("full" in reason) if mounted else ("limit" in reason or "full" in reason), reason

        status, ready = client.call("GET", "/readyz")
        assert status == 503 and ready["error"]["where"] == "storage", ready
        status, later = client.call("POST", "/v1/events", batch[:10])
        assert status == 503 and "refused until the storage recovers" in later["error"]["message"], later
        status, remember = client.call("POST", "/v1/score", {"id": "r-1", "features": first[0]["features"],
                                                              "remember": True})
        assert status == 503, remember
        status, score = client.call("POST", "/v1/score", {"features": first[0]["features"]})
        assert status == 200  # reads go on
        assert "storage_fault" in [i["kind"] for i in client.incidents()]
        assert client.card()["state_digest"] == before["state_digest"]  # nothing of the refused batch applied

        if mounted:
            ballast.unlink()
        else:
            resource.prlimit(server.proc.pid, resource.RLIMIT_FSIZE, limits)
        client.wait(lambda: client.call("GET", "/readyz")[0] == 200)
        assert "storage_recovered" in [i["kind"] for i in client.incidents()]
        got = client.events(batch)
        assert got["accepted"] == 5000 and not got["duplicates"], got
        live = client.card()
    finally:
        assert server.stop() == 0, "".join(server.log[-30:])
    digest, updates, ids, _ = journal_replay(cfg, data / "trimtab.sqlite")
    assert set(ids) == {e["id"] for e in first + batch} and len(ids) == 5500
    assert (digest, updates) == (live["state_digest"], live["updates"])
    server = start(conf)  # the fault incident outlives the restart
    try:
        kinds = [i["kind"] for i in Client(server.url).incidents()]
        assert "storage_fault" in kinds and "storage_recovered" in kinds
    finally:
        assert server.stop() == 0
