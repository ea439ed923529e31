"""Live replay: post a recorded feed to a running service, in order, and report what it acked.

``trimtab replay FEED... --to URL [--speed X] [--token-env NAME] [--batch N]`` reads the same
formats as an offline replay (NDJSON, CSV, Parquet; ``.gz`` too) and sends the events in NDJSON bodies
to ``POST /v1/events``, one request in flight so the service applies them in feed order. NDJSON lines
go as they are (malformed ones included: the service rejects them by the same rules as an offline
replay); CSV and Parquet rows become the event objects an offline replay builds from them (the
numeric columns are the ones the service's config declares, read from ``GET /v1/model``).

``--speed X`` paces by the events' own timestamps: an event leaves when the time since the first
event's ``ts``, divided by X, has elapsed (events due together share a body; events without a ``ts``
go with the one before). Without it, bodies go as fast as the service acknowledges. ``429`` and ``503``
answers are retried after their ``Retry-After``. At the end it reads ``GET /v1/model`` and prints the
acknowledgements, request latency percentiles and the service's ``state_digest`` (equal to an offline
replay's digest over the same feed).
"""

from __future__ import annotations

import asyncio
import csv
import io
import json
import math
import os
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import orjson

from models import InvalidSettings, TrimtabError

__all__ = ["client_main", "feed_records", "replay_live"]

_MAX_BODY = 8 * 1024 * 1024
_LINE_LIMIT = 1 << 20  # lines longer than this are not sent (the service would reject them anyway)
_RETRIES = 100
_RESERVED = ("id", "ts", "target")


class _Skipped:
    """A record the client does not send (too long, or a CSV row of the wrong width); counted."""

    def __init__(self, reason: str) -> None:
        self.reason = reason


def feed_records(feeds, numeric: frozenset = frozenset()) -> Iterator[bytes | _Skipped]:
    """One NDJSON line per event of ``feeds``, in order, whatever their format (bounded memory)."""
    from service.feeds.files import detect_format

    for feed in feeds:
        fmt = detect_format(feed)
        if fmt == "ndjson":
            yield from _ndjson_lines(Path(feed))
        elif fmt == "csv":
            yield from _csv_lines(Path(feed), numeric)
        else:
            yield from _parquet_lines(Path(feed))


def _ndjson_lines(path: Path) -> Iterator[bytes | _Skipped]:
    from service.feeds.files import _ndjson_blocks, _open

    with _open(path) as src:
        for data, _first, too_long in _ndjson_blocks(src, _LINE_LIMIT, 1 << 20):
            for _ in too_long:
                yield _Skipped("line over 1 MiB")
            for line in data.split(b"\n"):
                if line.strip():
                    yield line


def _csv_lines(path: Path, numeric: frozenset) -> Iterator[bytes | _Skipped]:
    """CSV rows as the event objects :func:`service.events.parse_csv_lines` builds from them."""
    from service.feeds.files import _open

    with _open(path) as src:
        text = io.TextIOWrapper(src.stream, encoding="utf-8", errors="replace", newline="")
        reader = csv.reader(text)
        header = next(reader, None)
        if header is None:
            return
        for row in reader:
            if len(row) != len(header):
                yield _Skipped(f"expected {len(header)} columns, got {len(row)}")
                continue
            obj: dict = {"features": {}}
            for name, cell in zip(header, row):
                if name in _RESERVED:
                    if cell != "":
                        obj[name] = cell if name == "id" else _number_or_text(cell)
                elif cell == "":
                    obj["features"][name] = None
                else:
                    obj["features"][name] = _number_or_text(cell) if name in numeric else cell
            yield _dump(obj)


def _number_or_text(cell: str):
    """A cell's number; text that is not one goes as text, and the service rejects it as offline."""
    try:
        return float(cell)
    except ValueError:
        return cell


