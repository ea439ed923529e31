"""The learner's local scorer processes: started, watched, replaced, and tied to the learner's life.

``trimtab serve`` with ``service.scorers`` above 0 runs one learner process (this one) and that many
scorer processes (:mod:`service.http.scorer`). The learner opens the listening socket of the
configured address and the publication file (:mod:`service.publish.shared`) and hands both to each
scorer as inherited descriptors, with the read end of a *life pipe* whose write end only the
learner holds. A scorer exits when:

* the learner exits in any way, SIGKILL included: the kernel sends it SIGTERM (``prctl`` with
  ``PR_SET_PDEATHSIG`` on Linux), and its life pipe reads end-of-file (everywhere);
* the learner stops it (SIGTERM at shutdown).

:class:`ScorerFleet` watches its scorers from one thread and starts a replacement for one that
exits while the service runs (after 0.2 s, doubling up to 5 s while replacements keep dying within
2 s). That thread keeps the scheduling priority the learner started with; the learner then lowers
its own threads' (:func:`lower_learner_priority`: a higher nice value and, on Linux, the scheduling
policy ``service.learner_policy`` names), so that replacements, which inherit the priority of the
thread that starts them, still run ahead of the learner's work.
"""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from dataclasses import dataclass, field

import orjson

__all__ = ["LEARNER_NICE", "PolicyGuard", "ScorerFleet", "ScorerSetup", "auto_scorers", "lower_learner_priority"]

log = logging.getLogger("trimtab.service")

#: how much lower the learner's threads are scheduled than the scorers (a Linux nice value per thread)
LEARNER_NICE = 5
#: the environment variable that carries a scorer's setup (JSON) from the learner to the child
SETUP_ENV = "TRIMTAB_SCORER_SETUP"
#: ``learner_policy = "auto"``: the learner is behind after this many seconds without applying an event
#: while events wait (or with half the queue waiting), and caught up after this many with at most a
#: quarter waiting (values of common practice for a watchdog's hysteresis, no published source)
STARVED_S, CALM_S = 0.5, 5.0


def auto_scorers() -> int:
    """``service.scorers = "auto"``: one scorer per CPU this process may use, but one for the learner, at least 1."""
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, cpus - 1)


def lower_learner_priority(policy: str, keep: tuple[int, ...] = ()) -> str:
    """Schedule the learner's threads behind the scorers; return what was done (for the log).

    Every thread of this process but those in ``keep`` (native thread ids: the fleet's watcher,
    whose children must start at the scorers' priority) is lowered to :data:`LEARNER_NICE` above the
    calling thread's nice value (a worker already that low stays so: the learner's threads end up
    level, whenever they started) and put under ``policy`` (``service.learner_policy``, Linux);
    threads started later inherit both from the thread that starts them. ``"batch"`` (``SCHED_BATCH``): the learner's threads never preempt
    a scorer that wakes up with a request, and take their turns in longer slices; ``"idle"``
    (``SCHED_IDLE``): they run only on a CPU nothing else wants (ingest stalls on a saturated
    machine); ``"normal"``: the nice value alone."""
    kind = {"batch": getattr(os, "SCHED_BATCH", None), "idle": getattr(os, "SCHED_IDLE", None)}.get(policy)
    tids = [int(t) for t in os.listdir("/proc/self/task")] if os.path.isdir("/proc/self/task") \
        else [threading.get_native_id()]
    done = f"nice +{LEARNER_NICE}"
    here = threading.get_native_id()
    lowered = min(19, os.getpriority(os.PRIO_PROCESS, here) + LEARNER_NICE) if hasattr(os, "getpriority") else 0
    for tid in tids:
        if tid in keep:
            continue
        if hasattr(os, "setpriority"):
            with suppress(OSError):
                os.setpriority(os.PRIO_PROCESS, tid, max(lowered, os.getpriority(os.PRIO_PROCESS, tid)))
        if kind is not None:
            try:
                os.sched_setscheduler(tid, kind, os.sched_param(0))
            except OSError:
                kind = None  # not permitted here: the nice value alone
    return done + (f", {policy.upper()} scheduling" if kind is not None else "")


