"""numba, imported without the part of its start-up that trimtab never uses.

When numba first compiles or loads a function from its cache it imports its array library
(``numba.np.arraymath``), which checks once whether scipy's BLAS is there, for the compiled
``np.correlate`` and ``np.convolve`` only. That check imports ``scipy.linalg`` (about 0.3 s of CPU,
a sixth of a short replay's start, ``python -X importtime``). No trimtab kernel calls those two
functions (nor any other ``np.linalg``/``np.dot`` inside compiled code), so :data:`numba` here is numba
with its array library imported while ``scipy.linalg`` is hidden: the check answers "no BLAS", which only
changes the code of those two functions. If ``scipy.linalg`` is already imported, nothing is hidden;
an import of it later works as usual.

Every module with compiled functions imports numba from here (``from models.jit import numba``),
so whichever is imported first does this once.
"""

from __future__ import annotations

import sys

import numba

__all__ = ["numba"]


def _import_array_library() -> None:
    if "numba.np.arraymath" in sys.modules or "scipy.linalg" in sys.modules:
        return
    sys.modules["scipy.linalg"] = None  # an import of scipy.linalg now fails at once (ImportError)
    try:
        import numba.np.arraymath  # noqa: F401
    finally:
        if sys.modules.get("scipy.linalg", 0) is None:
            del sys.modules["scipy.linalg"]


_import_array_library()
