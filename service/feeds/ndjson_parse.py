"""The compiled parse of plain NDJSON event lines straight into columns (:mod:`service.feeds.ndjson_direct`).

One pass over the bytes finds the lines and reads each whose event has the common shape: an object with the
keys ``id``, ``ts``, ``features`` and ``target`` (any order, each at most once), ``features`` an
object of declared features (each at most once), strings without a backslash or a control byte,
numbers that convert exactly (below), ``null``, and ``true``/``false`` where noted. Any other line
is scanned and classed as :func:`service.feeds.ndjson_scan._scan_line` classes it, for the general
readers: this parse only takes lines whose values it reads exactly as orjson does, and never
rejects anything itself.

Numbers: the significand has at most 15 significant digits (so it is an exact integer in a double)
and the decimal exponent ``e`` is within ±22 (so ``10**|e|`` is exact too); the value is then one
IEEE multiplication or division of two exact doubles, which rounds correctly: the same double as
any correctly rounded parser such as orjson's (W. D. Clinger, "How to read floating point numbers
accurately", PLDI 1990, the fast path of section 6). Other numbers, and a negative zero (``-0`` is
the integer 0 for orjson, ``-0.0`` the float), are left for the general readers.

Kept in a module of its own, with the other byte scans, so that it is built ahead of time
(:mod:`service.kernels`) and called without importing numba, through ``service.kernels.FEEDS``.
"""

from __future__ import annotations

import numpy as np

from models.jit import numba

from service.feeds.ndjson_scan import _scan_line, _utf8_len
from service.feeds.scan_codes import PARSED as _PARSED

__all__ = ["gather_spans", "scan_parse"]

#: 10**k, exact as doubles for k <= 22.
_POW10 = np.array([10.0 ** k for k in range(23)], dtype=np.float64)
_MAX_SIG = 15  # significant digits of an exact significand
_MAX_INT_DIGITS = 18  # an integer categorical value of at most 18 digits is inside 64 bits

_NAN = np.nan
_NULL = np.array([110, 117, 108, 108], dtype=np.uint8)
_TRUE = np.array([116, 114, 117, 101], dtype=np.uint8)
_FALSE = np.array([102, 97, 108, 115, 101], dtype=np.uint8)


@numba.njit(cache=True, nogil=True, inline="always")
def _ws(buf, i, hi):
    """The first position from ``i`` that is not JSON whitespace (a line holds no newline)."""
    while i < hi and (buf[i] == 32 or buf[i] == 9 or buf[i] == 13):
        i += 1
    return i


@numba.njit(cache=True, nogil=True, inline="always")
def _string_end(buf, i, hi):
    """Position of the closing quote of the string whose opening quote is at ``i``; -1 when it holds a
    backslash, a control byte or invalid UTF-8, or is not closed."""
    i += 1
    while i < hi:
        c = buf[i]
        if c == 34:
            return i
        if c == 92 or c < 32:
            return -1
        if c >= 128:
            step = _utf8_len(buf, i, hi)
            if step == 0:
                return -1
            i += step
            continue
        i += 1
    return -1


@numba.njit(cache=True, nogil=True, inline="always")
def _literal(buf, i, hi, word):
    """Whether the bytes at ``i`` are ``word`` (``null``, ``true``, ``false``)."""
    m = word.shape[0]
    if i + m > hi:
        return False
    for k in range(m):
        if buf[i + k] != word[k]:
            return False
    return True


@numba.njit(cache=True, nogil=True, inline="always")
def _number(buf, i, hi, pow10):
    """``(value, end)`` of the JSON number at ``i``; ``end`` -1 when it is not one this parse converts
    exactly (see the module docstring)."""
    neg = False
    if i < hi and buf[i] == 45:
        neg = True
        i += 1
    if i >= hi:
        return 0.0, -1
    sig = 0
    digits = 0  # significant digits
    c = buf[i]
    if c == 48:
        i += 1
    elif 49 <= c <= 57:
        while i < hi and 48 <= buf[i] <= 57:
            sig = sig * 10 + (buf[i] - 48)
            digits += 1
            if digits > _MAX_SIG:
                return 0.0, -1
            i += 1
    else:
        return 0.0, -1
    frac = 0
    if i < hi and buf[i] == 46:
        i += 1
        lo = i
        while i < hi and 48 <= buf[i] <= 57:
            d = buf[i] - 48
            sig = sig * 10 + d
            if sig > 0:
                digits += 1
                if digits > _MAX_SIG:
                    return 0.0, -1
            frac += 1
            i += 1
        if i == lo:
            return 0.0, -1
    exp = 0
    if i < hi and (buf[i] == 101 or buf[i] == 69):
        i += 1
        eneg = False
        if i < hi and (buf[i] == 43 or buf[i] == 45):
            eneg = buf[i] == 45
            i += 1
        lo = i
        while i < hi and 48 <= buf[i] <= 57:
            exp = exp * 10 + (buf[i] - 48)
            if exp > 1000:
                return 0.0, -1
            i += 1
        if i == lo:
            return 0.0, -1
        if eneg:
            exp = -exp
    e10 = exp - frac
    if sig == 0:
        if neg:  # -0 is the integer 0 for orjson, -0.0 the float: left to the general readers
            return 0.0, -1
        x = 0.0
    elif 0 <= e10 <= 22:
        x = float(sig) * pow10[e10]
    elif -22 <= e10 < 0:
        x = float(sig) / pow10[-e10]
    else:
        return 0.0, -1
    return (-x if neg else x), i


