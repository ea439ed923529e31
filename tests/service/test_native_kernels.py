"""Kernels built ahead of time (``numba.pycc``) against numba's JIT, the reference they must equal.

numba's JIT is the outside reference here (numba documentation, "Compiling code ahead of time" and
"Flags for @jit": ``error_model``, ``nogil``, ``fastmath``). The same feed replayed with the
ahead-of-time modules and with the JIT must end on the same state digest, bit for bit, and give the
same summary; a process that uses the modules must not import numba at all; a missing, stale or
damaged module, or a call with arguments of another type, must fall back to the JIT and still give
the JIT's results.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
CONFIGS = ROOT / "replay_data" / "configs"

REPLAY = r"""
import json, sys
from service.config import load_config
from service.replay.runner import run_replay
from models.native import MODEL
from service.kernels import FEEDS

out = []
for path in sys.argv[2:]:
    result = run_replay([sys.argv[1]], load_config(path), keep_state=False)
    summary = result["summary"]
    summary.pop("seconds"), summary.pop("events_per_second")
    out.append(summary)
print(json.dumps({"runs": out, "numba": "numba" in sys.modules,
                  "native": MODEL.is_native("lazy_process") and FEEDS.is_native("hash_column")}))
"""


if not shutil.which("gcc") and not os.environ.get("CI"):
    pytest.skip("the ahead-of-time build needs a C compiler (gcc); CI installs it", allow_module_level=True)


def _env(cache: Path, mode: str) -> dict:
    return {**os.environ, "TRIMTAB_CACHE_DIR": str(cache), "TRIMTAB_KERNELS": mode}


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> Path:
    """A cache folder with both sets built (``python -m service.kernels build``)."""
    cache = tmp_path_factory.mktemp("cache")
    proc = subprocess.run([sys.executable, "-m", "service.kernels", "build"], env=_env(cache, "auto"),
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert len(list((cache / "kernels").glob("trimtab_*.json"))) == 2, proc.stdout
    return cache


def _replay(feed: Path, cache: Path, mode: str, configs) -> dict:
    proc = subprocess.run([sys.executable, "-c", REPLAY, str(feed), *map(str, configs)], env=_env(cache, mode),
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_replay_digests_match_the_jit(built, tmp_path):
    """Both demo configs over the recorded demo feed (a faulty-gateway burst and a recalibration:
    the guarded run rolls back and restarts), and the dense representation: the same summaries and
    state digests both ways; the ahead-of-time process never imports numba."""
    feed = ROOT / "replay_data" / "coldchain-demo.ndjson.gz"
    dense = tmp_path / "dense.toml"
    dense.write_text((CONFIGS / "guarded.toml").read_text().replace("[model]\n", "[model]\nkernel = \"dense\"\n")
                     .replace('name = "guarded"', 'name = "guarded-dense"'))
    configs = [CONFIGS / "guarded.toml", CONFIGS / "unguarded.toml", dense]
    native = _replay(feed, built, "prebuilt", configs)
    jit = _replay(feed, built, "jit", configs)
    assert native["native"] and not native["numba"], native
    assert jit["numba"] and not jit["native"]
    assert [r["state_digest"] for r in native["runs"]] == [r["state_digest"] for r in jit["runs"]]
    assert native["runs"] == jit["runs"]
    assert any(r["rollbacks"] or r["restarts"] for r in native["runs"]), "the feed should exercise the monitor's actions"


def test_damaged_module_falls_back_to_the_jit(tmp_path, monkeypatch):
    """A module file that is not a library: the set serves numba's dispatchers and says the module is missing."""
    from models.native import KernelSet

    cache = tmp_path / "cache"
    (cache / "kernels").mkdir(parents=True)
    monkeypatch.setenv("TRIMTAB_CACHE_DIR", str(cache))
    monkeypatch.setenv("TRIMTAB_KERNELS", "prebuilt")
    fresh = KernelSet("model", ("models.kernels", "models.readouts"), extra=("models.layout", "models.jit"))
    _, path, sig_path = fresh.paths()
    path.write_bytes(b"not a shared library")
    sig_path.write_text("{}", encoding="utf-8")
    assert not fresh.is_native("lazy_rebase") and fresh.missing
    assert hasattr(fresh.lazy_rebase, "py_func")  # a numba dispatcher


