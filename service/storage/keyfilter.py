"""An in-memory Bloom filter over the deduplication index, so most new ids skip the index lookup.

Almost every id a producer sends is new; proving it new by a lookup in ``seen`` (a B-tree of
random 128-bit keys, :mod:`service.storage.seen`) costs a primary-key probe per id. The filter
answers "certainly never seen" for most of them from memory, and only the ids it cannot rule out
are looked up. Its answers are one-sided:

* a key that was ever added is always reported as *maybe seen* (no false negatives), so a
  duplicate always reaches the index lookup and is never accepted twice;
* a key never added is reported *maybe seen* with a small probability (a false positive), which
  only costs the lookup that would have happened anyway: a new id is never dropped.

The keys are already uniform (BLAKE2b digests), so the probe positions are taken from the key
itself: double hashing with the key's two 64-bit halves, ``h1 + i * h2`` for ``i < PROBES``
(Kirsch and Mitzenmacher, 2006, "Less hashing, same performance: building a better Bloom filter").
With ``BITS_PER_KEY`` bits per key and 4 probes the false-positive rate is about
``(1 - exp(-4 / 16)) ** 4``, 0.24 % (Bloom, 1970, the standard estimate).

Memory is bounded: the journal sizes the filter when it opens the file, for twice the keys the
index holds then, at least :data:`MIN_BITS` (8 MiB, 0.24 % false positives up to 4 million keys)
and at most :data:`MAX_BITS` (32 MiB). It keeps that size while the file stays open (rebuilding it
means reading the whole index back: the next start does that); as it fills, its false-positive
rate rises (0.24 % at 16 bits per key, 16 % at 4), which only makes more lookups, never a wrong
answer. Everything is vectorised with numpy: no Python per key.
"""

from __future__ import annotations

import numpy as np

__all__ = ["BITS_PER_KEY", "MAX_BITS", "MIN_BITS", "PROBES", "KeyFilter"]

PROBES = 4
BITS_PER_KEY = 16
MIN_BITS = 1 << 26          # 8 MiB
MAX_BITS = 1 << 28          # 32 MiB
_KEY_BYTES = 16


def _halves(keys: list[bytes]) -> np.ndarray:
    """The keys as an ``(n, 2)`` array of little-endian 64-bit halves (each key is 16 bytes)."""
    joined = b"".join(keys)
    if len(joined) != _KEY_BYTES * len(keys):
        raise ValueError("every key must be 16 bytes (service.storage.seen.id_key)")
    return np.frombuffer(joined, dtype="<u8").reshape(-1, 2)


class KeyFilter:
    """A Bloom filter of 16-byte index keys.

    Parameters
    ----------
    bits
        Size in bits, rounded up to a power of two within ``[MIN_BITS, MAX_BITS]``.

    Examples
    --------
    >>> from service.storage.seen import id_key
    >>> f = KeyFilter()
    >>> f.add([id_key("v07-0001")])
    >>> bool(f.maybe([id_key("v07-0001")])[0])
    True
    """

    def __init__(self, bits: int = MIN_BITS) -> None:
        size = MIN_BITS
        while size < min(bits, MAX_BITS):
            size <<= 1
        self.bits = size
        self._mask = np.uint64(size - 1)
        self._words = np.zeros(size // 64, dtype=np.uint64)
        self.count = 0  # keys added (the index only ever adds new ones)

    @classmethod
    def sized_for(cls, n: int) -> KeyFilter:
        """An empty filter with room for ``n`` keys (and as many again) at :data:`BITS_PER_KEY`."""
        return cls(2 * max(n, 1) * BITS_PER_KEY)

    def _positions(self, halves: np.ndarray) -> np.ndarray:
        h1 = halves[:, 0:1]
        h2 = halves[:, 1:2] | np.uint64(1)
        steps = np.arange(PROBES, dtype=np.uint64)
        with np.errstate(over="ignore"):
            return (h1 + steps * h2) & self._mask  # wraps modulo 2**64, as double hashing intends

    def add(self, keys: list[bytes]) -> None:
        """Add keys (after the transaction that indexed them committed)."""
        if not keys:
            return
        pos = self._positions(_halves(keys)).ravel()
        words, bits = pos >> np.uint64(6), np.uint64(1) << (pos & np.uint64(63))
        # a buffered OR (fast) keeps one write per word when a word repeats among ``words``; the
        # bits such a repeat lost are set again unbuffered (``ufunc.at``, slow but rarely needed)
        self._words[words] |= bits
        lost = (self._words[words] & bits) != bits
        if lost.any():
            np.bitwise_or.at(self._words, words[lost], bits[lost])
        self.count += len(keys)

    def maybe(self, keys: list[bytes]) -> np.ndarray:
        """For each key: ``False`` if it was certainly never added, ``True`` if it may have been."""
        if not keys:
            return np.zeros(0, dtype=bool)
        pos = self._positions(_halves(keys))
        hit = (self._words[pos >> np.uint64(6)] >> (pos & np.uint64(63))) & np.uint64(1)
        return hit.all(axis=1)