def _may_leave_idle() -> bool:
    """Whether this process's threads may go from ``SCHED_IDLE`` back to another policy: Linux lets a
    thread do so only with ``CAP_SYS_NICE`` or an ``RLIMIT_NICE`` that admits its nice value. Tried on a
    short-lived thread of its own, so no thread that matters is left under ``SCHED_IDLE``."""
    if not hasattr(os, "SCHED_IDLE"):
        return False
    answer = []

    def probe():
        tid = threading.get_native_id()
        try:
            os.setpriority(os.PRIO_PROCESS, tid, min(19, os.getpriority(os.PRIO_PROCESS, tid) + LEARNER_NICE))
            os.sched_setscheduler(tid, os.SCHED_IDLE, os.sched_param(0))
            os.sched_setscheduler(tid, os.SCHED_BATCH, os.sched_param(0))
            answer.append(True)
        except OSError:
            answer.append(False)

    t = threading.Thread(target=probe, name="trimtab-policy-probe")
    t.start()
    t.join()
    return answer[0]


class PolicyGuard:
    """``service.learner_policy = "auto"``: the learner's threads under ``SCHED_IDLE`` (scores never wait
    for learning) while the learner keeps up, under ``SCHED_BATCH`` (a share of its own) while it falls
    behind: for :data:`STARVED_S` the event loop did not run (so no request was even read) or events
    waited and none was applied, or half of ``service.queue_limit`` waits. Back to ``SCHED_IDLE`` after
    :data:`CALM_S` with at most a quarter waiting. Where the process may not leave ``SCHED_IDLE`` (no
    ``CAP_SYS_NICE``, ``RLIMIT_NICE`` too low) it stays under ``SCHED_BATCH``. :meth:`tick` runs on the scorers' watcher thread, which keeps its priority, so a
    starved learner cannot starve its own guard.

    ``backlog()`` returns ``(events waiting, journal position applied, event-loop heartbeat)``, the
    heartbeat a count the loop advances every few milliseconds (:class:`service.http.looplag.LoopLag`);
    ``keep`` as for :func:`lower_learner_priority`."""

    def __init__(self, backlog: Callable[[], tuple[int, int, int]], limit: int, keep: tuple[int, ...]) -> None:
        self.backlog, self.limit, self.keep = backlog, limit, keep
        self.policy, self.switches = "batch", 0
        self.adaptive = _may_leave_idle()
        self._applied = self._beat = -1
        self._progress_at = self._calm_since = time.monotonic()

    def start(self) -> str:
        """Lower the learner's threads; return what was done (for the log)."""
        self.policy = "idle" if self.adaptive else "batch"
        done = lower_learner_priority(self.policy, self.keep)
        return done + (" while it keeps up, BATCH while it falls behind" if self.adaptive
                       else " (the idle policy is not used: this system has none, or a thread under it could not "
                             "leave it again: no CAP_SYS_NICE, RLIMIT_NICE too low)")

    def tick(self, now: float) -> None:
        waiting, applied, beat = self.backlog()
        if beat != self._beat and (applied != self._applied or not waiting):
            self._progress_at = now
        self._applied, self._beat = applied, beat
        behind = waiting >= self.limit / 2 or now - self._progress_at >= STARVED_S
        if behind or waiting > self.limit / 4:
            self._calm_since = now
        if self.adaptive and behind and self.policy == "idle":
            self._switch("batch", f"no progress for {now - self._progress_at:.1f} s, {waiting} events waiting")
        elif self.policy == "batch" and self.adaptive and now - self._calm_since >= CALM_S:
            self._switch("idle", f"caught up ({waiting} events waiting)")

    def _switch(self, policy: str, why: str) -> None:
        lower_learner_priority(policy, self.keep)
        self.policy, self.switches = policy, self.switches + 1
        log.info("learner threads now under SCHED_%s: %s", policy.upper(), why)


@dataclass
class ScorerSetup:
    """What a scorer process needs from the learner (sent as JSON in :data:`SETUP_ENV`)."""

    config: dict            # the resolved config
    listen_fd: int          # the listening socket of the configured address
    model_fd: int           # the publication file
    life_fd: int            # read end of the life pipe
    learner: str            # the learner's local socket (abstract Unix name, "\0..."), for forwarded requests
    parent: int             # the learner's process id
    index: int = 0

    def to_env(self) -> str:
        return orjson.dumps(self.__dict__).decode()

    @classmethod
    def from_env(cls, text: str) -> ScorerSetup:
        return cls(**orjson.loads(text))


