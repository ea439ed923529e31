"""A cache of validated configs: ``trimtab replay`` reads a config file it has validated before
without importing pydantic (about 0.15 s of a start, a third of a short replay's).

:func:`load_config_cached` validates a file it has not seen with :func:`service.config.load_config`
(pydantic, strict: every check and every message as always) and stores the validated settings in
``<cache>/configs/<key>.json`` (``<cache>`` as for the compiled kernels: ``TRIMTAB_CACHE_DIR``, else
``$XDG_CACHE_HOME/trimtab``, else ``~/.cache/trimtab``; the newest :data:`KEEP` entries are kept).
The key is the SHA-256 of the file's bytes, the source of the modules that define and check the
settings (``service/config.py``, ``service/config_common.py``, this one), pydantic's ``version.py``,
Python's version and trimtab's.
A later load whose key finds an entry rebuilds the settings as a :class:`CachedConfig` from it.

Any other case validates in full: a changed file (another key), another trimtab, pydantic or Python,
an entry that cannot be read, is not JSON, or does not hold the key and the expected parts. An entry
is written only if what it rebuilds is the validated config value for value (same types, same
``resolved()``), and a failed write is ignored (the cache only saves time). Each cache hit still
builds the :class:`models.ModelSpec` (its checks run again, as in validation; an entry they refuse
is validated in full, so every error a user sees comes from :func:`service.config.load_config`).

A :class:`CachedConfig` offers what consumers of a validated config read: the sections as attributes
(``config.monitor.window``; ``feed`` and ``publish`` may be ``None``), :meth:`CachedConfig.model_spec`,
:meth:`CachedConfig.publish_key` and :meth:`CachedConfig.resolved`; it is frozen, equal to another
with the same settings, and pickles (``--jobs``). The pydantic API beyond that (``model_copy``,
``model_dump``) is not offered: the live service, which uses it, validates with pydantic.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
from pathlib import Path

from service.config_common import model_spec_of, publish_key_of
from service.version import trimtab_version

__all__ = ["CachedConfig", "CachedSection", "config_key", "load_config_cached"]

#: Part of every key and entry: raise it when an entry's layout changes.
FORMAT = 1
#: Entries kept (the newest written; an entry is about 3 kB).
KEEP = 64
_HERE = Path(__file__).resolve().parent
_SCHEMA_SOURCES = (_HERE / "config.py", _HERE / "config_common.py", _HERE / "config_cache.py")


class CachedSection:
    """One section of a :class:`CachedConfig`: its keys as read-only attributes."""

    def __init__(self, values: dict) -> None:
        self.__dict__.update(values)

    def __setattr__(self, name, value):
        raise AttributeError(f"a config is frozen: cannot set {name!r}")

    def __delattr__(self, name):
        raise AttributeError(f"a config is frozen: cannot delete {name!r}")

    def __eq__(self, other) -> bool:
        return type(other) is type(self) and other.__dict__ == self.__dict__

    __hash__ = None  # as a pydantic section holding lists

    def __repr__(self) -> str:
        return f"CachedSection({', '.join(f'{k}={v!r}' for k, v in self.__dict__.items())})"


class CachedConfig(CachedSection):
    """A validated config rebuilt from the cache: ``values`` (each section's settings, Python values,
    ``None`` for an absent optional section) and ``resolved`` (:meth:`service.config.Config.resolved`'s
    answer when it was validated)."""

    def __init__(self, values: dict, resolved: dict) -> None:
        super().__init__({k: CachedSection(v) if isinstance(v, dict) else v for k, v in values.items()})
        self.__dict__["_resolved"] = resolved

    def model_spec(self):
        """:meth:`service.config.Config.model_spec`."""
        return model_spec_of(self)

    def publish_key(self) -> str:
        """:meth:`service.config.Config.publish_key`."""
        return publish_key_of(self)

    def resolved(self) -> dict:
        """Every setting with defaults filled in, as plain data (a fresh copy each call)."""
        return json.loads(json.dumps(self._resolved))

    def __repr__(self) -> str:
        return f"CachedConfig(name={self.name!r})"


def _cache_folder() -> Path:
    from models.native import cache_dir  # the kernels' cache folder; loads no kernel

    return cache_dir() / "configs"


def _pydantic_version_file() -> bytes:
    """pydantic's ``version.py``, found without importing pydantic (b"-" when it is not installed)."""
    import importlib.util

    spec = importlib.util.find_spec("pydantic")
    if spec is None or not spec.origin:
        return b"-"
    try:
        return (Path(spec.origin).parent / "version.py").read_bytes()
    except OSError:
        return b"-"


