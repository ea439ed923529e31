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

#: The message schedule of the twelve rounds (RFC 7693, sec. 2.7; round ``r`` uses row ``r % 10``). Read as a
#: global: numba freezes it into the code as a constant (passed as an argument, the hash ran about 40% slower).
_SIGMA = np.array([
    [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15],
    [14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3],
    [11, 8, 12, 0, 5, 2, 15, 13, 10, 14, 3, 6, 7, 1, 9, 4],
    [7, 9, 3, 1, 13, 12, 11, 14, 2, 6, 5, 10, 4, 0, 15, 8],
    [9, 0, 5, 7, 2, 4, 10, 15, 14, 1, 11, 12, 6, 8, 3, 13],
    [2, 12, 6, 10, 0, 11, 8, 3, 4, 13, 7, 5, 15, 14, 1, 9],
    [12, 5, 1, 15, 14, 13, 4, 10, 0, 7, 6, 3, 9, 2, 8, 11],
    [13, 11, 7, 14, 12, 1, 3, 9, 5, 0, 15, 4, 8, 6, 2, 10],
    [6, 15, 14, 9, 11, 3, 0, 8, 12, 2, 13, 7, 1, 4, 10, 5],
    [10, 2, 8, 4, 7, 6, 1, 5, 15, 11, 9, 14, 3, 12, 13, 0]], dtype=np.int64)
_R16, _R24, _R32, _R40, _R48, _R63, _L1 = (np.uint64(k) for k in (16, 24, 32, 40, 48, 63, 1))


# inlined where it is called, with variables (never constants) as arguments: one compiled body
@numba.njit(cache=True, nogil=True, inline="always")
def _mix(va, vb, vc, vd, x, y):
    """The mixing function G (RFC 7693, sec. 3.1) of the words ``va``..``vd`` with message words ``x``, ``y``:
    two half-steps, rotating by 32 and 24 bits, then by 16 and 63."""
    va, vb, vc, vd = _half_mix(va, vb, vc, vd, x, _R32, _R32, _R24, _R40)
    return _half_mix(va, vb, vc, vd, y, _R16, _R48, _R63, _L1)


@numba.njit(cache=True, nogil=True, inline="always")
def _half_mix(va, vb, vc, vd, x, rd, ld, rb, lb):
    """Half of G: ``vd`` rotated right by ``rd`` (``ld = 64 - rd``), ``vb`` by ``rb`` (``lb = 64 - rb``)."""
    va = va + vb + x
    vd ^= va
    vd = (vd >> rd) | (vd << ld)
    vc = vc + vd
    vb ^= vc
    vb = (vb >> rb) | (vb << lb)
    return va, vb, vc, vd


@_jit
def _compress(h, block, counter, last, m, iv):
    """One BLAKE2b compression (RFC 7693, sec. 3.2) of ``block`` into ``h``.

    The sixteen working words are local variables, not an array, so that they stay in registers
    (about 30% faster than with the words in an array).
    """
    for w in range(16):
        acc = np.uint64(0)
        for k in range(8):
            acc |= np.uint64(block[8 * w + k]) << np.uint64(8 * k)
        m[w] = acc
    v0, v1, v2, v3, v4, v5, v6, v7 = h[0], h[1], h[2], h[3], h[4], h[5], h[6], h[7]
    v8, v9, v10, v11, v12, v13, v14, v15 = iv[0], iv[1], iv[2], iv[3], iv[4], iv[5], iv[6], iv[7]
    v12 ^= np.uint64(counter)
    if last:
        v14 = ~v14
    for r in range(12):
        s = _SIGMA[r % 10]
        v0, v4, v8, v12 = _mix(v0, v4, v8, v12, m[s[0]], m[s[1]])
        v1, v5, v9, v13 = _mix(v1, v5, v9, v13, m[s[2]], m[s[3]])
        v2, v6, v10, v14 = _mix(v2, v6, v10, v14, m[s[4]], m[s[5]])
        v3, v7, v11, v15 = _mix(v3, v7, v11, v15, m[s[6]], m[s[7]])
        v0, v5, v10, v15 = _mix(v0, v5, v10, v15, m[s[8]], m[s[9]])
        v1, v6, v11, v12 = _mix(v1, v6, v11, v12, m[s[10]], m[s[11]])
        v2, v7, v8, v13 = _mix(v2, v7, v8, v13, m[s[12]], m[s[13]])
        v3, v4, v9, v14 = _mix(v3, v4, v9, v14, m[s[14]], m[s[15]])
    h[0] ^= v0 ^ v8
    h[1] ^= v1 ^ v9
    h[2] ^= v2 ^ v10
    h[3] ^= v3 ^ v11
    h[4] ^= v4 ^ v12
    h[5] ^= v5 ^ v13
    h[6] ^= v6 ^ v14
    h[7] ^= v7 ^ v15


@_jit
def hash_column(offsets, data, valid, prefix, iv, h0, out):
    """BLAKE2b of ``prefix + data[offsets[i]:offsets[i+1]]`` for every valid row: its first
    ``out.shape[1]`` words (the digest's bytes, little-endian; ``h0`` says the digest's length)."""
    h = np.empty(8, dtype=np.uint64)
    m = np.empty(16, dtype=np.uint64)
    block = np.zeros(128, dtype=np.uint8)
    np_ = prefix.shape[0]
    for i in range(offsets.shape[0] - 1):
        if not valid[i]:
            for w in range(out.shape[1]):
                out[i, w] = 0
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
            _compress(h, block, pos, last, m, iv)
            if last:
                break
        for w in range(out.shape[1]):
            out[i, w] = h[w]


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
