"""The cache of validated configs (``service/config_cache.py``) against pydantic's own validation.

The reference is pydantic (through :func:`service.config.load_config`): a config read back from the
cache must hold the values of the same types, resolve to the same settings and fingerprint, build the
same model spec and replay to the same state digest as the config pydantic validated; every file that
pydantic refuses must be refused with the same message, whether or not an entry was ever written; a
changed file or an unusable entry must be validated in full again. And a cache hit must not import
pydantic at all, which is the point (``benchmarks/replay.py``, ``first_event``).
"""

from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys
from pathlib import Path

import pytest

from service.config import Config, ConfigError, load_config
from service.config_cache import CachedConfig, config_key, load_config_cached
from service.config_common import fingerprint
from tests.service.test_config import BAD, BASE

ROOT = Path(__file__).resolve().parents[2]
GUARDED = ROOT / "replay_data" / "configs" / "guarded.toml"


@pytest.fixture
def cache(tmp_path, monkeypatch):
    """An empty cache folder of this test's own; returns the folder the entries go to."""
    monkeypatch.setenv("TRIMTAB_CACHE_DIR", str(tmp_path / "cache"))
    return tmp_path / "cache" / "configs"


def _config(tmp_path: Path, text: str, name: str = "c.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _assert_same(cached, validated: Config) -> None:
    """Every setting of ``validated`` is in ``cached`` with the same value and type."""
    for section, value in validated.model_dump().items():
        if isinstance(value, dict):
            for key, v in value.items():
                got = getattr(getattr(cached, section), key)
                assert type(got) is type(getattr(getattr(validated, section), key)), f"{section}.{key}"
                assert repr(got) == repr(v), f"{section}.{key}"
        else:
            assert type(getattr(cached, section)) is type(value) and repr(getattr(cached, section)) == repr(value)
    assert cached.resolved() == validated.resolved()
    assert cached.model_spec() == validated.model_spec()
    assert cached.publish_key() == validated.publish_key()
    assert fingerprint(cached) == fingerprint(validated)


@pytest.mark.parametrize("text", [
    GUARDED.read_text(encoding="utf-8"),
    # TOML integers for float settings stay integers (pydantic keeps them), optional sections present,
    # an infinite bound (JSON has no infinity: the entry must still give it back)
    BASE + "[constraint]\nlower = -inf\nupper = 3\n[steps]\nbase = 1\n"
           "[feed]\nbatch = 20\n[publish]\nkey = \"k\"\n",
], ids=["guarded", "integers-infinity-optional-sections"])
def test_a_second_load_rebuilds_what_pydantic_validated(tmp_path, cache, text):
    path = _config(tmp_path, text)
    first = load_config_cached(path)
    assert isinstance(first, Config)  # validated by pydantic, and an entry written
    assert len(list(cache.glob("*.json"))) == 1
    second = load_config_cached(path)
    assert isinstance(second, CachedConfig)
    _assert_same(second, load_config(path))
    assert pickle.loads(pickle.dumps(second)) == second  # --jobs hands configs to worker processes
    with pytest.raises(AttributeError):
        second.monitor.window = 5  # frozen, as the pydantic config is


@pytest.mark.parametrize("extra, key, fragment", [pytest.param(*c[1:], id=c[0]) for c in BAD])
def test_an_invalid_file_is_refused_with_pydantics_message_every_time(tmp_path, cache, extra, key, fragment):
    path = _config(tmp_path, extra + "\n" + BASE if extra.startswith("name") else BASE + extra + "\n")
    with pytest.raises(ConfigError) as reference:
        load_config(path)
    for _ in range(2):
        with pytest.raises(ConfigError) as err:
            load_config_cached(path)
        assert (err.value.where, str(err.value)) == (reference.value.where, str(reference.value))
        assert key in str(err.value)
    assert not cache.exists() or not list(cache.glob("*.json"))


def test_an_unreadable_file_gives_load_configs_error(tmp_path, cache):
    missing = tmp_path / "missing.toml"
    with pytest.raises(ConfigError) as reference:
        load_config(missing)
    with pytest.raises(ConfigError) as err:
        load_config_cached(missing)
    assert (err.value.where, str(err.value)) == (reference.value.where, str(reference.value))


def test_a_changed_file_is_validated_again(tmp_path, cache):
    path = _config(tmp_path, BASE + "[monitor]\nwindow = 500\n")
    load_config_cached(path)
    assert isinstance(load_config_cached(path), CachedConfig)
    path.write_text(BASE + "[monitor]\nwindow = 600\n", encoding="utf-8")
    again = load_config_cached(path)
    assert isinstance(again, Config) and again.monitor.window == 600
    path.write_text(BASE + '[monitor]\nwindow = "600"\n', encoding="utf-8")  # now invalid: refused, entry or not
    with pytest.raises(ConfigError, match="monitor.window"):
        load_config_cached(path)


@pytest.mark.parametrize("damage", [
    lambda entry: "not json {",
    lambda entry: json.dumps({**entry, "key": "0" * 40}),  # another file's entry under this name
    lambda entry: json.dumps({k: v for k, v in entry.items() if k != "resolved"}),
    lambda entry: json.dumps({**entry, "format": 0}),
    lambda entry: json.dumps({**entry, "values": {**entry["values"], "features": {"numeric": [], "categorical": [],
                                                                                  "hash_bits": 99}}}),
], ids=["not-json", "other-key", "missing-part", "old-format", "unusable-values"])
def test_an_unusable_entry_means_a_full_validation(tmp_path, cache, damage):
    path = _config(tmp_path, GUARDED.read_text(encoding="utf-8"))
    load_config_cached(path)
    (entry_file,) = cache.glob("*.json")
    entry = json.loads(entry_file.read_text(encoding="utf-8"))
    entry_file.write_text(damage(entry), encoding="utf-8")
    got = load_config_cached(path)
    if isinstance(got, CachedConfig):  # the damage left a usable entry: it must still be the validated config
        _assert_same(got, load_config(path))
    else:
        assert isinstance(got, Config)
        assert json.loads(entry_file.read_text(encoding="utf-8")) == entry  # and the entry is written afresh


def test_the_cache_keeps_the_newest_entries(tmp_path, cache, monkeypatch):
    import service.config_cache as cc

    monkeypatch.setattr(cc, "KEEP", 3)
    for window in range(10, 15):
        load_config_cached(_config(tmp_path, BASE + f"[monitor]\nwindow = {window}\n"))
    kept = list(cache.glob("*.json"))
    assert len(kept) == 3
    assert sorted(json.loads(p.read_text())["values"]["monitor"]["window"] for p in kept) == [12, 13, 14]


def test_the_key_covers_the_files_bytes_and_the_schema(tmp_path, monkeypatch):
    import service.config_cache as cc

    text = GUARDED.read_bytes()
    key = config_key(text)
    assert config_key(bytes(text)) == key and config_key(text + b"\n") != key
    sources = list(cc._SCHEMA_SOURCES)
    for i, source in enumerate(sources):  # an edit of any module that defines or checks the settings
        edited = tmp_path / f"{i}-{source.name}"
        edited.write_bytes(source.read_bytes() + b"\n# edited\n")
        monkeypatch.setattr(cc, "_SCHEMA_SOURCES", (*sources[:i], edited, *sources[i + 1:]))
        assert config_key(text) != key, source.name
    monkeypatch.setattr(cc, "_SCHEMA_SOURCES", tuple(sources))
    monkeypatch.setattr(cc, "_pydantic_version_file", lambda: b"VERSION = '0.0.1'")  # another pydantic
    assert config_key(text) != key


def _replay_in_child(feed: Path, config: Path, out: Path, env: dict) -> dict:
    """A one-event replay in a fresh process; the heavy modules it imported."""
    code = ("import json, sys\nfrom service.cli import main\n"
            f"rc = main(['replay', {str(feed)!r}, '-c', {str(config)!r}, '--out', {str(out)!r}, '--no-report', "
            "'--no-progress'])\n"
            "heavy = ('pydantic', 'asyncio', 'aiohttp', 'river', 'pyarrow', 'matplotlib', 'sqlite3', 'redis', 'pandas',"
            " 'multiprocessing', 'gzip')\n"
            "print(json.dumps({'rc': rc, 'loaded': sorted(m for m in heavy if m in sys.modules)}))\n")
    proc = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_a_replay_from_the_cache_imports_nothing_the_first_event_does_not_need(tmp_path):
    """The same run twice: the first validates the config (pydantic), the second reads the cache and
    loads none of the service's other stacks, and both write the same state, model and settings.

    (The tests run numba's JIT, which brings modules of its own, ``html`` and ``subprocess`` among
    them; with the kernels built ahead of time a replay loads neither: ``benchmarks/replay.py``.)"""
    from service.replay.scenario import write_ndjson

    feed = tmp_path / "feed.ndjson"
    write_ndjson(feed, 200, seed=3, malformed_share=0.0, gzip=False)  # fewer than check_every: no check, no river
    config = _config(tmp_path, GUARDED.read_text(encoding="utf-8"), "guarded.toml")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])),
               TRIMTAB_CACHE_DIR=str(tmp_path / "cache"))  # an empty cache: the first replay validates
    first = _replay_in_child(feed, config, tmp_path / "a", env)
    second = _replay_in_child(feed, config, tmp_path / "b", env)
    assert first["rc"] == second["rc"] == 0
    assert "pydantic" in first["loaded"]
    assert second["loaded"] == [], second
    for name in ("guarded/state.json", "guarded/model.json", "guarded/state.bin"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    runs = [json.loads((tmp_path / d / "summary.json").read_text())["runs"][0] for d in "ab"]
    assert runs[0]["state_digest"] == runs[1]["state_digest"]
