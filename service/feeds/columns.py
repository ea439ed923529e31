"""Columnar events (Arrow arrays) to :class:`~service.engine.PreparedBatch`, with no per-event Python.

:meth:`Engine.prepare` maps one validated event at a time. A columnar feed (Parquet, or NDJSON
parsed by Arrow) holds the same information as arrays, so the mapping can be vectorized: numeric
columns become CSR values directly, categorical columns are dictionary-encoded and hashed once per
distinct value, and ids are hashed in a compiled loop (:mod:`service.idhash`). The result is
bit-identical to ``Engine.prepare`` on the same events (the test suite checks it).

The boundary rules stay in :class:`~service.events.EventValidator`. This module only *recognizes*
rows that the validator certainly accepts and whose values it would pass through unchanged; every
other row is flagged for the caller, which sends it through the validator (exact messages, exact
values). So a value this module cannot vouch for, such as a ``-0.0`` (JSON ``-0`` parses to the
integer 0, ``-0.0`` to the float), a non-finite number or an over-long id, costs speed, never
correctness.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from models import FeatureMapper, Rows
from models.features import categorical_text

from service.engine import PreparedBatch
from service.events import CONTROL_CHARS, INT64_MAX, INT64_MIN, MAX_ID_BYTES, MAX_MAGNITUDE  # the validator's rules
from service.idhash import hash_ids, holdout_fractions

__all__ = ["Columns", "Prepared", "from_arrow", "from_parsed", "holdout_share", "string_buffers", "take_prepared",
           "to_prepared"]

_TS_SCALE = {"s": 1.0, "ms": 1e3, "us": 1e6}


@dataclass
class Columns:
    """Events as columns: float64 arrays with NaN for missing, categorical values as codes.

    ``ids`` is an Arrow string array (or ``None`` when the feed has no ids);
    ``categorical[name] = (codes, texts)``, code -1 for missing, ``texts[code]`` the canonical text.
    """

    n: int
    ids: object
    ts: np.ndarray
    target: np.ndarray
    numeric: dict
    categorical: dict


@dataclass
class Prepared:
    """A prepared batch with what replay needs beside it: id hashes and each event's position."""

    batch: PreparedBatch
    hashes: np.ndarray  # uint64 hash of "holdout\x1f" + id (0 without an id)
    has_id: np.ndarray  # bool
    where: np.ndarray  # int64: line or row number of each event in its feed
    #: (feature, text) of the categorical values the events use, for the engine's mapper to remember
    categories: list = field(default_factory=list)


def holdout_share(config) -> float:
    """The share of learning events held out under ``config`` (none without a monitor), as the engine uses it."""
    return config.monitor.holdout_share if config.monitor.enabled else 0.0


def _pa():
    import pyarrow as pa
    import pyarrow.compute as pc

    return pa, pc


def _floats(arr, slow: np.ndarray, *, allow_bool: bool) -> np.ndarray:
    """A numeric Arrow array as float64 (NaN for null); flags values the validator would not pass as is."""
    pa, _ = _pa()
    t = arr.type
    null = arr.is_null().to_numpy(zero_copy_only=False)
    if pa.types.is_null(t):
        return np.full(len(arr), np.nan)
    if pa.types.is_boolean(t):
        x = np.where(null, np.nan, arr.fill_null(False).to_numpy(zero_copy_only=False).astype(np.float64))
        if not allow_bool:
            slow |= ~null
        return x
    if not (pa.types.is_integer(t) or pa.types.is_floating(t)):
        slow |= ~null
        return np.full(len(arr), np.nan)
    x = arr.to_numpy(zero_copy_only=False).astype(np.float64)
    x[null] = np.nan
    _number_rules(x, null, slow)
    return x


def _number_rules(x: np.ndarray, null: np.ndarray, slow: np.ndarray) -> None:
    """Flags the numbers ``x`` (where not ``null``) that the validator would not pass as is."""
    # non-finite and huge numbers are rejected by the validator (a huge ts passes there, on the slow
    # path); -0.0 is ambiguous (JSON "-0" is the integer 0)
    slow |= ~null & (~(np.abs(x) <= MAX_MAGNITUDE) | ((x == 0.0) & np.signbit(x)))


