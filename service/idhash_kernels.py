"""The compiled loops of :mod:`service.idhash`: BLAKE2b over a string column (RFC 7693, Saarinen and
Aumasson, 2015) and the open-addressing table of seen ids.

Kept in a module of their own so that they can be built ahead of time (:mod:`service.kernels`) and
called without importing numba; they are reached through ``service.kernels.FEEDS``.
"""

from __future__ import annotations

from models.jit import numba
import numpy as np

__all__ = ["hash_column", "insert_keys", "rehash"]

_jit = numba.njit(cache=True, nogil=True)

#: The (a, b, c, d) words of the eight mixings of a round, in order (RFC 7693, sec. 3.2).
_LANES = np.array([[0, 4, 8, 12], [1, 5, 9, 13], [2, 6, 10, 14], [3, 7, 11, 15],
                   [0, 5, 10, 15], [1, 6, 11, 12], [2, 7, 8, 13], [3, 4, 9, 14]], dtype=np.int64)
_R16, _R24, _R32, _R40, _R48, _R63, _L1 = (np.uint64(k) for k in (16, 24, 32, 40, 48, 63, 1))


@_jit
def _compress(h, block, counter, last, m, v, iv, sigma):
    """One BLAKE2b compression (RFC 7693, sec. 3.2) of ``block`` into ``h``.

    The mixing function G is written out in a loop over the lanes rather than called with constant
    word indices: a compiled helper taking constants would be compiled once per distinct call (eight
    mixings, four rotations), which cost seconds on a first run for no speed. ``_LANES`` is read as
    a global: numba freezes it into the code as a constant, so the loop over it runs as fast as the
    written-out form (passed as an argument, it ran about 40% slower).
    """
    lanes = _LANES
    for w in range(16):
        acc = np.uint64(0)
        for k in range(8):
            acc |= np.uint64(block[8 * w + k]) << np.uint64(8 * k)
        m[w] = acc
    for i in range(8):
        v[i] = h[i]
        v[i + 8] = iv[i]
    v[12] ^= np.uint64(counter)
    if last:
        v[14] = ~v[14]
    for r in range(12):
        s = sigma[r % 10]
        for g in range(8):
            a, b, c, d = lanes[g, 0], lanes[g, 1], lanes[g, 2], lanes[g, 3]
            va, vb, vc, vd = v[a], v[b], v[c], v[d]
            va = va + vb + m[s[2 * g]]
            vd ^= va
            vd = (vd >> _R32) | (vd << _R32)
            vc = vc + vd
            vb ^= vc
            vb = (vb >> _R24) | (vb << _R40)
            va = va + vb + m[s[2 * g + 1]]
            vd ^= va
            vd = (vd >> _R16) | (vd << _R48)
            vc = vc + vd
            vb ^= vc
            vb = (vb >> _R63) | (vb << _L1)
            v[a], v[b], v[c], v[d] = va, vb, vc, vd
    for i in range(8):
        h[i] ^= v[i] ^ v[i + 8]


@_jit
def hash_column(offsets, data, valid, prefix, iv, sigma, h0, out):
    """BLAKE2b-64 of ``prefix + data[offsets[i]:offsets[i+1]]`` for every valid row."""
    h = np.empty(8, dtype=np.uint64)
    m = np.empty(16, dtype=np.uint64)
    v = np.empty(16, dtype=np.uint64)
    block = np.zeros(128, dtype=np.uint8)
    np_ = prefix.shape[0]
    for i in range(offsets.shape[0] - 1):
        if not valid[i]:
            out[i] = 0
            continue
        lo = offsets[i]
        total = np_ + (offsets[i + 1] - lo)
        for k in range(8):
            h[k] = iv[k]
        h[0] = h0
        pos = 0  # bytes of the message consumed
        while True:
            fill = 0
            while fill < 128 and pos < total:
                block[fill] = prefix[pos] if pos < np_ else data[lo + pos - np_]
                fill += 1
                pos += 1
            last = pos >= total
            if last:
                for k in range(fill, 128):
                    block[k] = 0
            _compress(h, block, pos, last, m, v, iv, sigma)
            if last:
                break
        out[i] = h[0]


@_jit
def insert_keys(table, keys, use, keep):
    """Insert ``keys[use]`` in order; ``keep[i]`` is False for a key seen before. Returns the count added."""
    mask = np.uint64(table.shape[0] - 1)
    added = 0
    for i in range(keys.shape[0]):
        if not use[i]:
            keep[i] = True
            continue
        key = keys[i]
        if key == 0:
            key = np.uint64(0x9E3779B97F4A7C15)  # 0 marks an empty slot
        slot = key & mask
        while True:
            cur = table[slot]
            if cur == 0:
                table[slot] = key
                keep[i] = True
                added += 1
                break
            if cur == key:
                keep[i] = False
                break
            slot = (slot + np.uint64(1)) & mask
    return added


@_jit
def rehash(old, new):
    mask = np.uint64(new.shape[0] - 1)
    for k in old:
        if k != 0:
            slot = k & mask
            while new[slot] != 0:
                slot = (slot + np.uint64(1)) & mask
            new[slot] = k