def _parquet_lines(path: Path) -> Iterator[bytes]:
    from service.feeds.files import _row_event

    try:
        import pyarrow.parquet as pq
    except ImportError:
        raise TrimtabError("reading Parquet needs pyarrow; install it with: pip install 'trimtab[parquet]'",
                           where=str(path)) from None
    for batch in pq.ParquetFile(path).iter_batches(batch_size=10_000):
        for row in batch.to_pylist():
            yield _dump(_row_event(row))


def _dump(obj: dict) -> bytes:
    """The event as one JSON line. A non-finite number is written as the NaN/Infinity literal (orjson
    would write null, a *missing* value) and an integer beyond 64 bits in full, so the service judges
    the value the feed holds, as an offline replay does."""
    if _has_nonfinite(obj):
        return json.dumps(obj, allow_nan=True).encode()
    try:
        return orjson.dumps(obj)
    except TypeError:
        return json.dumps(obj).encode()


def _has_nonfinite(obj: dict) -> bool:
    return any(isinstance(v, float) and not math.isfinite(v) for v in (*obj["features"].values(), obj.get("ts"),
                                                                         obj.get("target")))


def _ts(line: bytes) -> float | None:
    try:
        v = orjson.loads(line).get("ts")
    except (orjson.JSONDecodeError, AttributeError):
        return None
    from service.events import parse_ts

    try:
        return parse_ts(v, "ts")
    except TrimtabError:
        return None


class _Pacer:
    """When each event is due: its ``ts`` after the first one's, divided by ``speed``."""

    def __init__(self, speed: float | None) -> None:
        self.speed, self.first, self.start = speed, None, time.perf_counter()

    def due(self, line: bytes) -> float:
        """The ``perf_counter`` time ``line`` is due (the start when unpaced or without a timestamp)."""
        ts = _ts(line) if self.speed else None
        if ts is None:
            return self.start
        if self.first is None:
            self.first = ts
        return self.start + (ts - self.first) / self.speed


async def replay_live(feeds, url: str, *, speed: float | None = None, token: str | None = None,
                      batch: int = 1000, log=None) -> dict:
    """Post ``feeds`` to the service at ``url``; return acks, latencies and the final model card."""
    import aiohttp

    base = url.rstrip("/")
    headers = {"Content-Type": "application/x-ndjson"}
    if token:
        headers["Authorization"] = f"Bearer {token}"
    read_headers = {"Authorization": headers["Authorization"]} if token else {}
    acks = {"requests": 0, "lines": 0, "accepted": 0, "duplicates": 0, "rejected": 0, "retries": 0,
            "skipped_oversize": 0, "skipped_malformed": 0}
    latency: list[float] = []
    start = time.perf_counter()
    timeout = aiohttp.ClientTimeout(total=None, sock_read=600)
    async with aiohttp.ClientSession(timeout=timeout) as session:
        numeric = frozenset(await _declared_numeric(session, base, read_headers))
        pacer = _Pacer(speed)
        lines: list[bytes] = []
        size = 0

        async def send() -> None:
            nonlocal lines, size
            reply = await _post(session, f"{base}/v1/events", b"\n".join(lines) + b"\n", headers, acks, latency)
            acks["requests"] += 1
            acks["lines"] += len(lines)
            acks["accepted"] += int(reply.get("accepted", 0))
            acks["duplicates"] += len(reply.get("duplicates", []))
            acks["rejected"] += len(reply.get("rejected", []))
            lines, size = [], 0
            if log is not None:
                log(acks)

        for record in feed_records(feeds, numeric):
            if isinstance(record, _Skipped):
                acks["skipped_oversize" if record.reason.startswith("line over") else "skipped_malformed"] += 1
                continue
            due = pacer.due(record)
            if lines and (due > time.perf_counter() or len(lines) >= batch or size + len(record) > _MAX_BODY):
                await send()
            wait = due - time.perf_counter()
            if wait > 0:
                await asyncio.sleep(wait)
            lines.append(record)
            size += len(record) + 1
        if lines:
            await send()
        async with session.get(f"{base}/v1/model", headers=read_headers) as resp:
            card = await resp.json(content_type=None)
            if resp.status != 200:
                raise TrimtabError(f"GET /v1/model answered {resp.status}: {_message(card)}", where=url)
    seconds = time.perf_counter() - start
    lat = np.asarray(latency) * 1000.0
    pct = {f"p{q}": float(np.percentile(lat, q)) for q in (50, 90, 99)} if len(lat) else {}
    if len(lat):
        pct["max"] = float(lat.max())
    return {"url": base, "acks": acks, "latency_ms": pct, "seconds": seconds,
            "events_per_second": acks["accepted"] / seconds if seconds > 0 else None,
            "state_digest": card.get("state_digest"), "serving": card.get("serving")}


