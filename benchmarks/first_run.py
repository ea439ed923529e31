"""A new user's first commands, on a machine where nothing is compiled yet and then again.

Each measurement runs as its own process tree, timed from start to exit, with the CPU time (user +
system) of the whole tree beside the wall time: on a shared machine the wall time also counts the
waits for a core. numba's cache is pointed (``NUMBA_CACHE_DIR``) at a fresh empty folder for the
cold runs, and the warm runs reuse the folder the cold run filled; the kernels built ahead of time
(``service.kernels``) are left out (``TRIMTAB_KERNELS=jit``):

* ``demo_cold`` / ``demo_warm``: ``trimtab demo --out DIR`` (both demo configs over the shipped
  103,680-event feed, with the report);
* ``serve_cold`` / ``serve_warm``: ``trimtab serve`` on the guarded demo config: seconds from start
  to the "listening" log line, to ``/readyz`` 200, to the first ``/v1/score`` answered 200 (the
  first score) and to the first acknowledged write of 500 demo events sent right after; then stopped
  with SIGTERM;
* ``check_config``: ``trimtab check-config guarded.toml`` (fastest of 5);
* ``python``: ``python3 -c pass`` (fastest of 5), the same-run baseline of a process start.

Goals (issue 14): ``demo_cold_s`` <= 30, ``serve_cold_first_ack_s`` <= 15 (from start),
``check_config_s`` < 1. Ratios against same-run baselines: ``demo_cold_vs_warm``,
``serve_first_ack_cold_vs_warm``, ``check_config_vs_python``. The last line is one JSON object.

Usage: ``python3 benchmarks/first_run.py [--rounds K] [--only demo serve check]`` (medians over rounds).
"""

from __future__ import annotations

import argparse
import ctypes
import errno
import gzip
import json
import os
import platform
import re
import resource
import secrets
import signal
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "replay_data" / "configs" / "guarded.toml"
FEED = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
CLI = [sys.executable, "-m", "service.cli"]
_PR_SET_CHILD_SUBREAPER = 36


def _adopt_orphans() -> None:
    """Become the reaper of orphaned descendants (Linux), so that the CPU time of processes whose
    parent exits without waiting for them (multiprocessing's fork server) is counted too."""
    try:
        ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0)
    except (OSError, AttributeError):
        pass


def _reap(deadline_s: float = 20.0) -> None:
    """Wait for every remaining descendant (orphans that were re-parented here) for a while."""
    end = time.monotonic() + deadline_s
    while time.monotonic() < end:
        try:
            pid, _ = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return
        except OSError as exc:
            if exc.errno == errno.ECHILD:
                return
            raise
        if pid == 0:
            time.sleep(0.05)


def _cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def _env(cache: Path) -> dict:
    path = os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))
    # numba's JIT only (TRIMTAB_KERNELS=jit): no kernels built ahead of time from the user's cache
    # folder, and no background build after the cold run to blur the warm one (benchmarks/replay.py
    # measures the ahead-of-time start)
    return {**os.environ, "PYTHONPATH": path, "NUMBA_CACHE_DIR": str(cache), "TRIMTAB_KERNELS": "jit",
            "TRIMTAB_CACHE_DIR": str(cache / "trimtab")}