@numba.njit(cache=True, nogil=True, inline="always")
def _integer_end(buf, i, hi):
    """End of a JSON integer at ``i`` whose text is its canonical text (no ``-0``, at most 18 digits,
    not followed by a fraction or exponent); -1 otherwise."""
    lo = i
    if i < hi and buf[i] == 45:
        i += 1
    if i >= hi or not 49 <= buf[i] <= 57:
        if i < hi and buf[i] == 48 and i == lo:  # a plain 0
            i += 1
            if i < hi and (buf[i] == 46 or buf[i] == 101 or buf[i] == 69 or 48 <= buf[i] <= 57):
                return -1
            return i
        return -1
    start = i
    while i < hi and 48 <= buf[i] <= 57:
        i += 1
    if i - start > _MAX_INT_DIGITS:
        return -1
    if i < hi and (buf[i] == 46 or buf[i] == 101 or buf[i] == 69):
        return -1
    return i


@numba.njit(cache=True, nogil=True, inline="always")
def _key_index(buf, lo, hi, names, offsets):
    """Index of the name ``buf[lo:hi]`` in the concatenated ``names``; -1 when it is none of them."""
    m = hi - lo
    for j in range(offsets.shape[0] - 1):
        a = offsets[j]
        if offsets[j + 1] - a != m:
            continue
        same = True
        for k in range(m):
            if buf[lo + k] != names[a + k]:
                same = False
                break
        if same:
            return j
    return -1


@numba.njit(cache=True, nogil=True, inline="always")
def _parse_line(buf, i, hi, j, names, offsets, slots, bool_target, nums, spans, seen):
    """Parse the event at ``i`` into row ``j`` of ``nums`` and ``spans``; the position after it and
    the whitespace that follows, or -1 when it is not a line this parse takes. Stops at a newline."""
    null = _NULL
    true = _TRUE
    false = _FALSE
    pow10 = _POW10
    for k in range(nums.shape[1]):
        nums[j, k] = _NAN
    for k in range(spans.shape[1]):
        spans[j, k] = -1
    for k in range(seen.shape[0]):
        seen[k] = False
    i = _ws(buf, i, hi)
    if i >= hi or buf[i] != 123:
        return -1
    i = _ws(buf, i + 1, hi)
    depth = 1  # 1 in the event object, 2 in its features
    fresh = True  # just inside an object: a closing brace may come instead of a key
    while True:
        if not (fresh and i < hi and buf[i] == 125):
            # a key, a colon and its value
            if i >= hi or buf[i] != 34:
                break
            end = _string_end(buf, i, hi)
            if end < 0:
                break
            key = _key_index(buf, i + 1, end, names, offsets)
            if key < 0 or seen[key] or (depth == 1) != (key < 4):
                break
            seen[key] = True
            i = _ws(buf, end + 1, hi)
            if i >= hi or buf[i] != 58:
                break
            i = _ws(buf, i + 1, hi)
            if i >= hi:
                break
            c = buf[i]
            if key == 2:  # features: an object
                if c != 123:
                    break
                depth = 2
                fresh = True
                i = _ws(buf, i + 1, hi)
                continue
            if c == 110:
                if not _literal(buf, i, hi, null):
                    break
                i += 4
            elif key == 0:  # id: a string
                if c != 34:
                    break
                end = _string_end(buf, i, hi)
                if end < 0:
                    break
                spans[j, 0] = i + 1
                spans[j, 1] = end
                i = end + 1
            elif key == 1 or key == 3 or slots[key - 4] >= 0:  # ts, target, a numeric feature
                col = 0 if key == 1 else (1 if key == 3 else 2 + slots[key - 4])
                if key == 3 and bool_target and (c == 116 or c == 102):
                    if _literal(buf, i, hi, true):
                        nums[j, col] = 1.0
                        i += 4
                    elif _literal(buf, i, hi, false):
                        nums[j, col] = 0.0
                        i += 5
                    else:
                        break
                else:
                    x, end = _number(buf, i, hi, pow10)
                    if end < 0:
                        break
                    nums[j, col] = x
                    i = end
            else:  # a categorical feature: a string, an integer or a boolean, kept as its text
                col = 2 + 2 * (-1 - slots[key - 4])
                if c == 34:
                    end = _string_end(buf, i, hi)
                    if end < 0:
                        break
                    spans[j, col] = i + 1
                    spans[j, col + 1] = end
                    i = end + 1
                elif c == 116 and _literal(buf, i, hi, true):
                    spans[j, col] = i
                    spans[j, col + 1] = i + 4
                    i += 4
                elif c == 102 and _literal(buf, i, hi, false):
                    spans[j, col] = i
                    spans[j, col + 1] = i + 5
                    i += 5
                else:
                    end = _integer_end(buf, i, hi)
                    if end < 0:
                        break
                    spans[j, col] = i
                    spans[j, col + 1] = end
                    i = end
        # after a value (or at the brace of an empty object): a comma, or closing braces
        fresh = False
        more = False
        while True:
            i = _ws(buf, i, hi)
            if i >= hi:
                break
            if buf[i] == 44:
                i = _ws(buf, i + 1, hi)
                more = True
                break
            if buf[i] != 125:
                break
            depth -= 1
            i += 1
            if depth == 0:
                return _ws(buf, i, hi) if seen[2] else -1
        if not more:
            return -1
    return -1


