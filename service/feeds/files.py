"""Recorded feeds read in bounded chunks: NDJSON and CSV (plain or gzip) and Parquet.

:func:`read_feed` yields :class:`Chunk` objects in feed order, each holding the prepared events of
about a megabyte of input (or 65,536 Parquet rows) and the rejected lines, so memory stays bounded
whatever the file size. Every event passes the boundary rules of
:class:`~service.events.EventValidator`:

* NDJSON goes through Arrow's JSON reader and the vectorized mapping when pyarrow is installed
  (:mod:`service.feeds.ndjson_columns`), else line by line through :func:`service.events.parse_ndjson`;
  both give the same events and the same rejections. A line longer than twice
  ``service.max_line_bytes`` is skipped without being held in memory (and rejected as oversize).
* CSV goes through :func:`service.events.parse_csv_lines` in chunks cut at record boundaries.
* Parquet (pyarrow, the optional ``parquet`` extra) has the CSV layout, one column per feature
  plus ``id``, ``ts`` and ``target``; rows the columns cannot vouch for go through
  :meth:`EventValidator.validate` as ``row N`` (1-based).

The format comes from the suffix (``.ndjson``, ``.jsonl``, ``.json``, ``.csv``, ``.parquet``,
``.pq``, each optionally ``.gz``), else from the first bytes.
"""

from __future__ import annotations

import io
import os
import re
import threading
from collections import deque
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from models import InvalidInput, InvalidSettings, TrimtabError

from service.feeds.columns import Prepared, from_arrow, holdout_share, take_prepared, to_prepared
from service.events import Rejection, parse_csv_lines, parse_ndjson
from service.feeds.ndjson_columns import ArrowNdjson, available, prepare_events

__all__ = ["FORMATS", "Chunk", "detect_format", "read_feed"]

FORMATS = ("ndjson", "csv", "parquet")
_SUFFIX = {".ndjson": "ndjson", ".jsonl": "ndjson", ".json": "ndjson", ".csv": "csv", ".parquet": "parquet",
           ".pq": "parquet"}
#: NDJSON blocks grow from :data:`_FIRST_BLOCK` to this size (1 MiB, then 2 MiB): each block costs the
#: parse and the engine some fixed Python work, so 2 MiB blocks replay a large feed about 9% faster than
#: 1 MiB ones, while the small first block keeps the first events early. 4 MiB was no faster and took
#: 40 MB more at its peak (a 1,000,000-event replay: 239, 263 and 304 MB; benchmarks/README.md)
_BLOCK = 1 << 21
#: The second NDJSON block; later ones double up to the ``block`` size.
_RAMP_BLOCK = 1 << 20
#: NDJSON blocks below this are parsed line by line (orjson and the validator, the same results):
#: importing Arrow (about 0.1 s) costs more than it saves on a few hundred lines (a small feed, a feed's last block).
_SMALL_BLOCK = 1 << 16
#: The first NDJSON block of a feed: small enough to go line by line (a few milliseconds), so that the
#: engine learns the first events while the next blocks are read and Arrow is loaded.
_FIRST_BLOCK = 1 << 15
_PARQUET_ROWS = 32_768
_LINE = re.compile(r"^line (\d+)")


@dataclass
class Chunk:
    """Prepared events and rejections of one piece of a feed.

    ``rejected`` holds ``(line, Rejection)`` pairs in line order; ``lines`` counts the non-blank
    lines (or rows) read, valid or not; ``progress`` is the share of the feed read so far.
    """

    prepared: Prepared | None
    rejected: list
    lines: int
    progress: float