@dataclass
class _Slot:
    index: int
    proc: subprocess.Popen | None = None
    started: float = 0.0
    delay: float = 0.2
    due: float = 0.0          # monotonic time a replacement may start


@dataclass
class ScorerFleet:
    """``count`` scorer processes for the learner, kept running until :meth:`stop`.

    Parameters
    ----------
    count
        Scorer processes to run.
    setup
        The setup every scorer gets (its ``index`` is set per scorer).
    """

    count: int
    setup: ScorerSetup
    restarts: int = 0
    _slots: list[_Slot] = field(default_factory=list)
    _stop: threading.Event = field(default_factory=threading.Event)
    _thread: threading.Thread | None = None
    _life_w: int = -1
    _lock: threading.Lock = field(default_factory=threading.Lock)
    #: called with ``time.monotonic()`` on every round of the watcher thread (a :class:`PolicyGuard`)
    on_tick: Callable[[float], None] | None = None

    def watcher_id(self) -> int:
        """Native id of the thread that watches and replaces the scorers (0 before :meth:`start`)."""
        return self._thread.native_id or 0 if self._thread is not None else 0

    def start(self) -> None:
        """Create the life pipe, start the scorers and the thread that watches them."""
        r, self._life_w = os.pipe()  # both ends close-on-exec: only listed descriptors reach a scorer
        self.setup.life_fd = r
        self._slots = [_Slot(k) for k in range(self.count)]
        started = threading.Event()
        self._thread = threading.Thread(target=self._watch, args=(started,), name="trimtab-scorers", daemon=True)
        self._thread.start()
        started.wait(30)

    @property
    def pids(self) -> list[int]:
        """Process ids of the scorers running now."""
        with self._lock:
            return [s.proc.pid for s in self._slots if s.proc is not None and s.proc.poll() is None]

    def _spawn(self, slot: _Slot) -> None:
        s = self.setup
        setup = ScorerSetup(**{**s.__dict__, "index": slot.index})
        slot.proc = subprocess.Popen([sys.executable, "-m", "service.http.scorer"], stdin=subprocess.DEVNULL,
                                     pass_fds=(s.listen_fd, s.model_fd, s.life_fd),
                                     env={**os.environ, SETUP_ENV: setup.to_env()})
        slot.started = time.monotonic()
        log.info("scorer %d started (pid %d)", slot.index, slot.proc.pid)

    def _watch(self, started: threading.Event) -> None:
        with self._lock:
            for slot in self._slots:
                self._spawn(slot)
        started.set()
        while not self._stop.wait(0.05):
            now = time.monotonic()
            if self.on_tick is not None:
                try:
                    self.on_tick(now)
                except Exception:  # noqa: BLE001 - the scorers are watched whatever the guard does
                    log.exception("the learner's priority guard failed")
            with self._lock:
                for slot in self._slots:
                    if slot.proc is not None:
                        code = slot.proc.poll()
                        if code is None:
                            continue
                        quick = now - slot.started < 2.0
                        slot.delay = min(5.0, slot.delay * 2) if quick else 0.2
                        slot.due = now + slot.delay
                        log.warning("scorer %d (pid %d) exited with status %s; a replacement starts in %.1f s",
                                    slot.index, slot.proc.pid, code, slot.delay)
                        slot.proc = None
                    if now >= slot.due and not self._stop.is_set():
                        self._spawn(slot)
                        self.restarts += 1

    def stop(self, timeout: float = 10.0) -> None:
        """Stop watching, ask every scorer to finish (SIGTERM), kill those that do not within ``timeout``."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(30)
        with self._lock:
            procs = [s.proc for s in self._slots if s.proc is not None]
        for p in procs:
            with suppress(ProcessLookupError):
                p.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + timeout
        for p in procs:
            try:
                p.wait(max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                log.warning("scorer pid %d did not stop within %.0f s: killed", p.pid, timeout)
                p.kill()
                p.wait(10)
        if self._life_w >= 0:
            os.close(self._life_w)
            self._life_w = -1
        with suppress(OSError):
            os.close(self.setup.life_fd)
