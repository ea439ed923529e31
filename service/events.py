"""The event format at the boundary: validation of parsed events and NDJSON/CSV line parsing.

An event (docs/events.md) is ``{"id": str, "ts": epoch seconds | RFC 3339, "features":
{name: number | string | bool | null}, "target": number | 0/1/true/false}``. Validation checks
every rule once, here; anything that passes is trusted by the engine and the model. A rejected
event raises :class:`models.InvalidInput` whose ``where`` says where (``line 17.features.ambient_c``
or ``events[3].target``) and whose message says why. The rules:

* the event is a JSON object with only the keys ``id``, ``ts``, ``features``, ``target``;
* ``id`` is a string of 1 to 256 bytes of UTF-8 without control characters (:func:`check_id`),
  required when ``target`` is present;
* ``ts`` is a finite number or an RFC 3339 string;
* ``features`` is an object; a declared numeric feature is a finite number of magnitude at most
  :data:`MAX_MAGNITUDE` (1e100), a boolean or null; a
  declared categorical feature is a string of at most ``features.max_value_bytes`` bytes of UTF-8,
  an integer in the signed 64-bit range (an integral float counts as its integer; orjson reads a
  JSON integer past 64 bits as a double, so the range is checked on that double), a boolean or
  null; an undeclared feature is rejected or dropped (``features.unknown``);
* ``target`` is a finite number of magnitude at most 1e100 (regression) or 0/1/true/false (binary);
* a line is at most ``service.max_line_bytes`` bytes, valid UTF-8 (the rejection gives the byte
  offset of the first bad byte) and valid JSON (NaN and Infinity literals are not JSON).

The id grammar excludes every character of Unicode's general category Cc: the 33 of C0 and DEL
(U+0000-U+001F, U+007F) and the 32 of C1 (U+0080-U+009F). C1 characters are invisible, have no
use in an identifier, and mostly appear when Latin-1 or Windows-1252 bytes were decoded wrongly;
refusing them keeps ids printable in logs, answers and the journal.
"""

from __future__ import annotations

import csv
import io
import math
import re
from datetime import datetime
from typing import TYPE_CHECKING, NamedTuple

import orjson

from models import InvalidInput

if TYPE_CHECKING:
    from service.config import Config

__all__ = ["CONTROL_CHARS", "INT64_MAX", "INT64_MIN", "MAX_ID_BYTES", "Event", "EventValidator", "Rejection",
           "check_id", "parse_csv_lines", "parse_ndjson"]

_TOP_KEYS = frozenset(("id", "ts", "features", "target"))
MAX_ID_BYTES = 256
#: the characters an id may not hold: Unicode category Cc (C0, DEL and C1), as a regex class
CONTROL_CHARS = r"[\x00-\x1f\x7f-\x9f]"
_CONTROL = re.compile(CONTROL_CHARS)
_ID_RULE = f"an id is 1 to {MAX_ID_BYTES} bytes of UTF-8 without control characters"
#: integer categorical values must fit a signed 64-bit integer (the journal stores them as JSON integers)
INT64_MIN, INT64_MAX = -(1 << 63), (1 << 63) - 1


class Event(NamedTuple):
    """A validated event (features hold only declared names, values already of the right kind)."""

    id: str | None
    ts: float | None
    features: dict
    target: float | None


class Rejection(NamedTuple):
    where: str
    reason: str

    def as_dict(self) -> dict:
        return {"where": self.where, "reason": self.reason}


def _kind(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, (int, float)):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "an object"
    return type(v).__name__


def _utf8_size(text: str, where: str) -> int:
    """Bytes of ``text`` in UTF-8; a lone surrogate (not encodable) is an error saying where."""
    if text.isascii():
        return len(text)
    try:
        return len(text.encode("utf-8"))
    except UnicodeEncodeError as exc:
        raise InvalidInput(f"not valid UTF-8: a lone surrogate at character {exc.start}", where=where) from None


def check_id(ident, where: str) -> str:
    """``ident`` if it is a valid id, else :class:`InvalidInput` saying where and why."""
    if not isinstance(ident, str):
        raise InvalidInput(f"expected a string, got {_kind(ident)} ({_ID_RULE})", where=where)
    if not ident:
        raise InvalidInput(f"empty ({_ID_RULE})", where=where)
    if ident.isascii() and len(ident) <= MAX_ID_BYTES and ident.isprintable():
        return ident  # the common case: printable ASCII is ASCII without C0 and DEL (twice as fast as the regex)
    if len(ident) > MAX_ID_BYTES or not ident.isascii():
        size = _utf8_size(ident, where)
        if size > MAX_ID_BYTES:
            raise InvalidInput(f"{size} bytes of UTF-8, over the {MAX_ID_BYTES}-byte limit ({_ID_RULE})", where=where)
    bad = _CONTROL.search(ident)
    if bad is not None:
        raise InvalidInput(f"control character U+{ord(bad.group()):04X} at character {bad.start()} ({_ID_RULE})",
                           where=where)
    return ident


