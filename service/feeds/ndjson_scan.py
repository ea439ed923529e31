"""The compiled byte scans of the columnar NDJSON reader (:mod:`service.feeds.ndjson_columns`).

Kept in a module of their own so that they can be built ahead of time (:mod:`service.kernels`) and
called without importing numba; they are reached through ``service.kernels.FEEDS``.
"""

from __future__ import annotations

from models.jit import numba

__all__ = ["gather_lines", "value_kinds"]

from service.feeds.scan_codes import BOOLEAN as _BOOLEAN, MAX_DIGITS as _MAX_DIGITS, MAX_OPEN as _MAX_OPEN
from service.feeds.scan_codes import NONE as _NONE, NUMBER as _NUMBER, STRING as _STRING


# inlined where it is called: as a compiled function of its own, numba compiled it twice (once for
# the constant 0 that ``i`` starts from, once for an int64)
@numba.njit(cache=True, nogil=True, inline="always")
def _utf8_len(buf, i, n):
    """Length of the strict UTF-8 sequence at ``buf[i]`` (a byte >= 0x80), 0 if it is invalid."""
    c = buf[i]
    if 0xC2 <= c <= 0xDF:
        need, lo, hi = 1, 0x80, 0xBF
    elif c == 0xE0:
        need, lo, hi = 2, 0xA0, 0xBF
    elif 0xE1 <= c <= 0xEC or 0xEE <= c <= 0xEF:
        need, lo, hi = 2, 0x80, 0xBF
    elif c == 0xED:  # no UTF-16 surrogates
        need, lo, hi = 2, 0x80, 0x9F
    elif c == 0xF0:
        need, lo, hi = 3, 0x90, 0xBF
    elif 0xF1 <= c <= 0xF3:
        need, lo, hi = 3, 0x80, 0xBF
    elif c == 0xF4:
        need, lo, hi = 3, 0x80, 0x8F
    else:
        return 0
    if i + need > n - 1:
        return 0
    if not lo <= buf[i + 1] <= hi:
        return 0
    for k in range(2, need + 1):
        if not 0x80 <= buf[i + k] <= 0xBF:
            return 0
    return need + 1


@numba.njit(cache=True, nogil=True, inline="always")
def _scan_line(buf, lo, n, max_line):
    """``(end, class, backslash)`` of the line that starts at ``lo``: ``end`` is its newline (or
    ``n``), the class 0 blank, 1 plain, 2 for the validator (:mod:`service.feeds.scan_codes`), and
    whether it holds a backslash. Blank means only spaces, tabs, CR, VT or FF, the bytes
    :meth:`bytes.strip` removes. Inlined in the compiled parse (:mod:`service.feeds.ndjson_parse`)."""
    i = lo
    first = -1
    last = -1
    opens = 0
    odd = False
    blank = True
    backslash = False
    digits = 0
    while i < n and buf[i] != 10:
        c = buf[i]
        # a run of over 15 digits may be an integer Arrow reads as a double (orjson keeps it
        # exact): the validator decides such lines
        if 48 <= c <= 57:
            digits += 1
            if digits > _MAX_DIGITS:
                odd = True
        else:
            digits = 0
        if not (c == 32 or c == 9 or c == 13):
            if first < 0:
                first = c
            last = c
            if c != 11 and c != 12:
                blank = False
        if c == 123 or c == 91:
            opens += 1
        elif c == 92:
            backslash = True
        elif c == 78 and i + 2 < n and buf[i + 1] == 97 and buf[i + 2] == 78:  # NaN
            odd = True
        elif c == 73 and i + 7 < n and buf[i + 1] == 110 and buf[i + 2] == 102:  # Infinity
            odd = True
        elif c >= 128:
            step = _utf8_len(buf, i, n)
            if step == 0:
                odd = True
                step = 1
            i += step
            continue
        i += 1
    if blank and (first < 0 or first == 11 or first == 12):
        flag = 0
    elif odd or first != 123 or last != 125 or opens > _MAX_OPEN or i - lo > max_line:
        flag = 2
    else:
        flag = 1
    return i, flag, backslash


@numba.njit(cache=True, nogil=True)
def gather_lines(buf, starts, ends, sel, out):
    pos = 0
    for k in sel:
        for i in range(starts[k], ends[k]):
            out[pos] = buf[i]
            pos += 1
        out[pos] = 10
        pos += 1
    return pos


@numba.njit(cache=True, nogil=True)
def value_kinds(buf, starts, ends, sel, key, out):
    """For each line ``sel[j]``: the JSON type of the value after the first ``key`` followed by ``:``."""
    m = key.shape[0]
    for j in range(sel.shape[0]):
        hi = ends[sel[j]]
        i = starts[sel[j]]
        kind = _NONE
        while i + m <= hi:
            if buf[i] == key[0]:
                t = 1
                while t < m and buf[i + t] == key[t]:
                    t += 1
                if t == m:
                    at = i + m
                    while at < hi and (buf[at] == 32 or buf[at] == 9 or buf[at] == 13):
                        at += 1
                    if at < hi and buf[at] == 58:  # a key, not a string value
                        at += 1
                        while at < hi and (buf[at] == 32 or buf[at] == 9 or buf[at] == 13):
                            at += 1
                        if at < hi:
                            c = buf[at]
                            if c == 34:  # '"'
                                kind = _STRING
                            elif c == 45 or 48 <= c <= 57:  # '-' or a digit
                                kind = _NUMBER
                            elif c == 116 or c == 102:  # 't' or 'f'
                                kind = _BOOLEAN
                        break
            i += 1
        out[j] = kind
