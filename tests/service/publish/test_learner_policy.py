"""``service.learner_policy``: the learner's threads run under the configured Linux scheduling policy,
the scorers and the thread that starts them do not.

The reference is the kernel's own account of each thread (``sched_getscheduler`` and the nice value
of every task under ``/proc/<pid>/task``), read from outside the process that set it.
"""

from __future__ import annotations

import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.service.publish.scorerkit import scorer_pids, start_serve, wait_for

pytestmark = pytest.mark.skipif(not hasattr(os, "SCHED_IDLE"), reason="Linux scheduling policies")

ROOT = Path(__file__).resolve().parents[3]
POLICY = {"batch": "SCHED_BATCH", "idle": "SCHED_IDLE", "normal": "SCHED_OTHER"}
_NAMES = {getattr(os, name): name for name in ("SCHED_OTHER", "SCHED_BATCH", "SCHED_IDLE")}

# a process with a thread that must keep its priority (as the fleet's watcher does), one lowered before
# (a worker) and one started after
_CHILD = """
import json, os, sys, threading
from service.http.fleet import lower_learner_priority
stop = threading.Event()
ids = {}
def run(name, ready):
    tid = ids[name] = threading.get_native_id()
    if name == "early":  # a worker that lowered itself before, as service.ingest.background_thread does
        os.setpriority(os.PRIO_PROCESS, tid, os.getpriority(os.PRIO_PROCESS, tid) + 5)
    ready.set()
    stop.wait()
def start(name):
    ready = threading.Event()
    threading.Thread(target=run, args=(name, ready)).start()
    ready.wait()
start("kept")
start("early")
done = lower_learner_priority(sys.argv[1], keep=(ids["kept"],))
start("later")
print(json.dumps({"done": done, "main": threading.get_native_id(), **ids}), flush=True)
sys.stdin.read()
stop.set()
"""


def _state(tid: int) -> tuple[str, int]:
    return _NAMES.get(os.sched_getscheduler(tid), "other"), os.getpriority(os.PRIO_PROCESS, tid)


@pytest.mark.parametrize("policy", ["batch", "idle", "normal"])
def test_each_policy_lowers_every_thread_but_the_kept_one(policy):
    """Threads running when it is called and threads they start later: the policy and nice +5; a
    thread already at +5 stays there (not +10); the kept thread stays as it was."""
    proc = subprocess.Popen([sys.executable, "-c", _CHILD, policy], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            text=True, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)})
    try:
        ids = json.loads(proc.stdout.readline())
        base = os.getpriority(os.PRIO_PROCESS, 0)
        assert _state(ids["main"]) == (POLICY[policy], min(19, base + 5)), ids
        assert _state(ids["later"]) == (POLICY[policy], min(19, base + 5)), ids
        assert _state(ids["early"]) == (POLICY[policy], min(19, base + 5)), ids
        assert _state(ids["kept"]) == ("SCHED_OTHER", base), ids
        assert ids["done"].startswith("nice +5") and (policy == "normal") == ("scheduling" not in ids["done"])
    finally:
        proc.communicate("", timeout=30)


def test_serve_runs_its_learner_under_the_configured_policy(tmp_path):
    """``trimtab serve`` with ``learner_policy = "idle"``: every learner thread but the scorers'
    watcher is SCHED_IDLE at nice +5 (workers started before and after alike); the scorer process
    is at the default policy and priority, and the log says what was done."""
    _, server = start_serve(tmp_path, scorers=1, learner_policy="idle")
    try:
        scorer = wait_for(lambda: len(p := scorer_pids(server)) == 1 and p[0])
        base = os.getpriority(os.PRIO_PROCESS, 0)
        learner = [_state(int(t)) for t in os.listdir(f"/proc/{server.proc.pid}/task")]
        assert learner.count(("SCHED_OTHER", base)) == 1, learner  # the watcher that starts scorers
        # the loop and its workers level, whether they started before the learner lowered itself or after
        assert set(learner) - {("SCHED_OTHER", base)} == {("SCHED_IDLE", min(19, base + 5))}, learner
        assert {_state(int(t)) for t in os.listdir(f"/proc/{scorer}/task")} == {("SCHED_OTHER", base)}
        assert any("nice +5, IDLE scheduling" in line for line in server.log), "".join(server.log)
    finally:
        assert server.stop() == 0


_HOG = "import sys, time\nend = time.monotonic() + float(sys.argv[1])\nwhile time.monotonic() < end:\n    pass\n"


def _learner_policies(server) -> set[str]:
    """The policies of the learner's threads but the scorers' watcher (the one at the default policy)."""
    states = [_state(int(t))[0] for t in os.listdir(f"/proc/{server.proc.pid}/task")]
    states.remove("SCHED_OTHER")
    return set(states)


