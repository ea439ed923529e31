"""Plain NDJSON event lines parsed by a compiled pass straight into columns.

Arrow's JSON reader costs about 1.3 us per event of the demo feed (a general parser building
general columns), and the line scan before it another 0.4; most lines of a feed have one simple
shape, which the compiled parse of :mod:`service.feeds.ndjson_parse` reads while it finds the lines,
in one pass over the bytes, into the columns the reader would give them (strings as UTF-8 spans,
numbers as doubles, ``null`` as missing). It takes only lines it reads exactly as orjson does and
classes the others as the line scan does, for the general readers of
:mod:`service.feeds.ndjson_columns`; so it changes no result, only the cost: its columns go through
the rules of :func:`service.feeds.columns.from_arrow` (:func:`~service.feeds.columns.from_parsed`,
the same functions without an Arrow table in between).
"""

from __future__ import annotations

import numpy as np

from service.feeds.columns import from_parsed
from service.feeds.scan_codes import PARSED
from service.kernels import FEEDS

__all__ = ["DirectParse"]

_TOP = ("id", "ts", "features", "target")  # the top-level keys, in the order the parse numbers them


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
        self._validator = validator
        self._binary = bool(validator.binary)
        self._max_line = validator.max_line

    def scan(self, buf: bytes, max_line: int | None = None):
        """``(starts, ends, flags, escaped, parsed)``: where each line of ``buf`` starts and ends
        (without its newline), its class (:mod:`service.feeds.scan_codes`: blank, plain, for the
        validator, or parsed), whether it holds a backslash, and ``(columns, flagged)`` of the parsed
        lines in order (:func:`service.feeds.columns.from_parsed`; ``None`` without any)."""
        arr = np.frombuffer(buf, dtype=np.uint8)
        cap = int(np.count_nonzero(arr == 10)) + 1
        starts = np.empty(cap, np.int64)
        ends = np.empty(cap, np.int64)
        flags = np.empty(cap, np.int8)
        escaped = np.empty(cap, np.bool_)
        nums = np.empty((cap, 2 + len(self.numeric)), dtype=np.float64)
        spans = np.empty((cap, 2 + 2 * len(self.categorical)), dtype=np.int64)
        k = FEEDS.scan_parse(arr, self._max_line if max_line is None else max_line, self._names, self._offsets,
                             self._slots, self._binary, starts, ends, flags, escaped, nums, spans)
        starts, ends, flags, escaped = starts[:k], ends[:k], flags[:k], escaped[:k]
        done = flags == PARSED
        if not done.any():
            return starts, ends, flags, escaped, None
        nums, spans = nums[:k][done], spans[:k][done]
        pa = self._pa
        numbers = dict(zip(["ts", "target"] + self.numeric, nums.T.copy()))  # one contiguous copy, rows per name
        texts = [_strings(pa, arr, spans[:, 2 * c], spans[:, 2 * c + 1]) for c in range(spans.shape[1] // 2)]
        return starts, ends, flags, escaped, from_parsed(texts[0], numbers, dict(zip(self.categorical, texts[1:])),
                                                         self._validator)


def _read_only(a: np.ndarray) -> np.ndarray:
    """A read-only contiguous view (the compiled functions are built for read-only inputs)."""
    view = np.ascontiguousarray(a).view()
    view.flags.writeable = False
    return view


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
