"""Live replay: post a recorded NDJSON feed to a running service, in order, and report what it acked.

``trimtab replay FEED... --to URL [--speed X] [--token-env NAME] [--batch N]`` sends the feed's
lines as they are (malformed ones included: the service rejects them by the same rules as an
offline replay) in NDJSON bodies to ``POST /v1/events``, one request in flight so the service
applies them in feed order. With ``--speed X`` a body leaves when the recorded time of its first
event, divided by X, has elapsed since the first; otherwise as fast as the service acknowledges.
``429`` and ``503`` answers are retried after their ``Retry-After``. At the end it reads
``GET /v1/model`` and prints the acknowledgements, request latency percentiles and the service's
``state_digest`` (equal to an offline replay's digest over the same feed).
"""

from __future__ import annotations

import asyncio
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import orjson

from models import InvalidSettings, TrimtabError

__all__ = ["client_main", "replay_live"]

_MAX_BODY = 8 * 1024 * 1024
_LINE_LIMIT = 1 << 20  # lines longer than this are not sent (the service would reject them anyway)
_RETRIES = 100


def _batches(feeds, batch: int):
    """``(body, n_lines, first_ts, skipped)`` per request, in feed order, with bounded memory."""
    from service.feeds.files import _ndjson_blocks, _open

    lines: list[bytes] = []
    size = 0
    skipped = 0
    for feed in feeds:
        with _open(Path(feed)) as src:
            for data, _first, too_long in _ndjson_blocks(src, _LINE_LIMIT, 1 << 20):
                skipped += len(too_long)
                for line in data.split(b"\n"):
                    if not line.strip():
                        continue
                    if lines and (len(lines) >= batch or size + len(line) > _MAX_BODY):
                        yield b"\n".join(lines) + b"\n", len(lines), _ts(lines[0]), skipped
                        lines, size, skipped = [], 0, 0
                    lines.append(line)
                    size += len(line) + 1
    if lines or skipped:
        yield b"\n".join(lines) + b"\n", len(lines), _ts(lines[0]) if lines else None, skipped


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
            "skipped_oversize": 0}
    latency: list[float] = []
    first_ts = None
    start = time.perf_counter()
    timeout = aiohttp.ClientTimeout(total=None, sock_read=600)
    async with aiohttp.ClientSession(timeout=timeout) as session:
        for body, n, ts, skipped in _batches(feeds, batch):
            acks["skipped_oversize"] += skipped
            if n == 0:
                continue
            if speed and ts is not None:
                first_ts = ts if first_ts is None else first_ts
                wait = (ts - first_ts) / speed - (time.perf_counter() - start)
                if wait > 0:
                    await asyncio.sleep(wait)
            reply = await _post(session, f"{base}/v1/events", body, headers, acks, latency)
            acks["requests"] += 1
            acks["lines"] += n
            acks["accepted"] += int(reply.get("accepted", 0))
            acks["duplicates"] += len(reply.get("duplicates", []))
            acks["rejected"] += len(reply.get("rejected", []))
            if log is not None:
                log(acks)
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


def _message(payload) -> str:
    if isinstance(payload, dict) and isinstance(payload.get("error"), dict):
        e = payload["error"]
        return f"{e.get('message')} (at {e.get('where')})"
    return str(payload)[:200]


def client_main(args) -> int:
    """``trimtab replay FEED... --to URL``: print acks, latency percentiles and the final digest."""
    from service.feeds.files import detect_format

    for feed in args.feeds:
        if detect_format(feed) != "ndjson":
            raise InvalidSettings("--to replays NDJSON feeds (the service's wire format); convert this feed "
                                  "or replay it offline with -c", where=feed)
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