def timed(cmd: list[str], env: dict) -> tuple[float, float]:
    """Wall and CPU seconds of ``cmd``'s whole process tree."""
    c0, t0 = _cpu(), time.perf_counter()
    proc = subprocess.run(cmd, env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    wall = time.perf_counter() - t0
    _reap()
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed:\n{proc.stderr.decode(errors='replace')[-3000:]}")
    return wall, _cpu() - c0


def demo_events(n: int) -> list[dict]:
    """The first ``n`` well-formed events of the demo feed (it also holds malformed lines on purpose)."""
    out = []
    for line in gzip.open(FEED).read().split(b"\n"):
        try:
            obj = json.loads(line)
        except ValueError:
            continue
        if (isinstance(obj, dict) and set(obj) == {"id", "ts", "features", "target"}
                and isinstance(obj["target"], float) and isinstance(obj["features"], dict)
                and all(_plain(v) for v in obj["features"].values())):
            out.append(obj)
            if len(out) == n:
                break
    return out


def _plain(value) -> bool:
    """A string, or a finite number that is not a boolean."""
    if isinstance(value, str):
        return True
    return isinstance(value, (int, float)) and not isinstance(value, bool) and abs(value) < float("inf")


def _call(url: str, body: bytes | None, token: str) -> int:
    req = urllib.request.Request(url, data=body, headers={"Authorization": f"Bearer {token}",
                                                          "Content-Type": "application/json"})
    try:
        with urllib.request.urlopen(req, timeout=300) as r:
            r.read()
            return r.status
    except urllib.error.HTTPError as exc:
        exc.read()
        return exc.code
    except OSError:
        return 0


def serve(cache: Path, work: Path, events: bytes, probe: bytes) -> dict:
    """Seconds from the start of ``trimtab serve`` to: listening, ready, first score, first ack."""
    token = secrets.token_hex(16)
    data = work / f"data-{secrets.token_hex(4)}"
    env = {**_env(cache), "TRIMTAB_TOKEN": token}
    c0, t0 = _cpu(), time.perf_counter()
    proc = subprocess.Popen(CLI + ["serve", "-c", str(CONFIG), "--port", "0", "--data-dir", str(data)],
                            env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    out: dict[str, float] = {}
    try:
        url = None
        for raw in proc.stderr:
            m = re.search(r"listening on (http://\S+)", raw.decode(errors="replace"))
            if m:
                url = m.group(1)
                break
        if url is None:
            raise SystemExit("trimtab serve did not start")
        out["listening_s"] = time.perf_counter() - t0
        while _call(url + "/readyz", None, token) != 200:
            if time.perf_counter() - t0 > 600:
                raise SystemExit("trimtab serve was not ready within 600 s")
            time.sleep(0.02)
        out["ready_s"] = time.perf_counter() - t0
        if _call(url + "/v1/score", probe, token) != 200:
            raise SystemExit("the first score was refused")
        out["first_score_s"] = time.perf_counter() - t0
        t1 = time.perf_counter()
        if _call(url + "/v1/events", events, token) != 200:
            raise SystemExit("the first write was refused")
        out["first_ack_s"] = time.perf_counter() - t0
        out["first_ingest_after_ready_s"] = time.perf_counter() - t1
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=120)
        _reap()
    out["cpu_s"] = _cpu() - c0
    return out


def machine() -> dict:
    model = ""
    try:
        model = next(line.split(":", 1)[1].strip() for line in open("/proc/cpuinfo") if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    import numba
    import numpy

    return {"cpu": model, "cores": os.cpu_count(), "load_average_1min": round(os.getloadavg()[0], 2),
            "python": platform.python_version(), "numpy": numpy.__version__, "numba": numba.__version__,
            "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--only", nargs="*", default=["demo", "serve", "check"], choices=["demo", "serve", "check"])
    args = ap.parse_args()
    _adopt_orphans()
    rows: dict[str, list] = {}
    with tempfile.TemporaryDirectory(prefix="trimtab-first-run-") as tmp:
        work = Path(tmp)
        events = json.dumps(demo_events(500)).encode()
        probe = json.dumps({"features": demo_events(1)[0]["features"]}).encode()
        for r in range(args.rounds):
            if "demo" in args.only:
                cache = work / f"cache-demo-{r}"
                cache.mkdir()
                for kind in ("cold", "warm"):
                    rows.setdefault(f"demo_{kind}", []).append(
                        timed(CLI + ["demo", "--out", str(work / f"demo-{r}-{kind}")], _env(cache)))
            if "serve" in args.only:
                cache = work / f"cache-serve-{r}"
                cache.mkdir()
                for kind in ("cold", "warm"):
                    rows.setdefault(f"serve_{kind}", []).append(serve(cache, work, events, probe))
            if "check" in args.only:
                cache = work / f"cache-check-{r}"
                cache.mkdir()
                best = min((timed(CLI + ["check-config", str(CONFIG)], _env(cache)) for _ in range(5)),
                           key=lambda x: x[0])
                rows.setdefault("check_config", []).append(best)
                rows.setdefault("python", []).append(
                    min((timed([sys.executable, "-c", "pass"], _env(cache)) for _ in range(5)), key=lambda x: x[0]))
    out: dict = {"benchmark": "first_run", "rounds": args.rounds, "machine": machine()}
    print(f"{'measurement':<34} {'wall s':>8} {'cpu s':>8}")
    for name, vals in rows.items():
        if name.startswith("serve"):
            for key in vals[0]:
                med = statistics.median(v[key] for v in vals)
                out[f"{name}_{key}"] = round(med, 3)
                print(f"{name + ' ' + key:<34} {med:8.2f}")
        else:
            wall, cpu = statistics.median(v[0] for v in vals), statistics.median(v[1] for v in vals)
            out[f"{name}_s"], out[f"{name}_cpu_s"] = round(wall, 3), round(cpu, 3)
            print(f"{name:<34} {wall:8.2f} {cpu:8.2f}")
    if "demo_cold_s" in out:
        out["demo_cold_vs_warm"] = round(out["demo_cold_s"] / out["demo_warm_s"], 2)
        out["demo_cold_goal_met"] = out["demo_cold_s"] <= 30
    if "serve_cold_first_ack_s" in out:
        out["serve_first_ack_cold_vs_warm"] = round(out["serve_cold_first_ack_s"] / out["serve_warm_first_ack_s"], 2)
        out["serve_cold_first_ack_goal_met"] = out["serve_cold_first_ack_s"] <= 15
    if "check_config_s" in out:
        out["check_config_vs_python"] = round(out["check_config_s"] / out["python_s"], 2)
        out["check_config_goal_met"] = out["check_config_s"] < 1
    print(json.dumps(out))


if __name__ == "__main__":
    main()