def test_auto_puts_scores_first_and_lets_a_starved_learner_catch_up(tmp_path):
    """The default, ``"auto"``: the learner's threads under SCHED_IDLE while it keeps up. With every core
    taken by busy processes at the default priority (bounded: 40 s), a learner left under SCHED_IDLE
    would get a few thousandths of a core and take many seconds to answer a 500-event body; the guard
    moves it to SCHED_BATCH within about half a second, the body is acknowledged, and once the cores
    are free the learner returns to SCHED_IDLE. The log and ``/metrics`` say what happened."""
    from tests.service.publish.scorerkit import Conn
    from tests.service.servicekit import demo_events

    _, server = start_serve(tmp_path, scorers=1)
    hogs: list[subprocess.Popen] = []
    try:
        wait_for(lambda: len(scorer_pids(server)) == 1)
        assert _learner_policies(server) == {"SCHED_IDLE"}
        assert any("IDLE scheduling while it keeps up" in line for line in server.log), "".join(server.log)
        hogs = [subprocess.Popen([sys.executable, "-c", _HOG, "40"]) for _ in range(os.cpu_count() or 2)]
        time.sleep(1.0)
        start = time.monotonic()
        conn = Conn(server.url)
        status, answer = conn.call("POST", "/v1/events", demo_events(500, tag="starved"), ndjson=True)
        took = time.monotonic() - start
        conn.close()
        assert status == 200 and answer["accepted"] == 500, answer
        assert took < 15.0, took
        assert any("now under SCHED_BATCH" in line for line in server.log), "".join(server.log)
        for hog in hogs:
            hog.kill()
        wait_for(lambda: _learner_policies(server) == {"SCHED_IDLE"}, timeout=30)
        assert any("now under SCHED_IDLE: caught up" in line for line in server.log), "".join(server.log)
        conn = Conn(server.url)
        _, metrics = conn.call("GET", "/metrics")
        conn.close()
        switches = [line for line in metrics["text"].splitlines() if line.startswith("trimtab_learner_policy_switches ")]
        assert switches and float(switches[0].split()[1]) >= 2.0, switches
    finally:
        for hog in hogs:
            hog.kill()
            hog.wait()
        assert server.stop() == 0


def test_the_guard_s_rule_on_a_made_up_clock(monkeypatch):
    """:class:`PolicyGuard`'s decisions alone, on a clock and a backlog of our own: behind after
    ``STARVED_S`` without progress while events wait (or with half the queue waiting, progress or
    not), never while nothing waits and the loop runs, back after ``CALM_S`` of calm; and never a
    switch where the process may not leave SCHED_IDLE. (What a switch does to the threads is the
    test above, on a real server.)"""
    from service.http import fleet

    done = []
    monkeypatch.setattr(fleet, "lower_learner_priority", lambda policy, keep=(): done.append(policy) or "")
    monkeypatch.setattr(fleet, "_may_leave_idle", lambda: True)
    state = {"waiting": 0, "applied": 0, "beat": 0}
    guard = fleet.PolicyGuard(lambda: (state["waiting"], state["applied"], state["beat"]), 1000, ())
    guard.start()
    assert guard.policy == "idle" and done == ["idle"]

    def run(t0: float, t1: float, step: float = 0.05, **change) -> None:
        t = t0
        while t <= t1 + 1e-9:
            state["beat"] += 1  # the event loop runs
            for key, delta in change.items():
                state[key] += delta
            guard.tick(t)
            t += step

    run(0.0, 10.0)  # nothing waits: never behind
    state["waiting"] = 10
    run(10.0, 10.0 + fleet.STARVED_S - 0.1)  # events wait, none applied yet, not for long
    assert guard.policy == "idle"
    run(10.5, 11.0)
    assert guard.policy == "batch" and done == ["idle", "batch"]
    run(11.0, 11.0 + fleet.CALM_S - 0.2, applied=5)  # progress again, a few events waiting: calm, not yet long enough
    assert guard.policy == "batch"
    run(16.0, 17.0, applied=5)
    assert guard.policy == "idle" and guard.switches == 2
    state["waiting"] = 600  # half the queue waits, though events are applied
    run(17.0, 17.1, applied=5)
    assert guard.policy == "batch"

    monkeypatch.setattr(fleet, "_may_leave_idle", lambda: False)
    done.clear()
    stuck = fleet.PolicyGuard(lambda: (10, 0, 0), 1000, ())
    assert "not used" in stuck.start() and done == ["batch"]
    for k in range(100):
        stuck.tick(k * 0.1)
    assert stuck.policy == "batch" and stuck.switches == 0 and done == ["batch"]


_GUARD_CHILD = """
import json, os, threading
from service.http.fleet import PolicyGuard
guard = PolicyGuard(lambda: (0, 0, 0), 1000, ())
said = guard.start()
print(json.dumps({"adaptive": guard.adaptive, "said": said, "policy": os.sched_getscheduler(threading.get_native_id()),
                  "nice": os.getpriority(os.PRIO_PROCESS, threading.get_native_id())}))
"""


@pytest.mark.skipif(shutil.which("setpriv") is None or os.geteuid() != 0, reason="util-linux setpriv, run as root")
def test_a_learner_that_could_not_leave_the_idle_policy_stays_under_batch():
    """Linux lets a thread leave SCHED_IDLE only with CAP_SYS_NICE or an RLIMIT_NICE that admits its nice
    value. A process started without CAP_SYS_NICE (``setpriv``) and with RLIMIT_NICE 0 (the usual
    default) finds out on its throw-away thread and puts the learner under SCHED_BATCH, saying why;
    the same code with CAP_SYS_NICE uses the idle policy."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    limit = resource.getrlimit(resource.RLIMIT_NICE)[0]
    if limit == resource.RLIM_INFINITY or limit >= 15:
        pytest.skip(f"RLIMIT_NICE {limit} admits nice +5 here")
    bare = subprocess.run(["setpriv", "--inh-caps=-sys_nice", "--bounding-set=-sys_nice", "--", sys.executable,
                           "-c", _GUARD_CHILD], env=env, capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert bare.returncode == 0, bare.stderr[-2000:]
    got = json.loads(bare.stdout.strip().splitlines()[-1])
    assert got["adaptive"] is False and "not used" in got["said"], got
    assert got["policy"] == os.SCHED_BATCH and got["nice"] >= 5, got
    full = subprocess.run([sys.executable, "-c", _GUARD_CHILD], env=env, capture_output=True, text=True, timeout=60,
                          cwd=ROOT)
    assert full.returncode == 0, full.stderr[-2000:]
    got = json.loads(full.stdout.strip().splitlines()[-1])
    assert got["adaptive"] is True and got["policy"] == os.SCHED_IDLE, got
