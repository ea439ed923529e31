"""The compiled kernels, from an extension module built ahead of time when there is one, else numba's JIT.

Importing numba and loading its cached kernels takes about half a second of every start (numba's own
set-up, then LLVM for each cached function). The same machine code can be kept as an ordinary
extension module: :meth:`KernelSet.build` compiles every kernel of a set with numba's ahead-of-time
compiler (``numba.pycc``), for the signatures that the JIT compiled for a real run and with each
function's own options (``error_model``, ``nogil``, no fastmath) and this CPU's features, exactly as the
JIT compiles it. A later process imports that module in about a millisecond, without importing numba.

The module lives in the user's cache folder (``TRIMTAB_CACHE_DIR``, else ``$XDG_CACHE_HOME/trimtab``,
else ``~/.cache/trimtab``), named by a key that hashes the kernels' source files, the versions of
Python, numpy and numba, and the CPU. A changed source or upgrade changes the key, so a stale module is
never loaded: the set falls back to the JIT until a new one is built. Any failure to load (no module,
a damaged file) does the same. ``TRIMTAB_KERNELS=jit`` always uses the JIT.

An extension module does not check its arguments' types the way numba's dispatcher does (it reads
whatever memory it is given), so every call of an ahead-of-time function first checks each argument
against the signature it was built for (dtype, dimensions, C order, alignment, writability, scalar
types); a call that does not match goes to the JIT, which compiles what it needs, as it does today.
The check costs a few microseconds per call; kernels are called per batch, not per event.

Results are bit-identical to the JIT's: the same LLVM code for the same CPU features, and no fastmath
(``tests/models/test_native.py`` replays a feed both ways and compares the state digests).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.machinery
import importlib.util
import json
import os
import sys
import threading
from pathlib import Path

import numpy as np

__all__ = ["MODEL", "KernelSet", "cache_dir", "jit_only"]

#: Environment variable: ``auto`` (default: the ahead-of-time module when built) or ``jit``.
MODE_ENV = "TRIMTAB_KERNELS"
#: Environment variable: the folder of trimtab's caches.
CACHE_ENV = "TRIMTAB_CACHE_DIR"
#: Part of every key: raise it when the build or the argument checks change.
FORMAT = 1
_LOADING = threading.Lock()


def cache_dir() -> Path:
    """The folder that holds the ahead-of-time modules (created by :meth:`KernelSet.build`)."""
    if os.environ.get(CACHE_ENV):
        return Path(os.environ[CACHE_ENV])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "trimtab"


def jit_only() -> bool:
    """Whether ``TRIMTAB_KERNELS=jit`` asks for numba's JIT only."""
    return os.environ.get(MODE_ENV, "auto").strip().lower() == "jit"


def _source(module: str) -> bytes:
    spec = importlib.util.find_spec(module)
    if spec is None or not spec.origin:
        return b"-"
    return Path(spec.origin).read_bytes()


def _cpu() -> bytes:
    """The CPU model and its feature flags (Linux), else what :mod:`platform` knows."""
    try:
        with open("/proc/cpuinfo", "rb") as f:
            head = f.read(16384).split(b"\n\n")[0]
        return b"\n".join(line for line in head.splitlines()
                          if line.startswith((b"vendor_id", b"model name", b"flags", b"cpu family", b"model\t")))
    except OSError:
        import platform

        return f"{platform.machine()} {platform.processor()}".encode()


