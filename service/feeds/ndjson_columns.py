"""NDJSON chunks parsed into columns (compiled, or by Arrow's JSON reader), with the validator as the fallback.

Parsing each line with orjson and validating its dict costs several microseconds of Python per
event, more than the learning itself. A compiled pass (:mod:`service.feeds.ndjson_direct`) finds
the lines and parses those of the common shape straight into columns; Arrow's JSON reader parses
the other plain lines in C++ into typed columns; :mod:`service.feeds.columns` then maps both
without per-event Python. Only lines that are certainly equivalent take those paths; anything
else goes, line by line, through :meth:`EventValidator.parse_line`, so every rejection has the
validator's exact ``where`` and reason and every accepted value is what orjson would give:

* the compiled parse takes only lines whose values it reads exactly as orjson does (see
  :mod:`service.feeds.ndjson_parse`); its columns pass the same checks as those of Arrow's;
* of the other lines, the same pass (the line scan) sends to the validator every line that is over
  ``service.max_line_bytes``, does not start with ``{`` and end with ``}``, contains ``NaN`` or
  ``Infinity`` (Arrow accepts those literals, JSON does not), more than 64 ``{``/``[`` (orjson
  limits nesting) or a run of more than 15 digits (an integer past 2**53 that Arrow would read as a
  double, where orjson keeps it exact); blank lines are skipped as :func:`service.events.parse_ndjson` skips them;
* Arrow must give exactly one row per line, with only the known top-level keys and declared
  features; otherwise the chunk is bisected down to small pieces that go to the validator;
* a categorical column whose values mix JSON types (strings and numbers, say: Arrow's reader
  refuses a column that changes type) is split by the type of that value in each line, found by
  a compiled scan for the key, and each part is parsed on its own; the parts are merged back in
  line order. The scan only groups lines: a line it misreads fails its part's parse and is
  handled as above;
* :func:`service.feeds.columns.from_arrow` flags the rows whose values it cannot vouch for.

A feed where most lines need the validator (say, string timestamps) switches to the validator for
a while instead of bisecting every chunk.
"""

from __future__ import annotations

import re

import numpy as np

from models import InvalidInput
from models.features import categorical_text

from service.feeds.columns import Prepared, from_arrow, holdout_share, take_prepared, to_prepared
from service.feeds.ndjson_direct import DirectParse
from service.events import Rejection
from service.feeds.scan_codes import BOOLEAN, CHECK, NONE, NUMBER, PARSED, PLAIN, STRING
from service.idhash import hash_strings
from service.kernels import FEEDS

__all__ = ["ArrowNdjson", "available", "prepare_events"]

_LEAF = 16  # lines below which a failing piece goes to the validator line by line
_ROW = re.compile(r"in row (\d+)")
_CHANGED = re.compile(r"Column\(/features/([^)]*)\) changed from")


def available() -> bool:
    """Whether pyarrow (the optional ``parquet`` extra) is installed."""
    try:
        import pyarrow.json  # noqa: F401
    except ImportError:
        return False
    return True


def _lines_bytes(buf: bytes, starts, ends, sel) -> bytes:
    """The lines ``sel`` of ``buf``, each followed by a newline."""
    out = np.empty(int(np.sum(ends[sel] - starts[sel])) + len(sel), dtype=np.uint8)
    FEEDS.gather_lines(np.frombuffer(buf, dtype=np.uint8), starts, ends, sel, out)
    return out.tobytes()


def _split_by_kind(buf: bytes, starts, ends, sel: np.ndarray, name: str) -> list[np.ndarray]:
    """``sel`` split by the JSON type of feature ``name`` in each line (lines without a value join
    the first part); a single part when the scan finds fewer than two types."""
    kinds = np.empty(len(sel), np.int8)
    FEEDS.value_kinds(np.frombuffer(buf, dtype=np.uint8), starts, ends, sel,
                 np.frombuffer(b'"' + name.encode() + b'"', dtype=np.uint8), kinds)
    parts = [sel[kinds == kind] for kind in (STRING, NUMBER, BOOLEAN) if np.any(kinds == kind)]
    if len(parts) < 2:
        return [sel]
    parts[0] = np.sort(np.concatenate([parts[0], sel[kinds == NONE]]))
    return parts