def _id_rules(ids, slow: np.ndarray) -> np.ndarray:
    """Flags the ids (an Arrow string array) the validator would reject; returns where there is one."""
    _, pc = _pa()
    size = pc.binary_length(ids).fill_null(1).to_numpy(zero_copy_only=False)
    control = pc.match_substring_regex(ids, CONTROL_CHARS).fill_null(False).to_numpy(zero_copy_only=False)
    slow |= (size == 0) | (size > MAX_ID_BYTES) | control
    return ~ids.is_null().to_numpy(zero_copy_only=False)


def _target_rules(target: np.ndarray, has_id: np.ndarray, binary: bool, slow: np.ndarray) -> None:
    """Flags the targets a binary task would reject, and the learning events without an id."""
    if binary:
        slow |= ~np.isnan(target) & (target != 0.0) & (target != 1.0)
    slow |= ~np.isnan(target) & ~has_id  # a learning event needs an id


def _categorical(arr, slow: np.ndarray, max_bytes: int) -> tuple[np.ndarray, list]:
    """Dictionary codes and canonical texts (see :func:`models.features.categorical_text`); values
    the validator would reject (a non-integer number, an integer outside 64 bits, a string over
    ``max_bytes`` bytes) are flagged, once per distinct value."""
    pa, pc = _pa()
    t = arr.type
    n = len(arr)
    if pa.types.is_null(t):
        return np.full(n, -1, dtype=np.int64), []
    if not (pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_integer(t)
            or pa.types.is_boolean(t) or pa.types.is_floating(t)):
        slow |= ~arr.is_null().to_numpy(zero_copy_only=False)
        return np.full(n, -1, dtype=np.int64), []
    enc = pc.dictionary_encode(arr)
    codes = enc.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    texts = []
    for k, v in enumerate(enc.dictionary.to_pylist()):
        if isinstance(v, float) and math.isfinite(v) and v.is_integer():
            v = int(v)
        if (isinstance(v, float) or (isinstance(v, int) and not INT64_MIN <= v <= INT64_MAX)
                or (isinstance(v, str) and len(v.encode("utf-8", "surrogatepass")) > max_bytes)):
            slow |= codes == k
            texts.append(None)
            continue
        texts.append(categorical_text(v))
    return codes, texts


