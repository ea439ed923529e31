"""Compile the kernels a run will use before it starts, in parts that compile in parallel processes.

On a machine where trimtab has never run, numba's on-disk cache is empty and the first call of each
compiled function compiles it (seconds each). Left to happen on first use, that cost lands on the
first ingest of the service (a producer's write times out) or inside a replay's first chunk (its
progress shows nothing for a long while). Here the same functions are called on tiny inputs before
the work starts. There are three parts, each compiling functions the others do not call:

``"learn"``
    the learning kernel of each model representation in use (lazy, dense);
``"read"``
    scoring with both iterates (alone, and with the held-out monitor's figures), reading an iterate out,
    the distance between the iterates;
``"feeds"``
    the line scan and gather of the columnar NDJSON reader, the id hashes and the duplicate-id set.

Each part writes what it compiles to numba's cache, so several processes can compile one part each
at the same time (the compiler holds Python's lock, so threads would not) and then load the others'
parts from the cache in milliseconds. Later runs only load. :func:`warm_parallel` does this with
short-lived helper processes (``python -m service.warmup``) when the cache is cold, and in-process
only when it is warm.

The compiled signatures depend on a model's representation only (every other setting is a value
in the parameter array, and every feature name is an index), so the parts run on a small made-up
model and feed rather than on the caller's config.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np

__all__ = ["COMPILING", "LOADING", "PARTS", "STARTING", "is_cached", "kernels_of", "main", "warm", "warm_parallel"]

#: What progress displays and ``/readyz`` say while the kernels compile.
COMPILING = "compiling the learning kernels (first run only)"
#: ... and while they load from numba's cache (fractions of a second on a quiet machine).
LOADING = "loading the compiled kernels"
#: The service's start-up states while its kernels get ready (``/readyz``), and what it says in them.
STARTING = {"compiling": COMPILING, "loading": LOADING}
#: The parts :func:`warm` knows.
PARTS = ("learn", "read", "feeds")
_ROOT = Path(__file__).resolve().parents[1]


def kernels_of(configs) -> list[str]:
    """The model representations (``"lazy"``, ``"dense"``) that ``configs`` use."""
    return sorted({config.model.kernel for config in configs})


def warm(parts, kernels=("lazy",)) -> list[str]:
    """Compile (or load) ``parts`` for models of the representations ``kernels``; returns ``parts``."""
    from models import ModelSpec
    from models.warmup import exercise

    parts = list(parts)
    unknown = set(parts) - set(PARTS)
    if unknown:
        raise ValueError(f"unknown warm-up parts {sorted(unknown)}; valid: {', '.join(PARTS)}")
    model_parts = [p for p in parts if p != "feeds"]
    if model_parts:
        for kernel in kernels:
            exercise(ModelSpec(numeric=("x",), categorical=("c",), scaling="none", kernel=kernel), model_parts)
    if "feeds" in parts:
        _warm_feeds()
    return parts


def _warm_feeds() -> None:
    """The columnar NDJSON reader on a few lines, one of them malformed and one with an escape (left by
    the compiled parse to Arrow's reader, on a gathered subset of lines); the id hashes; an id set
    that grows once."""
    from service.config import config_from_dict
    from service.feeds.ndjson_columns import ArrowNdjson, available
    from service.idhash import IdSet, hash_strings

    if available():
        import orjson

        from service.engine import Engine

        config = config_from_dict({"name": "warmup", "features": {"numeric": ["x"], "categorical": ["c"]}})
        lines = [orjson.dumps({"id": f"warm-{k}", "ts": float(k), "features": {"x": 0.5, "c": "a"}, "target": 1.0})
                 for k in range(4)]
        lines[3] = lines[3].replace(b"warm-3", b"warm-\\u0033")  # an escape: Arrow's reader takes it
        ArrowNdjson(Engine(config)).chunk(b"\n".join(lines[:2] + [b"not json"] + lines[2:]) + b"\n", 1)
    seen = IdSet(capacity=16)
    keys = hash_strings([f"warm-{k}" for k in range(12)])
    seen.add(keys, np.ones(len(keys), dtype=np.bool_))  # past half of its 16 slots: the table grows once


def _functions(part: str, kernels) -> list:
    """``(kernel set, name)`` of the compiled functions of ``part``."""
    from models.native import MODEL

    from service.kernels import FEEDS

    if part == "learn":
        return [(MODEL, "lazy_process" if k == "lazy" else "dense_process") for k in kernels]
    if part == "read":
        return [(MODEL, "score_rows_both"), (MODEL, "score_window"), (MODEL, "materialize"), (MODEL, "iterate_distance")]
    return [(FEEDS, n) for n in ("scan_parse", "gather_spans", "gather_lines", "hash_column", "insert_keys",
                                 "rehash")]


def is_cached(parts, kernels=("lazy",)) -> bool:
    """Whether every function of ``parts`` is ready without compiling: built ahead of time
    (:mod:`models.native`), or in numba's cache.

    For numba's cache it reads the cache index (an internal of numba's caching, so any surprise
    counts as "not cached"): an index that exists and matches the source file's stamp. This only
    chooses the wording of progress and whether helper processes are worth starting; a wrong answer
    costs time, never correctness.
    """
    functions = [f for p in parts for f in _functions(p, kernels)]
    if all(s.is_native(name) for s, name in functions):
        return True
    try:
        return all(bool(s.jit(name)._cache._cache_file._load_index()) for s, name in functions)
    except Exception:
        return False


def warm_parallel(groups, kernels=("lazy",)) -> bool:
    """Warm every part of ``groups`` (lists of parts); returns whether the cache was cold.

    With a cold cache, ``groups[1:]`` compile in helper processes while this process compiles
    ``groups[0]``; then this process loads them from the cache. A helper that fails costs nothing
    but time: its parts are then compiled here.
    """
    everything = [p for g in groups for p in g]
    cold = not is_cached(everything, kernels)
    helpers = []
    if cold:
        import subprocess  # here: with the kernels cached no helper starts

        env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(_ROOT), os.environ.get("PYTHONPATH")]))}
        for group in groups[1:]:
            cmd = [sys.executable, "-m", "service.warmup", *group]
            for kernel in kernels:
                cmd += ["--kernel", kernel]
            helpers.append(subprocess.Popen(cmd, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL))
    try:
        warm(groups[0], kernels)
    finally:
        for proc in helpers:
            proc.wait()
    warm(everything, kernels)
    return cold


def main(argv: list[str] | None = None) -> int:
    """``python -m service.warmup PART... [--kernel lazy|dense ...]``: the helper process."""
    parser = argparse.ArgumentParser(prog="python -m service.warmup", description=__doc__.split("\n")[0])
    parser.add_argument("parts", nargs="+", choices=PARTS)
    parser.add_argument("--kernel", action="append", choices=("lazy", "dense"))
    args = parser.parse_args(argv)
    warm(args.parts, args.kernel or ["lazy"])
    return 0


if __name__ == "__main__":
    sys.exit(main())