def _lines_with(buf: bytes, needle: bytes, ends: np.ndarray) -> np.ndarray:
    """Indices of the lines (given by their ends) that contain ``needle``."""
    hits = []
    at = buf.find(needle)
    while at >= 0:
        hits.append(at)
        at = buf.find(needle, at + 1)
    return np.searchsorted(ends, np.asarray(hits, dtype=np.int64))


class ArrowNdjson:
    """Turns NDJSON chunks into prepared batches for one engine (config).

    Parameters
    ----------
    engine
        An :class:`~service.engine.Engine` of the run's config used only to prepare, never to
        learn: its validator, its feature mapper and its ``prepare`` for the events the validator
        handled. One per thread (the mapper's cache is not shared).
    """

    def __init__(self, engine) -> None:
        import pyarrow as pa
        import pyarrow.json as pj

        self._pa, self._pj = pa, pj
        self.engine = engine
        self.validator = v = engine.validator
        fields = [pa.field(name, pa.float64()) for name in sorted(v.numeric)]
        top = [pa.field("id", pa.string()), pa.field("ts", pa.float64()),
               pa.field("features", pa.struct(fields))]
        if not v.binary:
            top.append(pa.field("target", pa.float64()))
        # categorical values and binary targets keep their JSON type (string, integer, boolean)
        self._parse = pj.ParseOptions(explicit_schema=pa.schema(top), unexpected_field_behavior="infer")
        self._direct = DirectParse(v)
        self._share = holdout_share(engine.config)
        self._cool = 0
        self.fallback_lines = 0

    def chunk(self, buf: bytes, first_line: int) -> tuple[Prepared | None, list]:
        """Prepared events of ``buf`` (whole lines) in line order, and ``[(line, Rejection)]`` in line order."""
        return self.chunk_lines(buf, first_line, self.scan(buf))

    def scan(self, buf: bytes):
        """The lines of ``buf``, those of the common shape already parsed (:meth:`DirectParse.scan`)."""
        return self._direct.scan(buf, self.validator.max_line)

    def chunk_lines(self, buf: bytes, first_line: int, scanned) -> tuple[Prepared | None, list]:
        """:meth:`chunk` of ``buf`` with its lines already found (``scanned``: :meth:`scan`)."""
        starts, ends, flags, escaped, parsed = scanned
        lines = first_line + np.arange(len(starts), dtype=np.int64)
        parts: list[Prepared] = []
        slow: list[int] = list(np.flatnonzero(flags == CHECK))
        if parsed is not None:
            self._keep(*parsed, np.flatnonzero(flags == PARSED), lines, parts, slow)
        plain = np.flatnonzero(flags == PLAIN)
        if self._cool > 0:
            self._cool -= 1
            slow += list(plain)
        elif len(plain):
            whole = len(plain) == len(starts)
            before = len(slow)
            self._fast(buf, plain, (starts, ends, escaped), lines, whole, parts, slow)
            if len(slow) - before > len(plain) // 4:
                self._cool = 16  # most lines need the validator: stop bisecting for a while
        self.fallback_lines += len(slow)
        rejected = self._validate(buf, sorted(slow), starts, ends, lines, parts)
        if not parts:
            return None, rejected
        if len(parts) > 1:
            where = np.concatenate([p.where for p in parts])
            return take_prepared(parts, np.argsort(where, kind="stable")), rejected
        return parts[0], rejected

    def _table(self, data: bytes, expect: int):
        """The Arrow table of ``data`` (``expect`` lines), or ``None``, the failing row if known and
        the declared categorical feature whose values changed type, if that was the failure."""
        pj = self._pj
        try:
            table = pj.read_json(self._pa.BufferReader(data), parse_options=self._parse,
                                 read_options=pj.ReadOptions(use_threads=False, block_size=max(len(data) + 1, 1 << 16)))
        except (self._pa.ArrowException, UnicodeDecodeError) as exc:
            hit, mixed = _ROW.search(str(exc)), _CHANGED.search(str(exc))
            name = mixed.group(1) if mixed and mixed.group(1) in self.validator.categorical else None
            return None, int(hit.group(1)) if hit else None, name
        return (table, None, None) if table.num_rows == expect else (None, None, None)

    def _fast(self, buf, sel, spans, lines, whole, parts, slow) -> None:
        """Columnar parse of the lines ``sel``; lines it cannot vouch for are appended to ``slow``.

        A parse error that names its row splits the lines around it (that line goes to the
        validator); one that does not is bisected. Either way every line ends up in a table whose
        row count matched or with the validator.
        """
        starts, ends, escaped = spans
        todo = [(sel, whole)]
        while todo:
            sel, whole = todo.pop()
            data = buf if whole else _lines_bytes(buf, starts, ends, sel)
            table, row, mixed = self._table(data, len(sel))
            if table is None:
                split = _split_by_kind(buf, starts, ends, sel, mixed) if mixed is not None else [sel]
                if len(split) > 1:
                    todo += [(part, False) for part in split]
                elif row is not None and 0 <= row < len(sel):
                    slow.append(int(sel[row]))
                    todo += [(part, False) for part in (sel[row + 1:], sel[:row]) if len(part)]
                elif len(sel) <= _LEAF:
                    slow.extend(sel.tolist())
                else:
                    half = len(sel) // 2
                    todo += [(sel[half:], False), (sel[:half], False)]
                continue
            self._columns(table, buf, sel, (ends, escaped), lines, parts, slow)

    def _columns(self, table, buf, sel, spans, lines, parts, slow) -> None:
        """The prepared events of ``table`` (the lines ``sel``); the rows it cannot vouch for are
        appended to ``slow``."""
        ends, escaped = spans
        cols, flagged, ambiguous = from_arrow(table, self.validator, nested=True)
        if ambiguous:
            # without a backslash a key's bytes are its UTF-8 text, so its absence is certain
            maybe = escaped.copy()
            for name in ambiguous:
                maybe[_lines_with(buf, b'"' + name.rsplit(".", 1)[-1].encode() + b'"', ends)] = True
            flagged |= maybe[sel]
        self._keep(cols, flagged, sel, lines, parts, slow)

    def _keep(self, cols, flagged, sel, lines, parts, slow) -> None:
        """The prepared events of the rows of ``cols`` (the lines ``sel``) not ``flagged``; the
        flagged lines are appended to ``slow``."""
        keep = np.flatnonzero(~flagged)
        slow.extend(sel[flagged].tolist())
        if len(keep):
            parts.append(to_prepared(cols, keep, lines[sel[keep]], self.engine.model.mapper, self._share))

    def _validate(self, buf, sel, starts, ends, lines, parts) -> list:
        events, where, rejected = [], [], []
        v = self.validator
        for k in sel:
            n = int(lines[k])
            try:
                events.append(v.parse_line(buf[starts[k]:ends[k]], f"line {n}"))
                where.append(n)
            except InvalidInput as exc:
                rejected.append((n, Rejection(exc.where, exc.message)))
        if events:
            parts.append(prepare_events(self.engine, events, where))
        return rejected


def prepare_events(engine, events: list, where) -> Prepared:
    """:class:`Prepared` of validated events through ``Engine.prepare`` itself."""
    batch = engine.prepare(events)
    ids = [e.id for e in events]
    names = engine.model.mapper.categorical
    cats = dict.fromkeys((name, text) for e in events for name in names
                         if (text := categorical_text(e.features.get(name))) is not None)
    return Prepared(batch, hash_strings(ids), np.array([i is not None for i in ids], dtype=np.bool_),
                    np.asarray(where, dtype=np.int64), list(cats))
