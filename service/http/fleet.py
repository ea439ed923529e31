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
from contextlib import suppress
from dataclasses import dataclass, field

import orjson

__all__ = ["LEARNER_NICE", "ScorerFleet", "ScorerSetup", "auto_scorers", "lower_learner_priority"]

log = logging.getLogger("trimtab.service")

#: how much lower the learner's threads are scheduled than the scorers (a Linux nice value per thread)
LEARNER_NICE = 5
#: the environment variable that carries a scorer's setup (JSON) from the learner to the child
SETUP_ENV = "TRIMTAB_SCORER_SETUP"


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
