"""Promote a replay to live: a run's final state as the first checkpoint of an empty data dir.

Every ``trimtab replay`` run writes its final engine state beside its ``model.json``
(:func:`write_run_state`): ``DIR/NAME/state.bin`` in the checkpoint format
(``docs/checkpoint-format.md``, :meth:`service.engine.Engine.to_bytes`) and ``DIR/NAME/state.json``
(its SHA-256, the model's ``state_digest``, the events seen and the run's learning settings).
``trimtab serve -c CONFIG --start-from DIR/NAME`` then calls :func:`start_from`, which refuses

* a data dir that is not empty (a journal there already has a history of its own);
* a state file whose SHA-256 is not the one recorded, or that this version cannot read;
* a config whose learning settings (``[features]``, ``[model]``, ``[constraint]``, ``[steps]``,
  ``[averaging]``, ``[monitor]``: the sections the journal's fingerprint covers) differ from the
  run's, naming every differing key with both values;

and otherwise writes the state as the checkpoint at journal position 0. Recovery at start loads it
like any checkpoint, so the service continues from exactly the replay's state (same ``state_digest``,
same scores). The data dir remembers where it started (``Journal.started_from``): without a usable
checkpoint, recovery refuses to rebuild from the journal, which holds only the events after it.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from models import SnapshotError

# the learning sections and the fingerprint without pydantic, the journal (sqlite3) only when a data dir
# is started: a replay writes its runs' states through this module
from service.config_common import LEARNING_SECTIONS, ConfigError, fingerprint
from service.engine import Engine

if TYPE_CHECKING:
    from service.config import Config

__all__ = ["LEARNING_SECTIONS", "STATE_FORMAT", "RunState", "read_run_state", "settings_differences", "start_from",
           "write_run_state"]

#: what ``state.bin`` holds, as ``state.json`` says it
STATE_FORMAT = "trimtab checkpoint format (docs/checkpoint-format.md): Engine.to_bytes(); load with Engine.from_bytes"


@dataclass
class RunState:
    """A run's final state as read from its folder: the checkpoint bytes, what ``state.json`` says,
    and the run's learning settings (the resolved sections of :data:`LEARNING_SECTIONS`)."""

    folder: Path
    blob: bytes
    meta: dict
    learning: dict


def write_run_state(folder: str | Path, blob: bytes, summary: dict, config: Config) -> dict:
    """Write ``state.bin`` and ``state.json`` of a run into ``folder``; return what ``state.json`` holds."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "state.bin").write_bytes(blob)
    resolved = config.resolved()
    meta = {"format": STATE_FORMAT, "sha256": hashlib.sha256(blob).hexdigest(), "bytes": len(blob),
            "state_digest": summary["state_digest"], "name": config.name, "events": summary["events"],
            "config_fingerprint": fingerprint(config), "learning": {k: resolved[k] for k in LEARNING_SECTIONS}}
    (folder / "state.json").write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return meta


def read_run_state(folder: str | Path) -> RunState:
    """Read and check a run's ``state.bin`` and ``state.json`` (a sweep run's folder, which has
    ``config.toml`` instead of the settings in ``state.json``, works too).

    Raises
    ------
    ConfigError
        A file is missing or unreadable, or the state's SHA-256 is not the recorded one.
    """
    folder = Path(folder)
    where = "--start-from"
    state, meta_file = folder / "state.bin", folder / "state.json"
    for path in (state, meta_file):
        if not path.is_file():
            raise ConfigError(f"{path} does not exist: give the folder of one replay run (DIR/NAME), which holds "
                              "state.bin and state.json", where=where)
    try:
        meta = json.loads(meta_file.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ConfigError(f"{meta_file} cannot be read: {exc}", where=where) from None
    blob = state.read_bytes()
    sha = hashlib.sha256(blob).hexdigest()
    if sha != meta.get("sha256"):
        raise ConfigError(f"{state} has SHA-256 {sha[:16]}..., but {meta_file.name} records "
                          f"{str(meta.get('sha256'))[:16]}...: the file was changed or damaged", where=where)
    learning = meta.get("learning")
    if learning is None and (folder / "config.toml").is_file():
        from service.config import load_config

        resolved = load_config(folder / "config.toml").resolved()
        learning = {k: resolved[k] for k in LEARNING_SECTIONS}
    if learning is None:
        raise ConfigError(f"{meta_file} does not record the run's settings (no 'learning' and no config.toml "
                          "beside it)", where=where)
    return RunState(folder, blob, meta, learning)


def settings_differences(run: dict, config: dict) -> list[str]:
    """Every learning key whose value differs, as ``section.key: the run had A, this config has B``.

    >>> settings_differences({"model": {"l2": 0.0, "task": "regression"}}, {"model": {"l2": 0.01, "task": "regression"}})
    ['model.l2: the run had 0.0, this config has 0.01']
    """
    out = []
    for section in LEARNING_SECTIONS:
        a, b = run.get(section) or {}, config.get(section) or {}
        for key in sorted(set(a) | set(b)):
            if a.get(key, "(absent)") != b.get(key, "(absent)"):
                out.append(f"{section}.{key}: the run had {json.dumps(a.get(key, '(absent)'))}, this config has "
                           f"{json.dumps(b.get(key, '(absent)'))}")
    return out


def start_from(config: Config, data_dir: str | Path, folder: str | Path) -> dict:
    """Make the replay state in ``folder`` the first checkpoint of the empty ``data_dir``.

    Returns ``{"source", "state_digest", "events"}``. Raises :class:`ConfigError` (nothing written)
    when the data dir is not empty, the state cannot be read, or the settings differ (all listed).
    """
    data_dir = Path(data_dir)
    if data_dir.exists() and (not data_dir.is_dir() or any(data_dir.iterdir())):
        raise ConfigError(f"the data dir {data_dir} is not empty: --start-from only starts a new data dir (its "
                          "journal would otherwise hold a history the state knows nothing of); give an empty or "
                          "new --data-dir", where="--start-from")
    run = read_run_state(folder)
    resolved = config.resolved()
    diff = settings_differences(run.learning, {k: resolved[k] for k in LEARNING_SECTIONS})
    if diff:
        raise ConfigError(f"the config's learning settings differ from those of the run in {run.folder}, so its "
                          "state cannot continue under it:\n  " + "\n  ".join(diff), where="--start-from")
    try:
        engine = Engine.from_bytes(config, run.blob)
    except (SnapshotError, ValueError, KeyError) as exc:
        raise ConfigError(f"{run.folder / 'state.bin'} cannot be read by this version: {exc}",
                          where="--start-from") from None
    source = f"the replay state {run.folder} (state digest {engine.state_digest[:16]}, {engine.events:,} events)"
    from service.storage.journal import Journal

    journal = Journal(data_dir, sync=config.service.journal_sync)
    try:
        journal.claim(fingerprint(config))
        journal.write_checkpoint(0, engine.to_bytes(position=0), engine.state_digest, config.service.checkpoints_kept,
                                 prune=False)
        journal.mark_started_from(str(run.folder))
        journal.add_incident("started_from", f"the service starts from {source}",
                             {"folder": str(run.folder), "state_digest": engine.state_digest, "events": engine.events,
                              "state_sha256": run.meta.get("sha256")})
    finally:
        journal.close()
    return {"source": str(run.folder), "state_digest": engine.state_digest, "events": engine.events}
