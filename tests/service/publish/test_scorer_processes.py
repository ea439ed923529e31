"""``trimtab serve`` with scorer processes, end to end with real processes on 127.0.0.1.

The references are outside the scorers: the learner's own ``/v1/score`` on its local socket, and an
offline :class:`Engine` replay of the events (the engine is deterministic: equal state digests are
bit-identical models). Process life is read from outside with psutil.
"""

from __future__ import annotations

import signal
import socket
import threading
import time

import psutil
import pytest

from service.engine import Engine
from service.events import EventValidator
from tests.service.publish.scorerkit import Conn, bits, learner_socket, scorer_pids, start_serve, wait_for
from tests.service.servicekit import demo_events

PROBES = [{"ambient_c": 4.0, "door_open_s": 30, "van": "V03", "route": "urban"},
          {"ambient_c": 21.5, "load_kg": 300, "van": "V07"}, {"compressor_duty": 0.4, "route": "never-seen"}]


def _ingest(conn: Conn, events: list[dict], batch: int = 500) -> dict:
    got = {}
    for i in range(0, len(events), batch):
        status, got = conn.call("POST", "/v1/events", events[i:i + batch], ndjson=True)
        assert status == 200 and got["accepted"] == len(events[i:i + batch]), got
    return got


def test_scorer_scores_equal_the_learners_own_bit_for_bit(tmp_path):
    """Must-show 1: same version, same scores, to the bit (both iterates, the serving one by default)."""
    cfg, server = start_serve(tmp_path, scorers=2)
    try:
        front, learner = Conn(server.url), Conn(unix=learner_socket(server))
        last = _ingest(front, demo_events(3000, tag="b"))
        body = {"events": [{"features": p} for p in PROBES]}
        for iterate in (None, "raw", "averaged"):
            req = dict(body, **({"iterate": iterate} if iterate else {}))
            # the learner is idle once the last batch is answered: wait until a scorer serves its last state
            got = wait_for(lambda: (a := front.call("POST", "/v1/score", req)[1])["version"]["seq"]
                           == last["applied_seq"] and a)
            status, own = learner.call("POST", "/v1/score", req)
            assert status == 200
            assert (got["version"]["seq"], got["version"]["updates"]) == (own["version"]["seq"],
                                                                         own["version"]["updates"])
            assert got["iterate"] == own["iterate"]
            assert [bits(x) for x in got["scores"]] == [bits(x) for x in own["scores"]]
        # the version a scorer names is the learner's state: its digest is the model card's and an offline replay's
        card = front.call("GET", "/v1/model")[1]
        assert got["version"]["digest"] == card["state_digest"]
        v = EventValidator(cfg)
        engine = Engine(cfg)
        for i in range(0, 3000, 500):
            engine.apply_events([v.validate(e) for e in demo_events(3000, tag="b")[i:i + 500]])
        assert engine.state_digest == got["version"]["digest"]
        front.close()
        learner.close()
    finally:
        assert server.stop() == 0


class _Scorer(threading.Thread):
    """Scores ``PROBES`` over one keep-alive connection until stopped; keeps every answer."""

    def __init__(self, url: str) -> None:
        super().__init__(daemon=True)
        self.url, self.answers, self.failures, self.stop = url, [], [], threading.Event()

    def run(self) -> None:
        conn = Conn(self.url)
        body = {"events": [{"features": p} for p in PROBES]}
        while not self.stop.is_set():
            try:
                status, got = conn.call("POST", "/v1/score", body)
            except OSError as exc:
                self.failures.append(repr(exc))
                conn = Conn(self.url)
                continue
            if status != 200:
                self.failures.append(got)
                continue
            self.answers.append(got)
        conn.close()