async def _post(session, url: str, body: bytes, headers: dict, acks: dict, latency: list) -> dict:
    for _ in range(_RETRIES):
        sent = time.perf_counter()
        async with session.post(url, data=body, headers=headers) as resp:
            payload = await resp.json(content_type=None)
            took = time.perf_counter() - sent
            if resp.status in (429, 503):
                acks["retries"] += 1
                await asyncio.sleep(float(resp.headers.get("Retry-After", "1") or 1))
                continue
            latency.append(took)
            if resp.status == 200:
                return payload
            if resp.status == 422 and "rejected" in payload:  # every line of the body was rejected
                return {"accepted": 0, "rejected": payload["rejected"]}
            if resp.status == 422 and isinstance(payload.get("error"), dict) and "rejected" in payload["error"]:
                return {"accepted": 0, "rejected": payload["error"]["rejected"]}
            raise TrimtabError(f"POST /v1/events answered {resp.status}: {_message(payload)}", where=url)
    raise TrimtabError(f"the service kept answering 429/503 after {_RETRIES} tries", where=url)


async def _declared_numeric(session, base: str, headers: dict) -> list[str]:
    """The service's numeric features (CSV cells of these columns are sent as numbers)."""
    async with session.get(f"{base}/v1/model", headers=headers) as resp:
        card = await resp.json(content_type=None)
        if resp.status != 200:
            raise TrimtabError(f"GET /v1/model answered {resp.status}: {_message(card)}", where=base)
    return list(card.get("config", {}).get("features", {}).get("numeric", []))


def _message(payload) -> str:
    if isinstance(payload, dict) and isinstance(payload.get("error"), dict):
        e = payload["error"]
        return f"{e.get('message')} (at {e.get('where')})"
    return str(payload)[:200]


def client_main(args) -> int:
    """``trimtab replay FEED... --to URL``: print acks, latency percentiles and the final digest."""
    from service.feeds.files import detect_format

    for feed in args.feeds:
        detect_format(feed)  # a missing or unreadable feed is refused before anything is sent
    if args.speed is not None and not args.speed > 0:
        raise InvalidSettings("must be a number > 0", where="--speed")
    if args.batch < 1:
        raise InvalidSettings("must be at least 1", where="--batch")
    token = os.environ.get(args.token_env) or None
    quiet = args.no_progress
    last = [0.0]

    def log(acks):
        now = time.perf_counter()
        if not quiet and now - last[0] > 5.0:
            last[0] = now
            print(f"trimtab replay: {acks['lines']:,} lines sent, {acks['accepted']:,} accepted", file=sys.stderr)

    out = asyncio.run(replay_live(args.feeds, args.to, speed=args.speed, token=token, batch=args.batch, log=log))
    a, lat = out["acks"], out["latency_ms"]
    print(f"sent {a['lines']:,} lines in {a['requests']:,} requests to {out['url']}: {a['accepted']:,} accepted, "
          f"{a['rejected']:,} rejected, {a['duplicates']:,} duplicates, {a['retries']:,} retries after 429/503")
    if lat:
        print(f"latency ms: p50 {lat['p50']:.1f}, p90 {lat['p90']:.1f}, p99 {lat['p99']:.1f}, max {lat['max']:.1f}")
    print(f"service state_digest {out['state_digest']} (serving {out['serving']})")
    print(json.dumps(out))
    return 0