class KernelSet:
    """The compiled functions of ``modules`` (dotted names), as attributes.

    ``KernelSet("model", ("models.kernels", "models.readouts"), extra=("models.layout",)).lazy_process``
    is the ahead-of-time function when its module is built and current, else the numba dispatcher.
    ``extra`` names modules the kernels read (constants frozen into them): they are part of the key.
    Attributes resolve on first use and are kept.
    """

    def __init__(self, name: str, modules: tuple[str, ...], extra: tuple[str, ...] = ()) -> None:
        self._name, self._modules, self._extra = name, tuple(modules), tuple(extra)
        self._loaded = None  # (module, signatures) or False once tried
        #: True when the ahead-of-time module was wanted but not found (a build would help).
        self.missing = False

    # ------------------------------------------------------------------ identity
    def key(self) -> str:
        """Hash of everything the compiled code depends on (see the module docstring)."""
        h = hashlib.sha256()
        numba_spec = importlib.util.find_spec("numba")
        numba_version = b"-"
        if numba_spec is not None and numba_spec.origin:
            version_file = Path(numba_spec.origin).with_name("_version.py")
            numba_version = version_file.read_bytes() if version_file.exists() else numba_spec.origin.encode()
        for part in (str(FORMAT).encode(), self._name.encode(), sys.version.encode(), np.__version__.encode(),
                     numba_version, _cpu()):
            h.update(len(part).to_bytes(8, "little") + part)
        for module in self._modules + self._extra + ("models.native",):
            text = _source(module)
            h.update(module.encode() + len(text).to_bytes(8, "little") + text)
        return h.hexdigest()[:24]

    def paths(self) -> tuple[str, Path, Path]:
        """The module's import name, its file and the file of its signatures."""
        key = self.key()
        name = f"trimtab_{self._name}_{key}"
        suffix = importlib.machinery.EXTENSION_SUFFIXES[0]
        folder = cache_dir() / "kernels"
        return name, folder / (name + suffix), folder / (name + ".json")

    # ------------------------------------------------------------------ loading
    def _native(self):
        if self._loaded is None:
            with _LOADING:  # parse threads resolve their first kernels at the same moment
                if self._loaded is None:
                    loaded = False
                    if not jit_only():
                        try:
                            loaded = self._import()
                        except Exception:  # damaged or foreign file: the JIT serves, a build replaces it
                            self.missing = True
                    self._loaded = loaded
        return self._loaded

    def _import(self):
        name, path, sig_path = self.paths()
        if not (path.exists() and sig_path.exists()):
            self.missing = True
            return False
        signatures = json.loads(sig_path.read_text(encoding="utf-8"))
        if name in sys.modules:
            return sys.modules[name], signatures
        loader = importlib.machinery.ExtensionFileLoader(name, str(path))
        spec = importlib.util.spec_from_file_location(name, path, loader=loader)
        module = importlib.util.module_from_spec(spec)
        loader.exec_module(module)
        sys.modules[name] = module
        return module, signatures

    def is_native(self, name: str) -> bool:
        """Whether ``name`` resolves to an ahead-of-time function."""
        loaded = self._native()
        return bool(loaded) and name in loaded[1]

    def failed(self) -> bool:
        """Whether a build of this key failed before (no C compiler, say): not retried by itself."""
        name, path, _ = self.paths()
        return path.with_name(name + ".failed").exists()

    def jit(self, name: str):
        """The numba dispatcher ``name`` (imports numba and the module that defines it)."""
        for module in self._modules:
            found = getattr(importlib.import_module(module), name, None)
            if found is not None:
                return found
        raise AttributeError(f"no compiled function {name!r} in {', '.join(self._modules)}")

    def __getattr__(self, name: str):
        if name.startswith("__"):
            raise AttributeError(name)
        loaded = self._native()
        if loaded and name in loaded[1]:
            fn = _checked(getattr(loaded[0], name), loaded[1][name], lambda: self.jit(name))
        else:
            fn = self.jit(name)
        setattr(self, name, fn)
        return fn

    # ------------------------------------------------------------------ building
    def build(self, exercise) -> Path:
        """Compile every function of the set ahead of time into the cache folder; returns the module's path.

        ``exercise()`` must call the kernels through their real callers first, so that the JIT has
        compiled the signatures a run uses; each function with exactly one signature is exported with
        it (a function the JIT compiled for several stays on the JIT). Needs numba and a C compiler.
        """
        from ._aot_build import compile_set

        name, path, sig_path = self.paths()
        failed = path.with_name(name + ".failed")
        try:
            modules = [importlib.import_module(m) for m in self._modules]  # imports numba
            exercise()
            compile_set(name, path, sig_path, modules)
        except Exception as exc:  # remembered: no automatic retry until the key changes
            failed.parent.mkdir(parents=True, exist_ok=True)
            failed.write_text(f"{type(exc).__name__}: {exc}\n", encoding="utf-8")
            raise
        failed.unlink(missing_ok=True)
        self._loaded = None
        self.missing = False
        for attr in [a for a in vars(self) if not a.startswith("_") and a != "missing"]:
            delattr(self, attr)
        return path


# --------------------------------------------------------------------------- argument checks
_SCALARS = {
    "int64": (int, np.int64),
    "bool": (bool, np.bool_),
    "uint64": (np.uint64,),
    "float64": (float, np.float64),
}


def _array_check(dtype: str, ndim: int, readonly: bool):
    dt = np.dtype(dtype)

    def check(a) -> bool:
        if type(a) is not np.ndarray or a.dtype != dt or a.ndim != ndim:
            return False
        flags = a.flags
        return flags.c_contiguous and flags.aligned and (readonly or flags.writeable)

    return check


def _scalar_check(kind: str):
    types = _SCALARS[kind]
    if kind == "int64":
        return lambda x: (type(x) is int and -(1 << 63) <= x < (1 << 63)) or type(x) is np.int64
    return lambda x: type(x) in types


def _checked(native, spec: list, jit):
    """``native`` behind a check of every argument against ``spec``; a mismatch calls ``jit()``'s function.

    An argument that is the very object passed in the same place by the last call whose arguments all
    passed is not checked again (the model's own state arrays come back at every call): an array's
    dtype, dimensions and order do not change (trimtab never reshapes or write-protects an array in
    place). The last passing arguments are kept referenced, so none of them can be freed and its
    address reused by another object."""
    checks = tuple(_array_check(s["dtype"], s["ndim"], s["readonly"]) if s["kind"] == "array"
                   else _scalar_check(s["kind"]) for s in spec)
    n = len(checks)
    passed = [None] * n  # the last call's arguments, once all passed (replaced whole: one atomic store)

    def call(*args):
        nonlocal passed
        if len(args) == n:
            for check, arg, before in zip(checks, args, passed):
                if arg is not before and not check(arg):
                    break
            else:
                passed = args
                return native(*args)
        return jit()(*args)

    call.__name__ = call.__qualname__ = getattr(native, "__name__", "kernel")
    call.native = native
    return call


#: The learning kernels and the model's read-outs.
MODEL = KernelSet("model", ("models.kernels", "models.readouts"), extra=("models.layout", "models.jit"))
