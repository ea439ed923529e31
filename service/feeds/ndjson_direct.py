"""Plain NDJSON event lines parsed by a compiled pass straight into an Arrow table.

Arrow's JSON reader costs about 1.3 us per event of the demo feed (a general parser building
general columns); most lines of a feed have one simple shape, which the compiled parse of
:mod:`service.feeds.ndjson_parse` reads in one pass over the bytes into the columns the reader
would give them (strings as UTF-8 spans, numbers as doubles, ``null`` as missing). It takes only
lines it reads exactly as orjson does and leaves the others (``done`` false) to the general readers
of :mod:`service.feeds.ndjson_columns`, so it changes no result, only the cost: the table goes
through the same :func:`service.feeds.columns.from_arrow` checks as a table of Arrow's reader.
"""

from __future__ import annotations

import numpy as np

from service.kernels import FEEDS

__all__ = ["DirectParse"]

_TOP = ("id", "ts", "features", "target")


class DirectParse:
    """The compiled parse for one validator's declared features.

    Parameters
    ----------
    validator
        The run's :class:`~service.events.EventValidator` (declared features, task).
    """

    def __init__(self, validator) -> None:
        import pyarrow as pa

        self._pa = pa
        self.numeric = sorted(validator.numeric)
        self.categorical = sorted(validator.categorical)
        encoded = [name.encode("utf-8") for name in _TOP + tuple(self.numeric) + tuple(self.categorical)]
        self._names = _read_only(np.frombuffer(b"".join(encoded), dtype=np.uint8))
        self._offsets = _read_only(np.cumsum([0] + [len(e) for e in encoded], dtype=np.int64))
        slots = list(range(len(self.numeric))) + [-1 - c for c in range(len(self.categorical))]
        self._slots = _read_only(np.asarray(slots, dtype=np.int64))
        self._binary = bool(validator.binary)

    def table(self, buf: bytes, starts: np.ndarray, ends: np.ndarray, sel: np.ndarray):
        """``(table, done)``: the Arrow table (``id``, ``ts``, ``features``, ``target``) of the lines
        ``sel[done]`` in order (``None`` when there are none), and which of ``sel`` it holds."""
        m = len(sel)
        arr = np.frombuffer(buf, dtype=np.uint8)
        done = np.empty(m, dtype=np.bool_)
        nums = np.empty((m, 2 + len(self.numeric)), dtype=np.float64)
        spans = np.empty((m, 2 + 2 * len(self.categorical)), dtype=np.int64)
        FEEDS.parse_events(arr, _read_only(starts), _read_only(ends), _read_only(sel), self._names,
                           self._offsets, self._slots, self._binary, done, nums, spans)
        if not done.any():
            return None, done
        if not done.all():
            nums, spans = nums[done], spans[done]
        pa = self._pa
        numbers = [_floats(pa, nums[:, k]) for k in range(nums.shape[1])]
        texts = [_strings(pa, arr, spans[:, 2 * k], spans[:, 2 * k + 1]) for k in range(spans.shape[1] // 2)]
        features = pa.StructArray.from_arrays(numbers[2:] + texts[1:], names=self.numeric + self.categorical)
        table = pa.Table.from_arrays([texts[0], numbers[0], features, numbers[1]], names=list(_TOP))
        return table, done


def _read_only(a: np.ndarray) -> np.ndarray:
    """A read-only contiguous view (the compiled functions are built for read-only inputs)."""
    view = np.ascontiguousarray(a).view()
    view.flags.writeable = False
    return view


def _floats(pa, x: np.ndarray):
    """A float64 Arrow array of ``x``, null where it is NaN (the parse's mark for missing)."""
    missing = np.isnan(x)
    return pa.array(x, mask=missing) if missing.any() else pa.array(x)


def _strings(pa, arr: np.ndarray, lo: np.ndarray, hi: np.ndarray):
    """An Arrow string array of the spans ``arr[lo:hi]``, null where ``lo`` is negative."""
    n = len(lo)
    lo = np.ascontiguousarray(lo)
    hi = np.ascontiguousarray(hi)
    valid = lo >= 0
    offsets = np.empty(n + 1, dtype=np.int32)
    data = np.empty(max(int(np.sum(hi[valid] - lo[valid])), 1), dtype=np.uint8)
    FEEDS.gather_spans(arr, _read_only(lo), _read_only(hi), offsets, data)
    nulls = n - int(np.count_nonzero(valid))
    bitmap = pa.py_buffer(np.packbits(valid, bitorder="little")) if nulls else None
    return pa.StringArray.from_buffers(n, pa.py_buffer(offsets), pa.py_buffer(data), bitmap, nulls)