#: the largest magnitude a numeric feature or a regression target may have: far beyond any measured
#: quantity (a timestamp in nanoseconds is 2e18), far below where a square overflows (1.3e154), so a
#: value never turns a running figure (the warm-up scaling, the baseline, a loss sum) into inf or NaN.
#: Common practice, no published source.
MAX_MAGNITUDE = 1e100


def _checked(x: float, where: str) -> float:
    """``x`` when it is finite and at most :data:`MAX_MAGNITUDE` in magnitude; else the rejection."""
    if not math.isfinite(x):
        raise InvalidInput("not a finite number", where=where)
    if abs(x) > MAX_MAGNITUDE:
        raise InvalidInput(f"magnitude {abs(x):.3g} is above the {MAX_MAGNITUDE:g} limit (its square would overflow "
                           "the running figures)", where=where)
    return x


def _number(v) -> float:
    """``float(v)``, with an integer too large for a double reported as not finite."""
    try:
        return float(v)
    except OverflowError:
        return math.inf


def parse_ts(v, where: str) -> float | None:
    """Epoch seconds from a number or an RFC 3339 string."""
    if v is None:
        return None
    if isinstance(v, bool):
        raise InvalidInput(f"expected epoch seconds or an RFC 3339 string, got {_kind(v)}", where=where)
    if isinstance(v, (int, float)):
        x = _number(v)
        if not math.isfinite(x):
            raise InvalidInput("not a finite number", where=where)
        return x
    if isinstance(v, str):
        try:
            dt = datetime.fromisoformat(v)
        except ValueError:
            raise InvalidInput(f"not an RFC 3339 timestamp: {v[:40]!r}", where=where) from None
        if dt.tzinfo is None:
            raise InvalidInput("RFC 3339 timestamp needs a UTC offset (e.g. Z)", where=where)
        return dt.timestamp()
    raise InvalidInput(f"expected epoch seconds or an RFC 3339 string, got {_kind(v)}", where=where)


class EventValidator:
    """Validates parsed events against a config's declared features and task."""

    def __init__(self, config: Config) -> None:
        f = config.features
        self.numeric = frozenset(f.numeric)
        self.categorical = frozenset(f.categorical)
        self.reject_unknown = f.unknown == "reject"
        self.binary = config.model.task == "binary"
        self.max_line = config.service.max_line_bytes
        self.max_value = f.max_value_bytes

    def target(self, v, where: str) -> float:
        if self.binary:
            if v is True or v is False:
                return 1.0 if v else 0.0
            if isinstance(v, (int, float)) and v in (0, 1):
                return float(v)
            raise InvalidInput(f"binary target must be 0, 1, true or false, got {_repr(v)}", where=where)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise InvalidInput(f"expected a number, got {_kind(v)}", where=where)
        return _checked(_number(v), where)

    def validate(self, obj, where: str = "") -> Event:
        """Check one parsed event; raise :class:`InvalidInput` naming where and why.

        Hot (every ingested event): a value of the common exact type that passes its rule is taken
        as is, and a ``where`` is only built for a value that needs the full check (which raises
        with it, or accepts it as the fast test would have)."""
        p = f"{where}." if where else ""
        if obj.__class__ is not dict:
            if not isinstance(obj, dict):
                raise InvalidInput(f"an event must be a JSON object, got {_kind(obj)}", where=where or "event")
        if not _TOP_KEYS.issuperset(obj):
            extra = obj.keys() - _TOP_KEYS
            raise InvalidInput("unknown key (valid keys: features, id, target, ts)", where=f"{p}{sorted(extra)[0]}")
        feats = obj.get("features")
        if not isinstance(feats, dict):
            msg = "required" if feats is None else f"expected an object, got {_kind(feats)}"
            raise InvalidInput(msg, where=f"{p}features")
        ident = obj.get("id")
        if ident is not None and not (ident.__class__ is str and 0 < len(ident) <= MAX_ID_BYTES and ident.isascii()
                                      and ident.isprintable()):
            check_id(ident, f"{p}id")
        target = obj.get("target")
        if target is not None:
            if self.binary or target.__class__ is not float or not -MAX_MAGNITUDE <= target <= MAX_MAGNITUDE:
                target = self.target(target, f"{p}target")
            if ident is None:
                raise InvalidInput("required for an event with a target (deduplication and holdout use it)",
                                   where=f"{p}id")
        ts = obj.get("ts")
        if ts is not None and not (ts.__class__ is float and ts - ts == 0.0):  # NaN and inf fail x - x == 0
            ts = parse_ts(ts, f"{p}ts")
        clean = {}
        numeric, categorical, short = self.numeric, self.categorical, self.max_value // 4
        for name, v in feats.items():
            if name in numeric:
                cls = v.__class__
                if cls is float and -MAX_MAGNITUDE <= v <= MAX_MAGNITUDE:
                    clean[name] = v
                elif cls is int and INT64_MIN <= v <= INT64_MAX:  # far inside the magnitude limit
                    clean[name] = float(v)
                elif v is None or v is True or v is False:
                    clean[name] = None if v is None else float(v)
                elif isinstance(v, (int, float)):
                    clean[name] = _checked(_number(v), f"{p}features.{name}")
                else:
                    raise InvalidInput(f"expected a number, got {_kind(v)}", where=f"{p}features.{name}")
            elif name in categorical:
                if v.__class__ is str and len(v) <= short:
                    clean[name] = v
                else:
                    clean[name] = self._categorical(v, f"{p}features.{name}")
            elif self.reject_unknown:
                raise InvalidInput("unknown feature (not declared in the config's [features])",
                                   where=f"{p}features.{_short(name)}")
        return Event(ident, ts, clean, target)

    def _categorical(self, v, where: str):
        if v is None or v is True or v is False:
            return v
        if isinstance(v, str):
            if len(v) > self.max_value // 4:  # shorter strings are within the limit whatever they hold
                size = _utf8_size(v, where)
                if size > self.max_value:
                    raise InvalidInput(f"categorical value of {size} bytes of UTF-8, over the {self.max_value}-byte "
                                       "limit (features.max_value_bytes)", where=where)
            return v
        if isinstance(v, float) and math.isfinite(v) and v.is_integer():
            v = int(v)
        if isinstance(v, int):
            if not INT64_MIN <= v <= INT64_MAX:
                raise InvalidInput(f"integer categorical value {_short(str(v))} outside the signed 64-bit range; "
                                   "send it as a string", where=where)
            return v
        raise InvalidInput(f"expected a string, integer or boolean, got {_kind(v)}", where=where)

    def parse_line(self, line: bytes, where: str) -> Event:
        """Parse and validate one NDJSON line."""
        if len(line) > self.max_line:
            raise InvalidInput(f"line is {len(line)} bytes, over the {self.max_line}-byte limit", where=where)
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError as exc:
            raise InvalidInput(_json_reason(exc, line), where=where) from None
        return self.validate(obj, where)