def test_no_torn_reads_while_thousands_of_versions_are_published(tmp_path):
    """Must-show 2: every answer equals the scores under exactly the version it names.

    The learner publishes after every slice of 8 events: 12,000 events are 1,500+ versions. The
    reference for each named digest is an offline engine fed the same events as the learner slices
    them (each request of 500 in slices of 8), with the scores after every slice."""
    n, step = 12_000, 8
    cfg, server = start_serve(tmp_path, scorers=2, apply_slice=step, publish_every_ms=0)
    events = demo_events(n, tag="t")
    try:
        front = Conn(server.url)
        clients = [_Scorer(server.url) for _ in range(2)]
        for c in clients:
            c.start()
        _ingest(front, events)
        time.sleep(0.2)
        for c in clients:
            c.stop.set()
            c.join(30)
        metrics = front.call("GET", "/metrics")[1]["text"]
        front.close()
    finally:
        assert server.stop() == 0
    published = float(next(line.split()[1] for line in metrics.splitlines()
                           if line.startswith("trimtab_published_version ")))
    assert published >= n // step, published
    # the reference: digest -> scores of both iterates after every slice of the offline replay
    v = EventValidator(cfg)
    engine = Engine(cfg)
    ref = {engine.state_digest: _scores(engine)}
    for start in range(0, n, 500):
        batch = [v.validate(e) for e in events[start:start + 500]]
        for i in range(0, len(batch), step):
            engine.apply_events(batch[i:i + step])
            ref[engine.state_digest] = _scores(engine)
    answers = [a for c in clients for a in c.answers]
    assert not [f for c in clients for f in c.failures]
    assert len(answers) > 200, len(answers)
    versions = set()
    for a in answers:
        digest = a["version"]["digest"]
        assert digest in ref, f"an answer names a state the learner never had: {a['version']}"
        assert [bits(x) for x in a["scores"]] == ref[digest][a["iterate"]], a
        versions.add(a["version"]["published"])
    for c in clients:  # one keep-alive connection stays on one scorer: its versions never go back
        seen = [a["version"]["published"] for a in c.answers]
        assert seen == sorted(seen)
    print(f"\n{len(answers)} answers under {len(versions)} distinct versions of {published:.0f} published")
    assert len(versions) >= 20


def _scores(engine: Engine) -> dict:
    m = engine.model
    rows = m.rows(PROBES, remember=False)
    return {it: [bits(x) for x in m.predict_rows(rows, it)] for it in ("raw", "averaged")}


def test_a_killed_scorer_is_replaced_and_sigkill_of_serve_leaves_nothing(tmp_path):
    """Must-show 3 (one box): the learner and the other scorer carry on; then nothing outlives serve."""
    cfg, server = start_serve(tmp_path, scorers=2)
    try:
        learner_pid = server.proc.pid
        pids = wait_for(lambda: len(p := scorer_pids(server)) == 2 and p)
        front = Conn(server.url)
        _ingest(front, demo_events(1000, tag="k"))
        # a client held on one scorer, and the other scorer killed
        kept = front.call("GET", "/v1/model/serving")[1]["pid"]
        victim = next(p for p in pids if p != kept)
        served_before = front.call("POST", "/v1/score", {"features": PROBES[0]})[1]["version"]
        psutil.Process(victim).send_signal(signal.SIGKILL)
        wait_for(lambda: victim not in scorer_pids(server))
        # the kept connection's scorer keeps answering, the learner keeps learning (same process)
        status, got = front.call("POST", "/v1/score", {"features": PROBES[0]})
        assert status == 200 and got["version"]["published"] >= served_before["published"]
        assert front.call("GET", "/v1/model/serving")[1]["pid"] == kept
        last = _ingest(front, demo_events(1000, tag="k", start=1000))
        assert last["applied_seq"] == 2000 and server.proc.poll() is None and server.proc.pid == learner_pid
        # a replacement starts and serves
        new = wait_for(lambda: len(p := scorer_pids(server)) == 2 and set(p) - {kept})
        assert victim not in new
        text = front.call("GET", "/metrics")[1]["text"]
        assert "trimtab_scorer_restarts 1.0" in text
        front.close()
        port = int(server.url.rsplit(":", 1)[1])
        everyone = [learner_pid, *scorer_pids(server)]
        # SIGKILL of serve: every scorer exits, and nothing listens on the port any more (a bind with
        # SO_REUSEADDR, as a restarted serve makes, succeeds past closed connections, never past a listener)
        server.kill()
        wait_for(lambda: not [p for p in everyone if _alive(p)], timeout=10)
        with socket.socket() as s:
            s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            s.bind(("127.0.0.1", port))
            s.listen()
    finally:
        if server.proc.poll() is None:
            server.kill()