def from_arrow(table, validator, *, nested: bool) -> tuple[Columns, np.ndarray, list[str]]:
    """Columns of an Arrow table of events, the rows that must go through the validator, and the
    keys whose presence the columns cannot show.

    ``nested``: the features are a struct column ``features`` (NDJSON); otherwise every column but
    ``id``, ``ts`` and ``target`` is a feature (CSV and Parquet, where every row has every column).
    In a nested table a key the validator rejects (an unknown top-level key, or an undeclared
    feature when ``features.unknown = "reject"``) flags the rows where it has a value; where it is
    null, the key may be absent or ``null``, so its name is returned (as ``"features.<name>"`` or
    ``"<name>"``) for the caller to look for in the raw line.
    """
    pa, _ = _pa()
    n = table.num_rows
    slow = np.zeros(n, dtype=np.bool_)
    names = table.column_names

    def col(name):
        c = table.column(name)
        return c.combine_chunks() if isinstance(c, pa.ChunkedArray) else c

    ambiguous: list[str] = []
    if nested:
        for name in sorted(set(names) - {"id", "ts", "features", "target"}):
            slow |= ~col(name).is_null().to_numpy(zero_copy_only=False)
            ambiguous.append(name)
        if "features" not in names:
            feats = {}
            slow[:] = True
        else:
            fcol = col("features")
            slow |= fcol.is_null().to_numpy(zero_copy_only=False)
            feats = {fcol.type.field(i).name: fcol.field(i) for i in range(fcol.type.num_fields)}
    else:
        feats = {k: col(k) for k in names if k not in ("id", "ts", "target")}
    unknown = sorted(set(feats) - validator.numeric - validator.categorical)
    if unknown and validator.reject_unknown:
        if nested:
            for name in unknown:
                slow |= ~feats[name].is_null().to_numpy(zero_copy_only=False)
                ambiguous.append("features." + name)
        else:
            slow[:] = True

    ids = None
    if "id" in names and not pa.types.is_null(col("id").type):
        ids = col("id")
        if not (pa.types.is_string(ids.type) or pa.types.is_large_string(ids.type)):
            slow |= ~ids.is_null().to_numpy(zero_copy_only=False)
            ids = None
    has_id = np.zeros(n, bool) if ids is None else _id_rules(ids, slow)

    ts = np.full(n, np.nan)
    if "ts" in names:
        tcol = col("ts")
        if pa.types.is_timestamp(tcol.type) and tcol.type.tz is not None and tcol.type.unit in _TS_SCALE:
            raw = tcol.cast(pa.int64()).to_numpy(zero_copy_only=False).astype(np.float64)
            ts = np.where(tcol.is_null().to_numpy(zero_copy_only=False), np.nan, raw / _TS_SCALE[tcol.type.unit])
        else:
            ts = _floats(tcol, slow, allow_bool=False)

    target = np.full(n, np.nan)
    if "target" in names:
        target = _floats(col("target"), slow, allow_bool=validator.binary)
    _target_rules(target, has_id, validator.binary, slow)

    numeric = {k: _floats(feats[k], slow, allow_bool=True) if k in feats else np.full(n, np.nan)
               for k in validator.numeric}
    absent = (np.full(n, -1, np.int64), [])
    categorical = {k: _categorical(feats[k], slow, validator.max_value) if k in feats else absent
                   for k in validator.categorical}
    return Columns(n, ids, ts, target, numeric, categorical), slow, ambiguous