@pytest.mark.slow
def test_argument_of_another_type_goes_to_the_jit(built, monkeypatch):
    """``rehash`` was built for uint64 tables: an int64 table is handed to the JIT (which compiles it),
    and both paths place the keys where open addressing puts them (slot ``key & (size - 1)``)."""
    from models.native import KernelSet
    from service.kernels import FEEDS

    monkeypatch.setenv("TRIMTAB_CACHE_DIR", str(built))
    monkeypatch.setenv("TRIMTAB_KERNELS", "prebuilt")
    feeds = KernelSet("feeds", FEEDS._modules, extra=FEEDS._extra)  # a fresh set of the same modules
    assert feeds.is_native("rehash")
    old = np.array([0, 5, 0, 12], dtype=np.uint64)
    new = np.zeros(8, dtype=np.uint64)
    feeds.rehash(old, new)
    assert new.tolist() == [0, 0, 0, 0, 12, 5, 0, 0]
    new64 = np.zeros(8, dtype=np.int64)
    feeds.rehash(old.astype(np.int64), new64)
    assert new64.tolist() == [0, 0, 0, 0, 12, 5, 0, 0]



def test_an_argument_is_checked_unless_it_is_the_last_passing_calls_own_object():
    """The check is skipped only for the very objects of the last call that passed: a new array of
    another dtype, or the same position given another object, is still checked and goes to the JIT."""
    from models.native import _checked

    spec = [{"kind": "array", "dtype": "float64", "ndim": 1, "readonly": True}, {"kind": "int64"}]
    calls = []
    fn = _checked(lambda a, k: calls.append("native") or k, spec, lambda: (lambda a, k: calls.append("jit") or k))
    state = np.zeros(4)
    assert fn(state, 1) == 1 and fn(state, 2) == 2  # the same array again: not checked, still native
    assert fn(np.zeros(4, dtype=np.int64), 3) == 3  # another object of another dtype: checked
    assert fn(state[::2], 4) == 4  # a strided view: checked (not C-ordered)
    assert fn(state, 2**70) == 2**70  # an int beyond int64 at a passing position: checked
    assert calls == ["native", "native", "jit", "jit", "jit"]


OPTIONS = '''
import numba


@numba.njit(error_model="numpy", nogil=True)
def ratio(a, b):
    return a / b


@numba.njit
def strict_ratio(a, b):
    return a / b
'''


def _probe_set(tmp_path, monkeypatch, name: str, mode: str):
    """A kernel set ``name`` over a module ``aot_<name>_mod`` of the two probe functions, its cache in
    ``tmp_path`` and ``TRIMTAB_KERNELS=mode``."""
    from models.native import KernelSet

    (tmp_path / f"aot_{name}_mod.py").write_text(textwrap.dedent(OPTIONS), encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.setenv("TRIMTAB_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.setenv("TRIMTAB_KERNELS", mode)
    return KernelSet(name, (f"aot_{name}_mod",))


@pytest.mark.slow
def test_each_function_keeps_its_own_options_and_a_changed_source_is_stale(tmp_path, monkeypatch):
    """numba's documented ``error_model``: with ``"numpy"`` a float division by zero gives inf, with
    the default ``"python"`` it raises ZeroDivisionError, in the JIT and so in the built module.
    Editing the source changes the key: the old module is no longer used."""
    probe = _probe_set(tmp_path, monkeypatch, "probe", "prebuilt")

    def exercise():
        import aot_probe_mod

        aot_probe_mod.ratio(1.0, 2.0)
        aot_probe_mod.strict_ratio(1.0, 2.0)

    probe.build(exercise)
    before = probe.key()
    assert probe.is_native("ratio") and probe.is_native("strict_ratio")
    assert probe.ratio(1.0, 0.0) == np.inf
    with pytest.raises(ZeroDivisionError):
        probe.strict_ratio(1.0, 0.0)
    (tmp_path / "aot_probe_mod.py").write_text(textwrap.dedent(OPTIONS) + "\n# edited\n", encoding="utf-8")
    edited = type(probe)("probe", ("aot_probe_mod",))
    assert edited.key() != before
    assert not edited.is_native("ratio") and edited.missing


def test_failed_build_is_remembered_and_not_restarted(tmp_path, monkeypatch):
    """A build that fails leaves its reason beside the module and the automatic build is not started
    again for the same sources; the set keeps serving numba's dispatchers."""
    import service.kernels as sk

    probe = _probe_set(tmp_path, monkeypatch, "failing", "auto")

    def exercise():
        raise RuntimeError("no compiler here")

    with pytest.raises(RuntimeError):
        probe.build(exercise)
    assert probe.failed()
    name, path, _ = probe.paths()
    assert "no compiler here" in path.with_name(name + ".failed").read_text(encoding="utf-8")
    assert not probe.is_native("ratio") and probe.missing
    assert hasattr(probe.ratio, "py_func")
    monkeypatch.setattr(sk, "_SETS", (probe,))
    assert sk.build_later() is False
    assert not (tmp_path / "cache" / "kernels" / "build.lock").exists()