def _alive(pid: int) -> bool:
    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False


def test_scorers_zero_is_one_process_and_readiness_shows_the_role(tmp_path):
    """``service.scorers = 0``: no child process, the learner answers the address (no publication);
    with scorers, ``/readyz`` adds the scorer's version and the metrics show the published version."""
    _, server = start_serve(tmp_path / "one", scorers=0)
    try:
        front = Conn(server.url)
        _ingest(front, demo_events(600, tag="z"))
        got = front.call("POST", "/v1/score", {"features": PROBES[0]})[1]
        assert set(got["version"]) == {"seq", "updates"} and got["version"]["seq"] == 600
        assert scorer_pids(server) == [] and "scorer" not in front.call("GET", "/readyz")[1]
        front.close()
    finally:
        assert server.stop() == 0
    _, server = start_serve(tmp_path / "two", scorers=1)
    try:
        front = Conn(server.url)
        _ingest(front, demo_events(600, tag="z"))
        ready = wait_for(lambda: (r := front.call("GET", "/readyz")[1])["scorer"]["version"] > 1 and r)
        assert ready["ready"] and ready["applied_seq"] == 600 and ready["scorer"]["age_s"] >= 0
        text = front.call("GET", "/metrics")[1]["text"]
        assert "trimtab_published_version " in text and 'trimtab_scorer_published_version{scorer="0"}' in text
        front.close()
    finally:
        assert server.stop() == 0


def test_compressed_bodies_pass_through_a_scorer_both_ways(tmp_path):
    """Content-Encoding is end to end (RFC 9110, section 8.4): a gzip request body a scorer passes to the
    learner keeps its label (so the learner can undo it), and a gzip answer keeps its label too (a
    browser decodes the page's health route only with it)."""
    import gzip
    import urllib.request

    import orjson

    from tests.service.servicekit import AUTH

    _, server = start_serve(tmp_path, scorers=1)
    try:
        body = gzip.compress(b"\n".join(orjson.dumps(e) for e in demo_events(300, tag="gz")))
        req = urllib.request.Request(server.url + "/v1/events", data=body, method="POST", headers={
            **AUTH, "Content-Type": "application/x-ndjson", "Content-Encoding": "gzip"})
        with urllib.request.urlopen(req, timeout=30) as r:
            assert r.status == 200 and orjson.loads(r.read())["accepted"] == 300
        req = urllib.request.Request(server.url + "/v1/health", headers={**AUTH, "Accept-Encoding": "gzip"})
        with urllib.request.urlopen(req, timeout=30) as r:
            raw = r.read()
            encoding = r.headers.get("Content-Encoding")
        health = orjson.loads(gzip.decompress(raw) if encoding == "gzip" else raw)
        assert encoding == "gzip" and raw[:2] == b"\x1f\x8b"  # the learner compresses this route
        assert health["model"] and health["version"]
    finally:
        assert server.stop() == 0


def test_a_body_is_published_once_per_slice_and_its_last_with_its_position(tmp_path):
    """A body of 250 events in slices of 100 is three publications (after each slice; the last one
    names the body's position), not one more for the position alone; a scorer then serves it."""
    cfg, server = start_serve(tmp_path, scorers=1, apply_slice=100)
    try:
        front, learner = Conn(server.url), Conn(unix=learner_socket(server))

        def published() -> float:
            text = learner.call("GET", "/metrics")[1]["text"]
            return float(next(line.split()[1] for line in text.splitlines()
                              if line.startswith("trimtab_published_version ")))

        _ingest(front, demo_events(100, tag="w"))  # the first body after start-up
        before = published()
        got = _ingest(front, demo_events(250, tag="p"), batch=250)
        assert published() - before == 3
        answer = wait_for(lambda: (a := front.call("POST", "/v1/score", {"events": [{"features": PROBES[0]}]})[1])
                          ["version"]["seq"] == got["applied_seq"] and a)
        assert answer["version"]["seq"] == got["applied_seq"] == 350
        front.close()
        learner.close()
    finally:
        assert server.stop() == 0