def detect_format(path: str | Path) -> str:
    """``"ndjson"``, ``"csv"`` or ``"parquet"``; raises :class:`InvalidSettings` naming the feed."""
    p = Path(path)
    if not p.is_file():
        raise InvalidSettings("no such feed file", where=str(p))
    suffixes = [s.lower() for s in p.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        suffixes = suffixes[:-1]
    if suffixes and suffixes[-1] in _SUFFIX:
        return _SUFFIX[suffixes[-1]]
    with _open(p) as f:
        head = f.read(4096)
    if head.startswith(b"PAR1"):
        return "parquet"
    if head.lstrip()[:1] == b"{":
        return "ndjson"
    if b"," in head.split(b"\n", 1)[0]:
        return "csv"
    raise InvalidSettings("cannot tell the feed's format; name it .ndjson, .csv or .parquet (optionally .gz)",
                          where=str(p))


class _Source:
    """A file, decompressed if it is gzip, that knows how far through the compressed bytes it is."""

    def __init__(self, path: Path) -> None:
        self.raw = open(path, "rb")
        self.size = max(os.fstat(self.raw.fileno()).st_size, 1)
        gz = self.raw.read(2) == b"\x1f\x8b"
        self.raw.seek(0)
        if gz:
            import gzip  # here: most feeds are not compressed

            self.stream = gzip.GzipFile(fileobj=self.raw, mode="rb")
        else:
            self.stream = self.raw

    def read(self, n: int) -> bytes:
        return self.stream.read(n)

    @property
    def progress(self) -> float:
        return min(self.raw.tell() / self.size, 1.0)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.stream.close()
        self.raw.close()


def _open(path: Path) -> _Source:
    return _Source(path)


class _Oversize:
    """Stands in for a line too long to hold: :meth:`EventValidator.parse_line` only needs its length."""

    def __init__(self, n: int) -> None:
        self.n = n

    def __len__(self) -> int:
        return self.n


def _ndjson_blocks(src: _Source, max_line: int, block: int):
    """Whole-line blocks ``(bytes, first_line, skipped)``; ``skipped`` lists ``(line, length)`` of
    lines too long to keep, which are dropped from the block (their line numbers still count)."""
    carry = b""
    line = 1
    skipping = None  # (line number, bytes so far) of an oversize line being skipped
    limit = 2 * max_line + block
    size = min(block, _FIRST_BLOCK)  # a small first block: the first events are learned at once
    while True:
        data = src.read(size)
        size = min(block, max(2 * size, _RAMP_BLOCK))
        if not data:
            break
        if skipping is not None:
            cut = data.find(b"\n")
            if cut < 0:
                skipping = (skipping[0], skipping[1] + len(data))
                continue
            yield b"", line, [(skipping[0], skipping[1] + cut)]
            line += 1
            skipping = None
            data = data[cut + 1:]
        buf = carry + data
        cut = buf.rfind(b"\n")
        if cut < 0:
            if len(buf) > limit:
                skipping, carry = (line, len(buf)), b""
            else:
                carry = buf
            continue
        whole, carry = buf[:cut + 1], buf[cut + 1:]
        yield whole, line, []
        line += whole.count(b"\n")
        if len(carry) > limit:
            skipping, carry = (line, len(carry)), b""
    if skipping is not None:
        yield b"", line, [(skipping[0], skipping[1])]
    elif carry:
        yield carry, line, []


def _ndjson_chunk(prep, fast, data: bytes, first: int, skipped: list, progress: float) -> Chunk:
    v = prep.validator
    rejected = []
    for n, length in skipped:
        try:
            v.parse_line(_Oversize(length), f"line {n}")
        except InvalidInput as exc:
            rejected.append((n, Rejection(exc.where, exc.message)))
    if fast is not None:
        prepared, rej = fast.chunk(data, first)
    else:
        events, rej_list, lines = parse_ndjson(data, v, first_line=first)
        prepared = prepare_events(prep, events, lines) if events else None
        rej = [(_line_of(r.where), r) for r in rej_list]
    rejected += rej
    count = len(rejected) + (len(prepared.batch) if prepared is not None else 0)
    return Chunk(prepared, rejected, count, progress)


def _read_ndjson(path: Path, config, columnar: bool, workers: int, block: int) -> Iterator[Chunk]:
    """Blocks are read here in order and parsed by ``workers`` threads (Arrow and the compiled
    kernels release the GIL); results come back in order."""
    local = threading.local()
    arrow = [columnar]  # Arrow's reader for large blocks, while it is installed
    small = min(_SMALL_BLOCK, block // 4)

    def work(data, first, skipped, progress):
        if not hasattr(local, "prep"):
            local.prep, local.fast = _preparer(config), None
        if not arrow[0] or len(data) < small:
            return _ndjson_chunk(local.prep, None, data, first, skipped, progress)
        if local.fast is None:
            arrow[0] = available()
            if not arrow[0]:
                return _ndjson_chunk(local.prep, None, data, first, skipped, progress)
            _lean_arrow()
            local.fast = ArrowNdjson(local.prep)
        return _ndjson_chunk(local.prep, local.fast, data, first, skipped, progress)

    max_line = config.service.max_line_bytes
    with _open(path) as src, ThreadPoolExecutor(max_workers=max(1, workers),
                                                thread_name_prefix="trimtab-parse") as pool:
        pending: deque = deque()
        for data, first, skipped in _ndjson_blocks(src, max_line, block):
            pending.append(pool.submit(work, data, first, skipped, src.progress))
            # at most 2 * workers blocks ahead, and a parsed block goes on at once (the first events early)
            while pending and (len(pending) > 2 * workers or pending[0].done()):
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _lean_arrow() -> None:
    """Give Arrow the system allocator in a process that reads feeds with it: its default pool keeps
    ~40 MB of freed chunk buffers, and a replay's memory should stay flat however long the feed.
    Called just after Arrow is first imported here, before it allocates for a feed."""
    import pyarrow as pa

    if pa.default_memory_pool().backend_name != "system":
        pa.set_memory_pool(pa.system_memory_pool())


def _preparer(config):
    """An engine of ``config`` used only for ``prepare`` and its validator (it never learns)."""
    from service.engine import Engine

    return Engine(config, trace_limit=1)


def _line_of(where: str) -> int:
    hit = _LINE.match(where)
    return int(hit.group(1)) if hit else 0


def _read_csv(path: Path, config, block: int) -> Iterator[Chunk]:
    engine = _preparer(config)
    with _open(path) as src:
        text = io.TextIOWrapper(src.stream, encoding="utf-8", errors="replace", newline="")
        header = text.readline()
        if not header:
            return
        records = 0  # records before the current chunk
        pending: list[str] = []
        size = 0
        odd = False  # inside a quoted field that spans lines
        for ln in text:
            pending.append(ln)
            size += len(ln)
            odd ^= ln.count('"') % 2 == 1
            if size >= block and not odd:
                chunk = _csv_chunk(engine, header, pending, records, src.progress)
                yield chunk
                records += chunk.lines
                pending, size = [], 0
        if pending:
            yield _csv_chunk(engine, header, pending, records, src.progress)


def _csv_chunk(engine, header: str, lines: list[str], before: int, progress: float) -> Chunk:
    events, rejected = parse_csv_lines([header] + lines, engine.validator)
    bad = []
    for r in rejected:
        n = _line_of(r.where) + before
        bad.append((n, Rejection(_LINE.sub(f"line {n}", r.where, count=1), r.reason)))
    taken = {n for n, _ in bad}
    where = [n for n in range(before + 2, before + 2 + len(events) + len(bad)) if n not in taken]
    prepared = prepare_events(engine, events, where[:len(events)]) if events else None
    return Chunk(prepared, bad, len(events) + len(bad), progress)


def _parquet_chunk(engine, table, done: int, progress: float) -> Chunk:
    v = engine.validator
    cols, slow, _ = from_arrow(table, v, nested=False)
    number = done + 1 + np.arange(table.num_rows, dtype=np.int64)
    parts = []
    keep = np.flatnonzero(~slow)
    if len(keep):
        parts.append(to_prepared(cols, keep, number[keep], engine.model.mapper, holdout_share(engine.config)))
    events, where, rejected = [], [], []
    for k in np.flatnonzero(slow):
        try:
            events.append(v.validate(_row_event(table.slice(int(k), 1).to_pylist()[0]), f"row {number[k]}"))
            where.append(int(number[k]))
        except InvalidInput as exc:
            rejected.append((int(number[k]), Rejection(exc.where, exc.message)))
    if events:
        parts.append(prepare_events(engine, events, where))
    prepared = None
    if parts:
        order = np.argsort(np.concatenate([p.where for p in parts]), kind="stable")
        prepared = take_prepared(parts, order if len(parts) > 1 else None)
    return Chunk(prepared, rejected, table.num_rows, progress)


def _read_parquet(path: Path, config, workers: int, rows: int) -> Iterator[Chunk]:
    """Row batches are decoded here in order and mapped by ``workers`` threads; results in order."""
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise TrimtabError("reading Parquet needs pyarrow; install it with: pip install 'trimtab[parquet]'",
                           where=str(path)) from None
    _lean_arrow()
    local = threading.local()

    def work(table, done, progress):
        if not hasattr(local, "prep"):
            local.prep = _preparer(config)
        return _parquet_chunk(local.prep, table, done, progress)

    f = pq.ParquetFile(path)
    total = max(f.metadata.num_rows, 1)
    done = 0
    with ThreadPoolExecutor(max_workers=max(1, workers), thread_name_prefix="trimtab-parse") as pool:
        pending: deque = deque()
        for rb in f.iter_batches(batch_size=rows):
            table = pa.Table.from_batches([rb])
            pending.append(pool.submit(work, table, done, (done + table.num_rows) / total))
            done += table.num_rows
            if len(pending) > 2 * workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _row_event(row: dict) -> dict:
    """A Parquet row as the event object the validator checks (empty reserved cells are absent)."""
    obj: dict = {"features": {}}
    for name, value in row.items():
        if hasattr(value, "isoformat"):
            value = value.isoformat()
        if name in ("id", "ts", "target"):
            if value is not None:
                obj[name] = value
        else:
            obj["features"][name] = value
    return obj


def read_feed(path: str | Path, config, *, columnar: bool = True, workers: int = 1,
              block: int = _BLOCK) -> Iterator[Chunk]:
    """The chunks of one feed, prepared for an engine of ``config`` (see the module docstring).

    ``columnar=False`` keeps NDJSON on the line-by-line path (for comparisons and as a fallback);
    ``workers`` threads parse NDJSON blocks and map Parquet row batches.
    """
    p = Path(path)
    fmt = detect_format(p)
    if fmt == "ndjson":
        return _read_ndjson(p, config, columnar, workers, block)
    if fmt == "csv":
        return _read_csv(p, config, block)
    return _read_parquet(p, config, workers, _PARQUET_ROWS)
