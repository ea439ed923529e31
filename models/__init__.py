"""trimtab's learning core: arithmetic only (numpy and numba), no I/O.

Losses, constraint sets and projections, step rules, averaging schemes, feature mapping, the
linear model with its compiled kernels, the guarantee certificate and state snapshots.
"""

from .certificate import certificate
from .constraints import Constraint, project
from .errors import InvalidInput, InvalidSettings, NonFiniteInput, SnapshotError, TrimtabError
from .features import FeatureMapper, Rows, stable_hash64
from .linear import ITERATES, LinearModel, Outcome
from .spec import ModelSpec

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
