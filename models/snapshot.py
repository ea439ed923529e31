"""Serialization of model state to bytes and back, bit for bit.

Layout (all integers little-endian)::

    b"TRIMTAB-STATE v1\\n"
    u64 header length, header (JSON, sorted keys): spec, flags, array names/dtypes/lengths
    the arrays' raw bytes, in header order
    u64 extra length, extra (JSON): reporting metadata outside the digest (categorical values seen)
    32 bytes: SHA-256 of everything above (detects truncation and corruption)

``state digest`` = SHA-256 of the first three parts only: two models have equal digests exactly
when their specs, counters and every coefficient are bit-identical.
"""

from __future__ import annotations

import hashlib
import json
import struct

import numpy as np

from .errors import SnapshotError

__all__ = ["pack", "unpack"]

MAGIC = b"TRIMTAB-STATE v1\n"


def pack(header: dict, arrays: dict[str, np.ndarray], extra: dict) -> tuple[bytes, str]:
    """Serialize; return ``(blob, state_digest)``."""
    names = list(arrays)
    header = dict(header, arrays=[[n, arrays[n].dtype.str, int(arrays[n].size)] for n in names])
    head = json.dumps(header, sort_keys=True, separators=(",", ":")).encode()
    parts = [MAGIC, struct.pack("<Q", len(head)), head]
    parts += [np.ascontiguousarray(arrays[n]).tobytes() for n in names]
    state = b"".join(parts)
    digest = hashlib.sha256(state).hexdigest()
    tail = json.dumps(extra, sort_keys=True, separators=(",", ":")).encode()
    body = state + struct.pack("<Q", len(tail)) + tail
    return body + hashlib.sha256(body).digest(), digest


def unpack(blob: bytes) -> tuple[dict, dict[str, np.ndarray], dict, str]:
    """Read a blob from :func:`pack`; return ``(header, arrays, extra, state_digest)``."""
    blob = bytes(blob)
    if not blob.startswith(MAGIC):
        raise SnapshotError("not a trimtab model state (bad magic bytes)")
    if len(blob) < len(MAGIC) + 8 + 32:
        raise SnapshotError("model state is truncated")
    body, check = blob[:-32], blob[-32:]
    if hashlib.sha256(body).digest() != check:
        raise SnapshotError("model state is corrupt or truncated (checksum mismatch)")
    pos = len(MAGIC)
    (hlen,) = struct.unpack_from("<Q", body, pos)
    pos += 8
    header = json.loads(body[pos:pos + hlen])
    pos += hlen
    arrays = {}
    for name, dtype, size in header.pop("arrays"):
        dt = np.dtype(dtype)
        n = dt.itemsize * size
        arrays[name] = np.frombuffer(body, dtype=dt, count=size, offset=pos).copy()
        pos += n
    digest = hashlib.sha256(body[:pos]).hexdigest()
    (tlen,) = struct.unpack_from("<Q", body, pos)
    pos += 8
    extra = json.loads(body[pos:pos + tlen])
    if pos + tlen != len(body):
        raise SnapshotError("model state has trailing bytes")
    return header, arrays, extra, digest