def config_key(data: bytes) -> str:
    """The cache key of a config file holding ``data`` (see the module's docstring)."""
    h = hashlib.sha256(f"trimtab-config {FORMAT}\0{trimtab_version()}\0{sys.version}\0".encode())
    for part in (data, *(p.read_bytes() for p in _SCHEMA_SOURCES), _pydantic_version_file()):
        h.update(len(part).to_bytes(8, "little"))
        h.update(part)
    return h.hexdigest()[:40]


def _rebuild(entry, key: str) -> CachedConfig:
    """The config an entry holds; an exception when it is not a usable entry of ``key``."""
    if not (isinstance(entry, dict) and entry.get("format") == FORMAT and entry.get("key") == key
            and isinstance(entry.get("values"), dict) and isinstance(entry.get("resolved"), dict)):
        raise ValueError("not an entry of this key")
    config = CachedConfig(entry["values"], entry["resolved"])
    config.model_spec()  # the model's own checks run again, as in validation: an entry they refuse is not used
    return config


def _same(a, b) -> bool:
    """Whether two configs hold the same values of the same types in every section (a
    :class:`CachedConfig` against the pydantic :class:`service.config.Config` it stands for)."""
    for name, value in a.__dict__.items():
        if name.startswith("_"):
            continue
        other = getattr(b, name, _same)
        if isinstance(value, CachedSection):
            if other is None or not all(type(v) is type(getattr(other, k, _same)) and repr(v) == repr(getattr(other, k))
                                        for k, v in value.__dict__.items()):
                return False
        elif type(value) is not type(other) or repr(value) != repr(other):
            return False
    return a.resolved() == b.resolved()


def _store(folder: Path, key: str, config) -> None:
    """Write the entry of ``config`` (validated) under ``key`` if it rebuilds to the same config."""
    entry = {"format": FORMAT, "key": key, "values": config.model_dump(), "resolved": config.resolved()}
    text = json.dumps(entry)  # in the order of the keys: resolved() keeps it
    rebuilt = _rebuild(json.loads(text), key)
    if not (_same(rebuilt, config) and len(rebuilt.__dict__) == len(config.model_dump()) + 1):
        return
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / f".{key}.{os.getpid()}.tmp"
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, folder / f"{key}.json")
    finally:
        tmp.unlink(missing_ok=True)
    entries = sorted(folder.glob("*.json"), key=lambda e: e.stat().st_mtime_ns, reverse=True)
    for old in entries[KEEP:]:
        old.unlink(missing_ok=True)


def load_config_cached(path: str | Path):
    """Read and validate a config file as :func:`service.config.load_config` does (the same errors),
    without pydantic when the cache holds this file's validated settings under the current key.

    Returns a :class:`service.config.Config` (validated now) or a :class:`CachedConfig`.
    """
    p = Path(path)
    try:
        data = p.read_bytes()
        key, folder = config_key(data), _cache_folder()
    except OSError:
        data = None
    if data is not None:
        try:
            return _rebuild(json.loads((folder / f"{key}.json").read_bytes()), key)
        except Exception:  # noqa: BLE001 - no entry, or one that cannot be used: validate in full
            pass
    from service.config import load_config, parse_config

    if data is None:
        return load_config(p)  # its error names the file and the reason
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return load_config(p)  # the same failure, as load_config reports it
    # what load_config validates: these bytes read as text (universal newlines)
    config = parse_config(text.replace("\r\n", "\n").replace("\r", "\n"), source=str(p))
    try:
        _store(folder, key, config)
    except Exception:  # noqa: BLE001 - the cache only saves time
        pass
    return config
