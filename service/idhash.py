"""Vectorized event-id hashing (BLAKE2b, compiled) and a bounded-memory set of seen ids.

The engine assigns an event to the held-out share by ``stable_hash64("holdout\\x1f" + id)``
(BLAKE2b with an 8-byte digest, see :func:`models.stable_hash64`). Hashing one id in Python costs
about a microsecond, which caps a columnar replay near a million events per second before anything
else runs, so :func:`hash_ids` computes the same digests in a compiled loop over the bytes of an
Arrow-style string column (offsets and data). BLAKE2b is RFC 7693 (Saarinen, Aumasson, 2015);
the test suite checks the kernel against :mod:`hashlib`.

:class:`IdSet` remembers the ids already applied, so that an offline replay applies a duplicate id
once, as the live service does. It stores the same 64-bit hash, not the id: 8 bytes per slot in an
open-addressing table kept between a quarter and a half full, i.e. 16 to 32 bytes per distinct id
(16 MiB for a million ids). Two distinct ids share a hash with probability about ``n**2 / 2**65``
(about 3e-8 for a million ids); such a pair would be treated as a duplicate.
"""

from __future__ import annotations

import numpy as np

from service.kernels import FEEDS

__all__ = ["HOLDOUT_PREFIX", "IdSet", "hash_ids", "hash_strings", "holdout_fractions", "id_keys"]

#: The prefix :func:`service.engine.holdout_fraction` hashes the id with.
HOLDOUT_PREFIX = b"holdout\x1f"


_IV = np.array([0x6A09E667F3BCC908, 0xBB67AE8584CAA73B, 0x3C6EF372FE94F82B, 0xA54FF53A5F1D36F1,
                0x510E527FADE682D1, 0x9B05688C2B3E6C1F, 0x1F83D9ABFB41BD6B, 0x5BE0CD19137E2179],
               dtype=np.uint64)
#: h[0] of BLAKE2b with an 8-byte digest and no key: IV[0] ^ 0x01010000 ^ (keylen << 8) ^ outlen
_H0 = np.uint64(0x6A09E667F3BCC908 ^ 0x01010008)
#: ... and with a 16-byte digest (the deduplication key, :func:`service.storage.seen.id_key`)
_H0_16 = np.uint64(0x6A09E667F3BCC908 ^ 0x01010010)


def hash_ids(offsets: np.ndarray, data: np.ndarray, valid: np.ndarray | None = None,
             prefix: bytes = HOLDOUT_PREFIX) -> np.ndarray:
    """64-bit BLAKE2b hashes of ``prefix + string`` for a column of UTF-8 strings.

    Parameters
    ----------
    offsets
        ``n + 1`` byte offsets into ``data`` (an Arrow string column's offsets).
    data
        The UTF-8 bytes, as ``uint8``.
    valid
        Rows to hash (others get 0); all rows when omitted.

    Returns
    -------
    numpy.ndarray
        ``uint64`` values equal to ``models.stable_hash64(prefix.decode() + text)``.
    """
    return _digests(offsets, data, valid, prefix, _H0, 1)[:, 0]


def _digests(offsets, data, valid, prefix: bytes, h0, words: int) -> np.ndarray:
    """The first ``words`` 64-bit words of the BLAKE2b digests (``h0``: of which length) of
    ``prefix + string``, one row per string (zeros where not ``valid``)."""
    offsets = _read_only(offsets, np.int64)
    n = offsets.shape[0] - 1
    valid = np.ones(n, dtype=np.bool_) if valid is None else valid
    out = np.zeros((n, words), dtype=np.uint64)
    if n:
        data = np.zeros(1, dtype=np.uint8) if len(data) == 0 else data
        FEEDS.hash_column(offsets, _read_only(data, np.uint8), _read_only(valid, np.bool_),
                          np.frombuffer(prefix, dtype=np.uint8), _IV, h0, out)
    return out


def id_keys(offsets: np.ndarray, data: np.ndarray, valid: np.ndarray) -> list:
    """:func:`service.storage.seen.id_key` (the 16-byte BLAKE2b digest) of each string of a column
    like :func:`hash_ids` takes, ``None`` where not ``valid``; computed in the compiled loop."""
    blob = _digests(offsets, data, valid, b"", _H0_16, 2).astype("<u8", copy=False).tobytes()
    return [blob[16 * k:16 * k + 16] if v else None for k, v in enumerate(valid.tolist())]


def _read_only(a, dtype) -> np.ndarray:
    """``a`` as a contiguous read-only array of ``dtype`` (a view when it already is one).

    numba compiles a function once per combination of argument types, and a read-only array
    (``np.frombuffer`` of bytes, an Arrow buffer) is another type than a writable one: passing
    every input read-only keeps the compiled functions here at one signature each.
    """
    view = np.ascontiguousarray(a, dtype=dtype).view()
    view.flags.writeable = False
    return view


def hash_strings(texts, prefix: bytes = HOLDOUT_PREFIX) -> np.ndarray:
    """:func:`hash_ids` of a Python sequence of strings (``None`` entries hash to 0)."""
    encoded = [b"" if t is None else t.encode("utf-8", "surrogatepass") for t in texts]
    lengths = np.fromiter((len(b) for b in encoded), dtype=np.int64, count=len(encoded))
    offsets = np.zeros(len(encoded) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    data = np.frombuffer(b"".join(encoded), dtype=np.uint8)
    return hash_ids(offsets, data, np.array([t is not None for t in texts], dtype=np.bool_), prefix)


def holdout_fractions(hashes: np.ndarray) -> np.ndarray:
    """``hash / 2**64`` as float64, the same rounding as :func:`service.engine.holdout_fraction`."""
    return hashes.astype(np.float64) / float(2**64)


class IdSet:
    """The 64-bit id hashes seen so far (open addressing, grown by doubling at half full).

    Examples
    --------
    >>> seen = IdSet()
    >>> keys = hash_strings(["a", "b", "a", None])
    >>> seen.add(keys, np.array([True, True, True, False])).tolist()
    [True, True, False, True]
    >>> len(seen)
    2
    """

    def __init__(self, capacity: int = 1 << 16) -> None:
        size = 1 << max(4, int(capacity - 1).bit_length())
        self._table = np.zeros(size, dtype=np.uint64)
        self._count = 0

    def __len__(self) -> int:
        return self._count

    @property
    def nbytes(self) -> int:
        """Memory held by the table."""
        return self._table.nbytes

    def add(self, keys: np.ndarray, use: np.ndarray) -> np.ndarray:
        """Add the keys where ``use`` is True, in order; return False where a key was already seen."""
        need = self._count + int(np.count_nonzero(use))
        if need * 2 > self._table.shape[0]:
            size = self._table.shape[0]
            while need * 2 > size:
                size *= 2
            grown = np.zeros(size, dtype=np.uint64)
            FEEDS.rehash(self._table, grown)
            self._table = grown
        keep = np.ones(keys.shape[0], dtype=np.bool_)
        self._count += FEEDS.insert_keys(self._table, _read_only(keys, np.uint64), _read_only(use, np.bool_), keep)
        return keep
