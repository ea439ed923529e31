"""Run every compiled kernel a model uses once, on a throwaway copy and a tiny input.

numba compiles a function the first time it is called with a new combination of argument types, and
a run that has never been compiled on this machine (an empty cache) spends seconds there. Calling
:func:`exercise` before a run starts moves that cost to a moment the caller chooses (the service
does it before it says it is ready), and later calls only load the compiled code from numba's
on-disk cache.

The kernels are reached through :class:`LinearModel`'s own methods, not called directly: the
argument types (dtypes, read-only flags, array layouts) are then those of a real run, so the
signatures compiled here are the ones the run looks up.
"""

from __future__ import annotations

import numpy as np

from .linear import LinearModel, Outcome
from .spec import ModelSpec

__all__ = ["PARTS", "exercise"]


#: The parts of :func:`exercise`: each compiles functions the other does not call, so two processes
#: can compile one part each at the same time without writing the same cache entries.
PARTS = ("learn", "read")


def exercise(spec: ModelSpec, parts=PARTS) -> None:
    """Compile (or load from the cache) the kernels a model of ``spec`` runs.

    ``"learn"``: the learning kernel of the spec's representation (with the rebase it calls);
    ``"read"``: scoring with both iterates (alone, and with the held-out monitor's figures), reading an
    iterate out and the distance between them.
    With both parts done, rollback and restart (which only call these) are exercised too.
    Nothing outside the throwaway model changes.

    Examples
    --------
    >>> exercise(ModelSpec(numeric=("x",), categorical=("site",), scaling="none"))
    """
    unknown = set(parts) - set(PARTS)
    if unknown:
        raise ValueError(f"unknown parts {sorted(unknown)}; valid: {', '.join(PARTS)}")
    model = LinearModel(spec)
    features = {name: 0.5 for name in spec.numeric} | {name: "a" for name in spec.categorical}
    rows = model.rows([features] * 3, remember=False)
    if "learn" in parts:
        # every mode in one batch: score only, learn, held out (score and loss)
        model.process(rows, np.array([0.0, 1.0, 1.0]), np.array([0, 1, 2], np.int8), Outcome.empty(3))
    if "read" in parts:
        model.score_rows_both(rows)
        model.score_window(rows, np.zeros(3), 3, 500, 1e6)
        model.weights("raw")
        model.weights("averaged")
        model.distance()
    if set(parts) == set(PARTS):
        model.rollback()
        model.restart()
