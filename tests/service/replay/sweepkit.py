"""What the sweep tests share: a small scenario feed, the 3 x 2 grid, and its six configs written by hand.

The reference for every sweep test is ``trimtab replay`` run one config at a time on configs made
by editing the base TOML file's text (not by the sweep's own grid code), so a sweep that derived a
config wrongly or ran it differently shows up as a different ``state_digest``.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
from pathlib import Path

from service.cli import main
from service.replay.scenario import write_ndjson

ROOT = Path(__file__).resolve().parents[3]
BASE = ROOT / "replay_data" / "configs" / "guarded.toml"
RULES = ("anytime", "sqrt_decay", "constant")
SCHEMES = ("uniform", "weighted")
VARY = ["--vary", "steps.rule=" + ",".join(RULES), "--vary", "averaging.scheme=" + ",".join(SCHEMES)]


def run_name(rule: str, scheme: str) -> str:
    """The name the sweep gives a run: the last part of each varied key, a dash, the value."""
    return f"rule-{rule}.scheme-{scheme}"


def make_feed(folder: Path, events: int) -> Path:
    """A scenario feed (drift, a faulty-sensor burst and malformed lines included)."""
    path = folder / f"coldchain-{events}.ndjson"
    write_ndjson(path, events, seed=11)
    return path


def hand_configs(folder: Path) -> dict[str, Path]:
    """The six configs of the grid, each the base file with two lines edited."""
    text = BASE.read_text(encoding="utf-8")
    folder.mkdir(parents=True, exist_ok=True)
    out = {}
    for rule in RULES:
        for scheme in SCHEMES:
            name = run_name(rule, scheme)
            edited = re.sub(r'(?m)^name = .*$', f'name = "{name}"', text)
            edited = re.sub(r'(?m)^rule = .*$', f'rule = "{rule}"', edited)
            edited = re.sub(r'(?m)^scheme = .*$', f'scheme = "{scheme}"', edited)
            path = folder / f"{name}.toml"
            path.write_text(edited, encoding="utf-8")
            out[name] = path
    return out


def replay_digests(feed: Path, folder: Path) -> dict[str, str]:
    """``state_digest`` of each of the six configs, replayed one by one by ``trimtab replay``."""
    configs = hand_configs(folder / "configs")
    digests = {}
    for name, path in configs.items():
        out = folder / "replay" / name
        assert main(["replay", str(feed), "-c", str(path), "--out", str(out), "--no-report", "--jobs", "1",
                     "--no-progress"]) == 0
        [run] = json.loads((out / "summary.json").read_text())["runs"]
        digests[run["name"]] = run["state_digest"]
    assert len(set(digests.values())) == 6, "the grid should give six different models"
    return digests


def sweep_digests(out: Path) -> dict[str, str]:
    sweep = json.loads((out / "sweep.json").read_text())
    return {row["name"]: row["state_digest"] for row in sweep["ranking"]}


def env() -> dict:
    """The environment of a subprocess that must run this checkout's code."""
    return dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))


def start(args: list[str], **kwargs) -> subprocess.Popen:
    """A process in its own session, so that :func:`stop` can end it and every child it started."""
    return subprocess.Popen(args, env=env(), start_new_session=True, **kwargs)


def stop(proc: subprocess.Popen, timeout: float = 15) -> None:
    """End ``proc`` and its process group (SIGTERM, then SIGKILL)."""
    if proc.poll() is None:
        try:
            os.killpg(proc.pid, signal.SIGTERM)
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=timeout)
        except ProcessLookupError:
            pass
    try:
        os.killpg(proc.pid, signal.SIGKILL)  # children left behind by a process that did exit
    except (ProcessLookupError, PermissionError):
        pass


PYTHON = sys.executable
