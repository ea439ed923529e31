"""trimtab's learning core: arithmetic only (numpy and numba), no I/O.

Losses, constraint sets and projections, step rules, averaging schemes, feature mapping, the
linear model with its compiled kernels, the guarantee certificate and state snapshots.
"""

from .certificate import certificate
from .constraints import Constraint, project
from .errors import InvalidInput, InvalidSettings, NonFiniteInput, SnapshotError, TrimtabError
from .features import FeatureMapper, Rows, stable_hash64
from .spec import ModelSpec

#: names served by :mod:`models.linear`, imported on first use: it loads numba (about 0.4 s of CPU),
#: which settings, errors and the certificate do not need (``trimtab check-config`` uses only those)
_LINEAR = ("ITERATES", "LinearModel", "Outcome")


def __getattr__(name: str):
    if name in _LINEAR:
        from . import linear

        return getattr(linear, name)
    raise AttributeError(f"module 'models' has no attribute {name!r}")

__all__ = [
    "Constraint",
    "FeatureMapper",
    "ITERATES",
    "InvalidInput",
    "InvalidSettings",
    "LinearModel",
    "ModelSpec",
    "NonFiniteInput",
    "Outcome",
    "Rows",
    "SnapshotError",
    "TrimtabError",
    "certificate",
    "project",
    "stable_hash64",
]
