"""Feature mapping: declared numeric features (with optional frozen scaling) and hashed categoricals.

Coordinates ``0 .. n_numeric - 1`` hold the numeric features in the order they are declared;
coordinates ``n_numeric .. n_numeric + 2**hash_bits - 1`` hold signed hash buckets of categorical
values (the hashing trick with a sign bit: Weinberger, Dasgupta, Langford, Smola, Attenberg, 2009,
"Feature hashing for large scale multitask learning"). The hash is BLAKE2b of
``"<name>\\x1f<value>"``: stable across processes, platforms and Python versions (Python's own
``hash()`` is salted per process).

Rules, also in docs/events.md and docs/config.md:

* a numeric feature that is absent or ``None`` is *missing*: it contributes nothing, which with
  warm-up scaling means it is imputed at its warm-up mean;
* booleans count as 0/1 for numeric features and as ``"true"``/``"false"`` for categorical ones;
  a categorical number is used by its text (``7`` and ``7.0`` are the same value);
* features that are not declared are ignored here (the service's boundary rejects or ignores them,
  as configured);
* two categorical values of one event that fall in the same bucket are summed.

Warm-up scaling: the mean and standard deviation of every numeric feature are estimated on the first
``warmup_events`` learning events and then frozen, so that every iterate, raw or averaged, lives in
one coordinate system (an average of iterates expressed in drifting units would mean nothing).
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field

import numpy as np

from .errors import NonFiniteInput

__all__ = ["FeatureMapper", "Rows", "stable_hash64"]

_CACHE_LIMIT = 1 << 16


def stable_hash64(text: str) -> int:
    """64-bit BLAKE2b hash of ``text`` (UTF-8), the same in every process and on every platform."""
    return int.from_bytes(hashlib.blake2b(text.encode("utf-8", "surrogatepass"), digest_size=8).digest(), "little")


def categorical_text(value) -> str | None:
    """The canonical text of a categorical value, ``None`` for missing."""
    if value is None:
        return None
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


@dataclass
class Rows:
    """Events as a compressed sparse row matrix: ``indices[indptr[i]:indptr[i+1]]`` of event ``i``."""

    indptr: np.ndarray
    indices: np.ndarray
    values: np.ndarray
    _width: int | None = field(default=None, repr=False, compare=False)

    def __len__(self) -> int:
        return self.indptr.shape[0] - 1

    def width(self) -> int:
        """The largest number of active coordinates in one row (computed once: rows are not changed)."""
        if self._width is None:
            self._width = int(np.max(np.diff(self.indptr))) if len(self) else 0
        return self._width

    def take(self, idx) -> Rows:
        """The rows ``idx`` (an index array or slice), as a new :class:`Rows`."""
        idx = np.arange(len(self))[idx] if isinstance(idx, slice) else np.asarray(idx, dtype=np.int64)
        lens = self.indptr[idx + 1] - self.indptr[idx]
        indptr = np.zeros(len(idx) + 1, dtype=np.int64)
        np.cumsum(lens, out=indptr[1:])
        pick = np.concatenate([np.arange(self.indptr[i], self.indptr[i + 1]) for i in idx]) if len(idx) else []
        pick = np.asarray(pick, dtype=np.int64)
        return Rows(indptr, self.indices[pick].copy(), self.values[pick].copy())

    @staticmethod
    def concat(parts: list[Rows]) -> Rows:
        if not parts:
            return Rows(np.zeros(1, np.int64), np.zeros(0, np.int64), np.zeros(0))
        indptr = [np.zeros(1, np.int64)]
        offset = 0
        for p in parts:
            indptr.append(p.indptr[1:] + offset)
            offset += int(p.indptr[-1])
        return Rows(np.concatenate(indptr), np.concatenate([p.indices for p in parts]),
                    np.concatenate([p.values for p in parts]))


class FeatureMapper:
    """Maps feature dicts to sparse rows of a fixed-width coordinate space.

    Parameters
    ----------
    numeric
        Names of the numeric features, in coordinate order.
    categorical
        Names of the categorical features (hashed).
    hash_bits
        Categorical values go to ``2**hash_bits`` signed buckets.

    Examples
    --------
    >>> m = FeatureMapper(["ambient_c"], ["van"], hash_bits=4)
    >>> rows = m.map([{"ambient_c": 21.5, "van": "V07"}, {"ambient_c": None}])
    >>> rows.indptr.tolist(), rows.values.tolist()[0]
    ([0, 2, 2], 21.5)
    """

    def __init__(self, numeric, categorical, hash_bits: int) -> None:
        self.numeric = tuple(numeric)
        self.categorical = tuple(categorical)
        self.hash_bits = int(hash_bits)
        self._mask = (1 << self.hash_bits) - 1
        self._cache: dict[tuple[str, str], tuple[int, float]] = {}

    @property
    def dim(self) -> int:
        """Number of coordinates (numeric features plus hash buckets), without the intercept."""
        return len(self.numeric) + (1 << self.hash_bits) if self.categorical else len(self.numeric)

    def bucket(self, name: str, text: str, remember: bool = True) -> tuple[int, float]:
        """Coordinate and sign of categorical value ``text`` of feature ``name``.

        ``remember=False`` looks the value up without adding it to the values seen: the hash is
        deterministic, so the answer is the same either way, and values that only pass through
        (scoring) never grow the state that checkpoints and the model card carry.
        """
        key = (name, text)
        hit = self._cache.get(key)
        if hit is not None:
            return hit
        h = stable_hash64(f"{name}\x1f{text}")
        hit = (len(self.numeric) + (h & self._mask), -1.0 if h >> 63 else 1.0)
        if remember and len(self._cache) < _CACHE_LIMIT:
            self._cache[key] = hit
        return hit

    def known_values(self) -> dict[tuple[str, str], tuple[int, float]]:
        """The categorical values seen so far (up to 65,536), for reporting coefficients by value."""
        return dict(self._cache)

    def map(self, events, where: str = "", remember: bool = True) -> Rows:
        """Map a sequence of feature dicts; raise :class:`NonFiniteInput` on NaN/inf numbers.

        ``remember``: whether new categorical values join the values seen (see :meth:`bucket`).
        """
        # hot (every learned event): locals instead of attribute look-ups, the bucket cache read
        # inline; a row's numeric coordinates come first and never share a bucket's coordinate
        indptr = [0]
        indices: list[int] = []
        values: list[float] = []
        add_index, add_value, add_end = indices.append, values.append, indptr.append
        numeric = tuple(enumerate(self.numeric))
        categorical = self.categorical
        cached = self._cache.get
        isfinite = math.isfinite
        for i, feats in enumerate(events):
            get = feats.get
            for j, name in numeric:
                x = get(name)
                if x is None:
                    continue
                x = float(x)
                if not isfinite(x):
                    raise NonFiniteInput(f"not a finite number: {x!r}", where=f"{where}[{i}].features.{name}")
                add_index(j)
                add_value(x)
            start = len(indices)
            for name in categorical:
                v = get(name)
                if v is None:
                    continue
                text = v if v.__class__ is str else categorical_text(v)
                hit = cached((name, text))
                j, sign = hit if hit is not None else self.bucket(name, text, remember)
                if len(indices) > start and j in indices[start:]:
                    values[start + indices[start:].index(j)] += sign
                else:
                    add_index(j)
                    add_value(sign)
            add_end(len(indices))
        return Rows(np.asarray(indptr, dtype=np.int64), np.asarray(indices, dtype=np.int64),
                    np.asarray(values, dtype=np.float64))