def string_buffers(ids) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Offsets, UTF-8 bytes and validity of an Arrow string array (the input of :func:`service.idhash.hash_ids`)."""
    pa, _ = _pa()
    bufs = ids.buffers()
    wide = pa.types.is_large_string(ids.type)
    offsets = np.frombuffer(bufs[1], dtype=np.int64 if wide else np.int32, count=len(ids) + 1,
                            offset=ids.offset * (8 if wide else 4))
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, np.uint8)
    return offsets, data, ~ids.is_null().to_numpy(zero_copy_only=False)


def from_parsed(ids, numbers: dict, texts: dict, validator) -> tuple[Columns, np.ndarray]:
    """:func:`from_arrow` of the columns of the compiled NDJSON parse (:mod:`service.feeds.ndjson_direct`):
    the same rules on the same values, without an Arrow table in between.

    ``ids`` is an Arrow string array; ``numbers`` maps ``ts``, ``target`` and each numeric feature
    to a float64 array (NaN where missing), ``texts`` each categorical feature to an Arrow string
    array. Every row has its ``features`` object and only known keys (the parse takes no other line).
    """
    n = len(ids)
    slow = np.zeros(n, dtype=np.bool_)
    has_id = _id_rules(ids, slow)
    for x in numbers.values():
        _number_rules(x, np.isnan(x), slow)
    _target_rules(numbers["target"], has_id, validator.binary, slow)
    numeric = {k: numbers[k] for k in validator.numeric}
    categorical = {k: _categorical(texts[k], slow, validator.max_value) for k in validator.categorical}
    return Columns(n, ids, numbers["ts"], numbers["target"], numeric, categorical), slow


def _id_hashes(ids, n: int, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if ids is None:
        return np.zeros(len(rows), np.uint64), np.zeros(len(rows), bool)
    pa, _ = _pa()
    if len(rows) != n:
        ids = ids.take(pa.array(rows))
    offsets, data, valid = string_buffers(ids)
    return hash_ids(offsets, data, valid), valid


def to_prepared(cols: Columns, rows: np.ndarray, where: np.ndarray, mapper: FeatureMapper,
                holdout_share: float) -> Prepared:
    """The :class:`Prepared` batch of the columns' ``rows`` (indices), as ``Engine.prepare`` would map them.

    Categorical values are bucketed through ``mapper`` (which remembers them for reporting).
    """
    m = len(rows)
    names = list(mapper.numeric) + list(mapper.categorical)
    idx = np.zeros((m, len(names)), dtype=np.int64)
    val = np.zeros((m, len(names)))
    present = np.zeros((m, len(names)), dtype=np.bool_)
    for j, name in enumerate(mapper.numeric):
        x = cols.numeric[name][rows]
        present[:, j] = ~np.isnan(x)
        idx[:, j] = j
        val[:, j] = np.where(present[:, j], x, 0.0)
    n_num = len(mapper.numeric)
    cats: list = []
    for k, name in enumerate(mapper.categorical):
        j = n_num + k
        codes, texts = cols.categorical[name]
        buckets = np.zeros(len(texts) + 1, dtype=np.int64)
        signs = np.zeros(len(texts) + 1)
        for c, text in enumerate(texts):
            if text is not None:
                buckets[c], signs[c] = mapper.bucket(name, text)
        code = codes[rows]
        present[:, j] = code >= 0
        cats += [(name, texts[c]) for c in np.unique(code[code >= 0]).tolist() if texts[c] is not None]
        idx[:, j] = buckets[code]
        val[:, j] = signs[code]
        # two values of one event in one bucket are summed into the first entry, as FeatureMapper.map does
        for prev in range(n_num, j):
            same = present[:, prev] & present[:, j] & (idx[:, prev] == idx[:, j])
            if same.any():
                val[same, prev] += val[same, j]
                present[same, j] = False
    counts = present.sum(axis=1)
    indptr = np.zeros(m + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    out_rows = Rows(indptr, idx[present], val[present])

    hashes, has_id = _id_hashes(cols.ids, cols.n, rows)
    y = cols.target[rows]
    labelled = ~np.isnan(y)
    mode = np.zeros(m, dtype=np.int8)
    mode[labelled] = 1
    if holdout_share > 0.0:
        mode[labelled & (holdout_fractions(hashes) < holdout_share)] = 2
    if cols.ids is None:
        ids = [None] * m
    elif m == cols.n:
        ids = cols.ids
    else:
        ids = cols.ids.take(_pa()[0].array(rows))
    batch = PreparedBatch(ids, cols.ts[rows].copy(), out_rows, y.copy(), mode)
    return Prepared(batch, hashes, has_id, np.asarray(where, dtype=np.int64), cats)


def _take_rows(rows: Rows, order: np.ndarray) -> Rows:
    lens = rows.indptr[order + 1] - rows.indptr[order]
    indptr = np.zeros(len(order) + 1, dtype=np.int64)
    np.cumsum(lens, out=indptr[1:])
    pick = np.repeat(rows.indptr[order] - indptr[:-1], lens) + np.arange(indptr[-1], dtype=np.int64)
    return Rows(indptr, rows.indices[pick], rows.values[pick])


def take_prepared(parts: list[Prepared], order: np.ndarray | None = None) -> Prepared:
    """Concatenate ``parts`` and keep the events ``order`` (indices into the concatenation) in that order."""
    if len(parts) == 1 and order is None:
        return parts[0]
    parts = [p for p in parts if len(p.batch)] or parts[:1]
    rows = Rows.concat([p.batch.rows for p in parts])
    ids: list = []
    for p in parts:
        ids += p.batch.ids.to_pylist() if hasattr(p.batch.ids, "to_pylist") else list(p.batch.ids)
    cat = {k: np.concatenate([getattr(p.batch, k) for p in parts]) for k in ("ts", "y", "mode")}
    hashes = np.concatenate([p.hashes for p in parts])
    has_id = np.concatenate([p.has_id for p in parts])
    where = np.concatenate([p.where for p in parts])
    if order is None:
        order = np.arange(len(ids))
    order = np.asarray(order, dtype=np.int64)
    batch = PreparedBatch([ids[i] for i in order], cat["ts"][order], _take_rows(rows, order), cat["y"][order],
                          cat["mode"][order])
    return Prepared(batch, hashes[order], has_id[order], where[order], [c for p in parts for c in p.categories])