def parse_ndjson(data: bytes, validator: EventValidator, first_line: int = 1):
    """Split NDJSON bytes into valid events and rejections; blank lines are skipped.

    Returns ``(events, rejections, line_numbers)``; ``line_numbers[k]`` is the 1-based line of
    ``events[k]``.
    """
    events: list[Event] = []
    lines: list[int] = []
    rejected: list[Rejection] = []
    for k, line in enumerate(data.split(b"\n")):
        if not line.strip():
            continue
        where = f"line {first_line + k}"
        try:
            events.append(validator.parse_line(line, where))
            lines.append(first_line + k)
        except InvalidInput as exc:
            rejected.append(Rejection(exc.where, exc.message))
    return events, rejected, lines


def parse_csv_lines(text_lines, validator: EventValidator, numeric: frozenset | None = None):
    """Parse CSV (a header row, then one event per row) into ``(events, rejections)``.

    The columns ``id``, ``ts``, ``target`` are reserved; every other column is a feature. Empty
    cells are missing values; declared numeric features are converted with ``float``.
    """
    reader = csv.reader(text_lines)
    header = next(reader, None)
    events, rejected = [], []
    if header is None:
        return events, rejected
    numeric = validator.numeric if numeric is None else numeric
    for k, row in enumerate(reader, start=2):
        where = f"line {k}"
        if len(row) != len(header):
            rejected.append(Rejection(where, f"expected {len(header)} columns, got {len(row)}"))
            continue
        obj: dict = {"features": {}}
        try:
            for name, cell in zip(header, row):
                if name in ("id", "ts", "target"):
                    if cell != "":
                        obj[name] = cell if name == "id" else _csv_number(cell, f"{where}.{name}", name == "ts")
                elif cell == "":
                    obj["features"][name] = None
                elif name in numeric:
                    obj["features"][name] = _csv_number(cell, f"{where}.features.{name}", False)
                else:
                    obj["features"][name] = cell
            events.append(validator.validate(obj, where))
        except InvalidInput as exc:
            rejected.append(Rejection(exc.where, exc.message))
    return events, rejected


def _csv_number(cell: str, where: str, allow_text: bool):
    try:
        x = float(cell)
    except ValueError:
        if allow_text:
            return cell
        raise InvalidInput(f"expected a number, got {cell[:40]!r}", where=where) from None
    if not math.isfinite(x):
        raise InvalidInput("not a finite number", where=where)
    return x


def _repr(v) -> str:
    return _kind(v) if isinstance(v, (dict, list, str)) or v is None else repr(v)


def _short(name: str) -> str:
    return name if len(name) <= 64 else name[:61] + "..."


def _json_reason(exc: orjson.JSONDecodeError, line: bytes) -> str:
    msg = str(exc)
    if "utf-8" in msg.lower() or "surrogate" in msg.lower():
        try:
            line.decode("utf-8")
        except UnicodeDecodeError as bad:
            return f"not valid JSON: invalid UTF-8 at byte offset {bad.start} of the line"
    return "not valid JSON: " + msg.split(":")[0][:120]


def csv_text_lines(data: bytes):
    """Decode CSV bytes for :func:`parse_csv_lines` (undecodable bytes become U+FFFD)."""
    return io.StringIO(data.decode("utf-8", "replace"), newline="")
