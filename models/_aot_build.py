"""The build behind :meth:`models.native.KernelSet.build`: numba's ahead-of-time compiler, set up to
produce the same machine code as its JIT.

Two settings of ``numba.pycc`` differ from the JIT and are changed for the duration of a build:

* pycc compiles every exported function with default options (``error_model="python"``, the GIL
  held); here each function gets the options of its own ``numba.njit`` decorator, which matters for
  the kernels' ``error_model="numpy"`` (a division by zero gives inf/NaN, caught by their finiteness
  checks, instead of an exception) and ``nogil`` (the replay's reader thread parses while a kernel runs);
* pycc targets the host CPU's model without its feature list; here it gets the same features as the
  JIT (a virtual machine may hide features its CPU model has: code using them would not run).

Both are numba internals (``numba.pycc.compiler.compile_extra``, ``AOTCPUCodegen``), and numba marks
``numba.pycc`` itself as pending deprecation: a numba that changes or drops them makes the build fail,
and trimtab then keeps using the JIT.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
import warnings
from pathlib import Path

__all__ = ["compile_set"]


def _describe(ty) -> dict:
    """A numba type as the plain data :func:`models.native._checked` checks arguments against."""
    from numba.core import types

    if isinstance(ty, types.Array):
        if ty.layout != "C" or not ty.aligned:
            raise TypeError(f"only aligned C-order arrays are exported, not {ty}")
        return {"kind": "array", "dtype": str(ty.dtype), "ndim": ty.ndim, "readonly": not ty.mutable}
    if isinstance(ty, types.Boolean):
        return {"kind": "bool"}
    if isinstance(ty, (types.Integer, types.Float)) and str(ty) in ("int64", "uint64", "float64"):
        return {"kind": str(ty)}
    raise TypeError(f"argument type {ty} is not exported")


def _exports(modules) -> list:
    """``(name, dispatcher, signature)`` of every non-inlined compiled function of ``modules`` that the
    JIT compiled for exactly one signature."""
    from numba.core.registry import CPUDispatcher

    found = []
    for module in modules:
        for name, obj in sorted(vars(module).items()):
            if (isinstance(obj, CPUDispatcher) and obj.py_func.__module__ == module.__name__
                    and obj.targetoptions.get("inline", "never") == "never" and len(obj.signatures) == 1):
                cres = obj.overloads[obj.signatures[0]]
                found.append((name, obj, cres.signature))
    return found


@contextlib.contextmanager
def _like_the_jit(options_of: dict):
    """Patch pycc for one build: each function's own options, the JIT's CPU features."""
    from numba.core import codegen
    from numba.core.compiler import Flags
    from numba.core.cpu import CPUTargetOptions
    from numba.pycc import compiler as pycc_compiler

    original = pycc_compiler.compile_extra
    original_features = codegen.AOTCPUCodegen._customize_tm_features

    def compile_extra(typingctx, targetctx, func, args, return_type, flags, locals, library=None, **kw):
        own = Flags()
        CPUTargetOptions.parse_as_flags(own, options_of[func])
        for name in ("no_compile", "no_cpython_wrapper", "no_cfunc_wrapper", "nrt"):
            setattr(own, name, getattr(flags, name))
        return original(typingctx, targetctx, func, args, return_type, own, locals, library=library, **kw)

    pycc_compiler.compile_extra = compile_extra
    codegen.AOTCPUCodegen._customize_tm_features = lambda self: codegen.get_host_cpu_features()
    try:
        yield
    finally:
        pycc_compiler.compile_extra = original
        codegen.AOTCPUCodegen._customize_tm_features = original_features


def compile_set(name: str, path: Path, sig_path: Path, modules) -> None:
    """Compile the exported functions of ``modules`` into the extension module ``path`` (import name
    ``name``) and write their argument descriptions to ``sig_path``; both appear atomically."""
    with warnings.catch_warnings():  # pycc is marked for a future deprecation; the JIT stays the fallback
        warnings.simplefilter("ignore")
        from numba.pycc import CC

    exports = _exports(modules)
    if not exports:
        raise RuntimeError("no compiled function to export: exercise the kernels first")
    signatures = {n: [_describe(t) for t in sig.args] for n, _, sig in exports}
    path.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="build-", dir=path.parent) as tmp:
        cc = CC(name)
        cc.output_dir = tmp
        cc.target_cpu = "host"
        cc.verbose = False
        options_of = {}
        for export_name, dispatcher, sig in exports:
            cc.export(export_name, sig)(dispatcher.py_func)
            options_of[dispatcher.py_func] = dispatcher.targetoptions
        with _like_the_jit(options_of):
            cc.compile()
        built = next(Path(tmp).glob(name + "*"))
        tmp_sig = Path(tmp) / "signatures.json"
        tmp_sig.write_text(json.dumps(signatures, indent=1), encoding="utf-8")
        os.replace(built, path)  # the module first: a reader needs both, and takes the pair only then
        os.replace(tmp_sig, sig_path)
