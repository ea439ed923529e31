"""The one-box publication channel: a shared-memory file with two slots and an atomic version swap.

The learner creates an anonymous shared-memory file (``memfd_create`` on Linux; an unlinked
temporary file elsewhere), so nothing is left behind whatever way the processes end; scorer
processes inherit its descriptor. Layout (integers little-endian u64)::

    header (64 bytes): magic, slot capacity, newest version, slot holding it
    slot 0: begin version, length, payload[capacity], end version
    slot 1: the same

Publishing version ``v`` (one writer) goes to the slot that does not hold the newest version: write
``begin = v``, the length and the payload, then ``end = v``, then the header's version and slot.
A reader reads the header, then the slot's ``end``, copies the payload, and reads the slot's
``begin`` last: the copy is whole exactly when ``end == begin == v`` (a writer that started on this
slot meanwhile had already changed ``begin``; the seqlock discipline of Lameter, "Effective
synchronization on Linux/NUMA systems", 2005). Otherwise it retries. On top of that the payload
carries SHA-256 checksums (:mod:`service.publish.snapshot`), so even a copy that slipped past the
version check on hardware that reorders stores is refused, never scored.

Readers never block the writer and the writer never waits for readers; a reader sees the newest
whole version, skipping intermediate ones when the learner publishes faster than it reads.
"""

from __future__ import annotations

import mmap
import os
import struct
import tempfile

from service.publish.snapshot import ServingSnapshot, SnapshotDecodeFailed

__all__ = ["SharedPublisher", "SharedReader", "capacity_for"]

MAGIC = 0x3130425550545454  # b"TTTPUB01" read as a little-endian u64
_HEAD = 64
_U64 = struct.Struct("<Q")
_RETRIES = 1000


def capacity_for(config) -> int:
    """Bytes one slot must hold for ``config``'s model: its state at the largest warm-up buffer, with room.

    The state is the two iterates (16 bytes a coordinate), the scaling, the counters, the spec as
    JSON and, while scaling warms up, the buffered rows (at most one coordinate per declared feature
    plus the target, 16 bytes each).
    """
    spec = config.model_spec()
    dim = spec.dim() + 1
    width = len(spec.numeric) + len(spec.categorical) + 1
    warm = spec.warmup_events * (16 * width + 16) if spec.scaling != "none" else 0
    return 16 * dim + 32 * len(spec.numeric) + warm + 256 * 1024


def _anonymous_file(size: int) -> int:
    if hasattr(os, "memfd_create"):
        fd = os.memfd_create("trimtab-published-model", os.MFD_CLOEXEC)
    else:
        fd = tempfile.TemporaryFile().detach()  # noqa: SIM115 (the descriptor outlives the object)
    os.ftruncate(fd, size)
    return fd


class _Layout:
    """Offsets in the file for a slot capacity."""

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self.slot_bytes = 16 + capacity + 8
        self.size = _HEAD + 2 * self.slot_bytes

    def slot(self, k: int) -> int:
        return _HEAD + k * self.slot_bytes


class SharedPublisher:
    """The learner's end: creates the shared file and publishes into it.

    Parameters
    ----------
    capacity
        Largest snapshot in bytes (see :func:`capacity_for`); a bigger one is refused with a
        ``ValueError`` that says so, and the previous version stays published.
    """

    blocking = False

    def __init__(self, capacity: int) -> None:
        self._lay = _Layout(int(capacity))
        self.fd = _anonymous_file(self._lay.size)
        self._mm = mmap.mmap(self.fd, self._lay.size)
        _U64.pack_into(self._mm, 8, self._lay.capacity)
        _U64.pack_into(self._mm, 0, MAGIC)
        self._version = 0
        self._slot = 1

    def next_version(self) -> int:
        return self._version + 1

    def publish(self, snapshot: ServingSnapshot) -> None:
        if snapshot.version != self._version + 1:
            raise ValueError(f"version {snapshot.version} published after {self._version}: expected "
                             f"{self._version + 1}")
        blob = snapshot.to_bytes()
        lay, mm = self._lay, self._mm
        if len(blob) > lay.capacity:
            raise ValueError(f"published model of {len(blob)} bytes does not fit the {lay.capacity}-byte slot")
        k = 1 - self._slot
        at = lay.slot(k)
        v = snapshot.version
        _U64.pack_into(mm, at, v)                       # begin: a reader of this slot now fails its check
        _U64.pack_into(mm, at + 8, len(blob))
        mm[at + 16:at + 16 + len(blob)] = blob
        _U64.pack_into(mm, at + 16 + lay.capacity, v)   # end: the slot is whole
        _U64.pack_into(mm, 24, k)
        _U64.pack_into(mm, 16, v)                       # the swap: readers now take this slot
        self._version, self._slot = v, k

    def close(self) -> None:
        self._mm.close()
        os.close(self.fd)


class SharedReader:
    """A scorer's end: maps the file behind an inherited descriptor ``fd`` (read only)."""

    blocking = False

    def __init__(self, fd: int) -> None:
        size = os.fstat(fd).st_size
        self._mm = mmap.mmap(fd, size, prot=mmap.PROT_READ)
        if _U64.unpack_from(self._mm, 0)[0] != MAGIC:
            raise ValueError(f"descriptor {fd} is not a trimtab publication file")
        self._lay = _Layout(_U64.unpack_from(self._mm, 8)[0])
        self.torn = 0  # copies refused because the writer was in the slot meanwhile (counted, retried)

    def version(self) -> int:
        return _U64.unpack_from(self._mm, 16)[0]

    def latest(self) -> ServingSnapshot | None:
        mm, lay = self._mm, self._lay
        for _ in range(_RETRIES):
            v = _U64.unpack_from(mm, 16)[0]
            if v == 0:
                return None
            at = lay.slot(_U64.unpack_from(mm, 24)[0] & 1)
            end = _U64.unpack_from(mm, at + 16 + lay.capacity)[0]
            n = _U64.unpack_from(mm, at + 8)[0]
            blob = mm[at + 16:at + 16 + min(n, lay.capacity)]
            begin = _U64.unpack_from(mm, at)[0]
            if not begin == end >= v:  # the header moved on, or a writer is in this slot: read again
                self.torn += 1
                continue
            try:
                snap = ServingSnapshot.from_bytes(blob)
            except SnapshotDecodeFailed:
                self.torn += 1
                continue
            if snap.version == begin:
                return snap
            self.torn += 1
        raise SnapshotDecodeFailed(f"no whole published model after {_RETRIES} reads")

    def close(self) -> None:
        self._mm.close()