@numba.njit(cache=True, nogil=True)
def scan_parse(buf, max_line, names, offsets, slots, bool_target, starts, ends, flags, escaped, nums, spans):
    """Start, end (without the newline), class and whether it holds a backslash, for every line of
    ``buf``; each line is first tried by this parse.

    A line the parse takes (whole, up to its newline, at most ``max_line`` bytes) gets class 3 and its
    values in its row of ``nums`` and ``spans``; any other line is classed by
    :func:`service.feeds.ndjson_scan._scan_line` (blank, plain, for the validator). ``names``,
    ``offsets`` and ``slots`` say which keys the parse knows and where their values go: first ``id``, ``ts``, ``features``, ``target``, then the declared features;
    ``slots[k]`` of feature ``k`` (key ``4 + k``) is ``>= 0`` for numeric column ``2 + slots[k]`` of
    ``nums`` (``ts`` and ``target`` are its columns 0 and 1) and ``< 0`` for categorical
    ``c = -1 - slots[k]``, whose span is ``spans[:, 2 + 2c : 4 + 2c]`` (the id's ``spans[:, 0:2]``).
    A missing or null number is NaN, a missing or null string the span ``(-1, -1)``; the span of an
    integer or boolean categorical value is its literal, which is its text. ``bool_target``:
    ``true``/``false`` targets read as 1.0/0.0 (a binary task). Returns the number of lines.
    """
    n = buf.shape[0]
    seen = np.zeros(offsets.shape[0] - 1, dtype=np.bool_)
    k = 0
    i = 0
    while i < n:
        end = _parse_line(buf, i, n, k, names, offsets, slots, bool_target, nums, spans, seen)
        if end >= 0 and (end == n or buf[end] == 10) and end - i <= max_line:
            flag = _PARSED
            backslash = False
        else:
            end, flag, backslash = _scan_line(buf, i, n, max_line)
        starts[k] = i
        ends[k] = end
        flags[k] = flag
        escaped[k] = backslash
        k += 1
        i = end + 1
    return k


@numba.njit(cache=True, nogil=True)
def gather_spans(buf, lo, hi, offsets, out):
    """Copy the spans ``buf[lo[j]:hi[j]]`` (none where ``lo[j] < 0``) one after the other into ``out``;
    ``offsets`` (``len(lo) + 1``, int32) receives where each begins. Returns the bytes copied."""
    pos = 0
    for j in range(lo.shape[0]):
        offsets[j] = pos
        a = lo[j]
        if a >= 0:
            for i in range(a, hi[j]):
                out[pos] = buf[i]
                pos += 1
    offsets[lo.shape[0]] = pos
    return pos
