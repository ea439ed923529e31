"""The demo feed: invented telemetry of a fictional regional cold-chain van fleet.

All data made here is invented for the demo: the fleet, its vans and every number are fictional.
Anything learned from it is decision support only; food or medicine temperatures follow local
regulations and licensed practice.

24 refrigerated vans (``V01``-``V24``) report once per simulated minute; V01-V10 run ``urban``
routes (frequent door-open stops), V11-V18 ``regional``, V19-V24 ``linehaul``. Features:
``ambient_c`` (daily cycle, slow weather, local noise), ``compressor_duty`` (the controller follows
ambient and door heat; a 12-minute defrost every 6 hours), ``door_open_s``, ``load_kg`` (drops at
deliveries, reloaded at 05:00), ``van``, ``route``.

The target is the hold-probe reading 15 minutes ahead. A first-order (Newton cooling) hold,
``C dT/dt = U (T_amb - T) + h door - Q duty``, integrated over 15 minutes and linearised around
the set point, makes it linear in the features, plus Gaussian probe noise (sd 0.3), rounded to
0.01 degC. Truth, regime 1 -> regime 2: intercept 3.8 -> 5.3 (the probe reads +1.5 degC);
``ambient_c`` 0.14; ``compressor_duty`` -5.0 -> -7.0; ``door_open_s`` 0.07; ``load_kg`` 0.0006;
route urban 0.8, regional 0.0, linehaul -0.3; van effects N(0, 0.35), seeded
(:func:`ground_truth` returns them all).

* **Recalibration** (from ``recalibration_at`` of the stream on): the probe is recalibrated and
  the compressor firmware rescales its duty report; lasting, and stationary again after.
* **Faulty gateway** (from ``fault_start``, for ``fault_share`` of the stream): ``gw-north``
  relays Fahrenheit labelled Celsius (``target * 1.8 + 32``) for all vans but V04, V08, ..., V24:
  plausible-looking, far from the truth. Binary variant: label 1.
* **Malformed lines** (:func:`write_ndjson` only): about ``malformed_share`` extra broken lines
  of the kinds in :data:`MALFORMED_KINDS`, with ids unlike any real one.

Binary variant: same features; the target is 1 if the hold reading exceeds 8 degC in any minute
of the next 30, else 0.

Examples
--------
>>> from itertools import islice
>>> for event in islice(generate(1000), 3):  # doctest: +NORMALIZE_WHITESPACE
...     print(event)
{'id': 'V01-0000000', 'ts': 1772439300.0, 'features': {'ambient_c': 4.6,
 'compressor_duty': 0.224, 'door_open_s': 0, 'load_kg': 493, 'van': 'V01', 'route': 'urban'},
 'target': 3.75}
{'id': 'V02-0000000', 'ts': 1772439300.0, 'features': {'ambient_c': 4.6,
 'compressor_duty': 0.282, 'door_open_s': 10, 'load_kg': 284, 'van': 'V02', 'route': 'urban'},
 'target': 4.5}
{'id': 'V03-0000000', 'ts': 1772439300.0, 'features': {'ambient_c': 5.5,
 'compressor_duty': 0.521, 'door_open_s': 38, 'load_kg': 690, 'van': 'V03', 'route': 'urban'},
 'target': 6.35}
>>> [e["target"] for e in islice(generate(1000, variant="binary"), 3)]
[0, 0, 0]
>>> sum(e["target"] for e in generate(1000, variant="binary"))
120
"""

from __future__ import annotations

import gzip as gzip_module
import hashlib
import math
import re
from collections import deque
from collections.abc import Iterable, Iterator, Mapping
from contextlib import nullcontext
from dataclasses import dataclass
from itertools import islice
from pathlib import Path

import numpy as np
import orjson

__all__ = ["CATEGORICAL", "MALFORMED_KINDS", "NUMERIC", "ROUTES", "START_TS", "VANS", "Regime",
           "ScenarioTruth", "generate", "ground_truth", "write_csv", "write_lines", "write_ndjson"]

VANS = tuple(f"V{i:02d}" for i in range(1, 25))
ROUTES = ("urban", "regional", "linehaul")
NUMERIC = ("ambient_c", "compressor_duty", "door_open_s", "load_kg")
CATEGORICAL = ("van", "route")
START_TS = 1772439300.0  # 2026-03-02 08:15 UTC; the fleet keeps UTC as local time
VARIANTS = ("regression", "binary")
ALARM_C, ALARM_WINDOW, HORIZON = 8.0, 30, 15  # degC, minutes, minutes
MALFORMED_KINDS = {  # kind -> what is wrong with the line
    "feature_wrong_type": "load_kg is a list", "id_wrong_type": "id is a number",
    "infinity_literal": "target is Infinity (not JSON)", "invalid_utf8": "id is not UTF-8",
    "missing_features": "no features object", "nan_literal": "ambient_c is NaN (not JSON)",
    "not_an_object": "the event wrapped in an array", "oversize_line": "padded beyond 64 KiB",
    "target_wrong_type": 'target is "warm"', "truncated_json": "the line cut in half",
    "unknown_feature": "a feature outside NUMERIC + CATEGORICAL (probe_volts)"}
OVERSIZE_BYTES = 64 * 1024
_ROUTE_OF = (0,) * 10 + (1,) * 8 + (2,) * 6
_FAULTY_VANS = tuple(v for i, v in enumerate(VANS, 1) if i % 4)
_BURN_IN = 120  # rounds simulated before the first event so the AR states settle
_BLOCK = 256  # rounds of random numbers drawn at once
_NOISE_SD = 0.3


@dataclass(frozen=True)
class Regime:
    """Mean hold reading 15 minutes ahead as a linear function of one event's features."""

    intercept: float
    coefficients: Mapping[str, float]
    van_effects: Mapping[str, float]
    route_effects: Mapping[str, float]
    noise_sd: float = _NOISE_SD

    def mean(self, features: Mapping[str, object]) -> float:
        """Noise-free reading for ``features`` (an event's ``features`` dict)."""
        return (self.intercept + self.van_effects[features["van"]] + self.route_effects[
            features["route"]] + sum(c * float(features[n]) for n, c in self.coefficients.items()))


@dataclass(frozen=True)
class ScenarioTruth:
    """What the feed was made from. Indices count valid events from 0 in stream order.

    Events with index ``>= recalibration_index`` follow ``regimes[1]``; events in ``[fault_start,
    fault_stop)`` from a van in ``faulty_vans`` carry garbage targets.
    """

    n_events: int
    seed: int
    variant: str
    recalibration_index: int
    fault_start: int
    fault_stop: int
    faulty_vans: tuple[str, ...]
    regimes: tuple[Regime, Regime]

    def regime(self, index: int) -> Regime:
        """The regime that produced event ``index``."""
        return self.regimes[int(index >= self.recalibration_index)]

    def is_faulty(self, index: int, van: str) -> bool:
        """Whether event ``index`` from ``van`` went through the faulty gateway in the burst."""
        return self.fault_start <= index < self.fault_stop and van in self.faulty_vans


def ground_truth(n_events: int, *, seed: int = 7, variant: str = "regression",
                 recalibration_at: float = 0.55, fault_start: float = 0.30,
                 fault_share: float = 0.02) -> ScenarioTruth:
    """The ground truth of ``generate`` called with the same arguments."""
    if variant not in VARIANTS:
        raise ValueError(f"Invalid 'variant' {variant!r}. Valid values are: {', '.join(VARIANTS)}")
    if not isinstance(n_events, int) or n_events < 1:
        raise ValueError(f"'n_events' must be a positive integer, got {n_events!r}")
    shares = {"recalibration_at": recalibration_at, "fault_start": fault_start,
              "fault_share": fault_share, "fault_start + fault_share": fault_start + fault_share}
    for name, share in shares.items():
        if not 0.0 <= share <= 1.0:
            raise ValueError(f"'{name}' must lie in [0, 1], got {share!r}")
    lo = round(fault_start * n_events)
    effects = np.random.default_rng([seed, 3]).normal(0.0, 0.35, len(VANS))
    vans = dict(zip(VANS, np.round(effects, 2).tolist()))
    routes = dict(zip(ROUTES, (0.8, 0.0, -0.3)))
    coef = {"ambient_c": 0.14, "compressor_duty": -5.0, "door_open_s": 0.07, "load_kg": 0.0006}
    before = Regime(3.8, coef, vans, routes)
    after = Regime(5.3, {**coef, "compressor_duty": -7.0}, vans, routes)
    return ScenarioTruth(n_events, seed, variant, round(recalibration_at * n_events), lo,
                         min(n_events, lo + round(fault_share * n_events)), _FAULTY_VANS,
                         (before, after))


def _feature_rounds(seed: int) -> Iterator[tuple[int, np.ndarray, ...]]:
    """Endless rounds ``(k, ambient, duty, door, load, probe_noise)``, from ``k = -_BURN_IN``."""
    fixed, rng = np.random.default_rng([seed, 0]), np.random.default_rng([seed, 1])
    n, route = len(VANS), np.array(_ROUTE_OF)
    linehaul = route == 2
    health = fixed.normal(0.0, 0.05, n)  # compressor wear: some units work harder
    phase = fixed.integers(0, 360, n)  # defrost schedule offset, minutes
    # per route (urban, regional, linehaul): capacity kg, stop chance per minute, stop length
    # (minimum, spread) in minutes, door-open chance at a stop, kg unloaded, ambient offset degC
    capacity, stop_p, stop_lo, stop_span, door_p, drop, heat_island = (
        np.array(row)[route] for row in ((900.0, 1400.0, 2600.0), (1 / 10, 1 / 45, 1 / 400),
                                         (2, 3, 5), (5, 6, 8), (0.75, 0.7, 0.3),
                                         (8.0, 15.0, 60.0), (1.2, 0.0, -0.8)))
    load = capacity * fixed.uniform(0.5, 1.0, n)
    phi_w, sd_w, phi_l, sd_l, phi_d, sd_d = math.exp(-1 / 720), 3.5, 0.97, 0.8, 0.9, 0.08
    weather = fixed.normal(0.0, sd_w)
    local, duty_n = fixed.normal(0.0, sd_l, n), fixed.normal(0.0, sd_d, n)
    stop_left, k = np.zeros(n, dtype=np.int64), -_BURN_IN
    start_minute = int(START_TS // 60) % 1440
    while True:
        zw, z = rng.standard_normal(_BLOCK), rng.standard_normal((_BLOCK, 3, n))
        u = rng.random((_BLOCK, 6, n))
        for j in range(_BLOCK):
            minute = (start_minute + k) % 1440
            weather = phi_w * weather + sd_w * math.sqrt(1 - phi_w**2) * zw[j]
            local = phi_l * local + sd_l * math.sqrt(1 - phi_l**2) * z[j, 0]
            daily = 9.0 + 7.0 * math.sin(2 * math.pi * (minute / 60 - 9) / 24)
            ambient = np.round(daily + weather + heat_island + local, 1)
            working = 360 <= minute < 1200
            starts = (stop_left == 0) & (u[j, 0] < stop_p) & (working | linehaul)
            stop_left = np.where(starts, stop_lo + (u[j, 1] * stop_span).astype(np.int64),
                                 stop_left)
            door = np.where((stop_left > 0) & (u[j, 2] < door_p),
                            8 + (u[j, 3] * 53).astype(np.int64), 0)
            stop_left = np.maximum(stop_left - 1, 0)
            load = np.where(door > 0, np.maximum(load - drop * u[j, 4], 20.0), load)
            if minute in (300, 1020):  # depot reload at 05:00; linehaul also at 17:00
                again = linehaul | (minute == 300)
                load = np.where(again, capacity * (0.75 + 0.25 * u[j, 5]), load)
            duty_n = phi_d * duty_n + sd_d * math.sqrt(1 - phi_d**2) * z[j, 1]
            duty = np.clip(0.15 + 0.015 * ambient + 0.005 * door + health + duty_n, 0.03, 1.0)
            duty = np.round(np.where((minute + phase) % 360 < 12, 0.0, duty), 3)
            yield k, ambient, duty, door, np.rint(load).astype(np.int64), _NOISE_SD * z[j, 2]
            k += 1


def _readings(truth: ScenarioTruth) -> Iterator[tuple[int, np.ndarray, ...]]:
    """Feature rounds plus the probe reading of each van's event (before any gateway fault)."""
    offsets = np.arange(len(VANS))
    weights = [(np.array([r.intercept + r.van_effects[v] + r.route_effects[ROUTES[q]]
                          for v, q in zip(VANS, _ROUTE_OF)]),
                np.array([r.coefficients[name] for name in NUMERIC])) for r in truth.regimes]
    for k, ambient, duty, door, load, noise in _feature_rounds(truth.seed):
        x = np.stack([ambient, duty, door, load]).astype(np.float64)
        means = [base + w @ x for base, w in weights]
        later = k * len(VANS) + offsets >= truth.recalibration_index
        mean = np.where(later, means[1], means[0])
        yield k, ambient, duty, door, load, mean + noise


def generate(n_events: int, *, seed: int = 7, variant: str = "regression",
             recalibration_at: float = 0.55, fault_start: float = 0.30,
             fault_share: float = 0.02) -> Iterator[dict]:
    """Yield ``n_events`` valid events in stream order (see the module docstring).

    Parameters
    ----------
    n_events : int
        Events to yield; 24 per simulated minute, the last minute possibly partial.
    seed : int
        Seeds every random draw; the same arguments give the same events.
    variant : {"regression", "binary"}
        Target: the hold reading 15 minutes ahead, or 1 if it exceeds 8 degC within 30 minutes.
    recalibration_at, fault_start, fault_share : float
        Positions as shares of the stream; :func:`ground_truth` gives the resulting indices.
    """
    truth = ground_truth(n_events, seed=seed, variant=variant, recalibration_at=recalibration_at,
                         fault_start=fault_start, fault_share=fault_share)
    faulty, offsets = np.array([v in truth.faulty_vans for v in VANS]), np.arange(len(VANS))
    routes = [ROUTES[r] for r in _ROUTE_OF]
    # The reading of minute s + 15 is the regression target of the event at minute s, so the
    # alarm window t+1 .. t+30 of the event at t holds the readings of events t-14 .. t+15.
    window, pending = deque(maxlen=ALARM_WINDOW), deque()
    binary = variant == "binary"
    for k, ambient, duty, door, load, reading in _readings(truth):
        window.append(reading)
        pending.append((k, ambient, duty, door, load, reading))
        if binary and len(pending) <= HORIZON:
            continue
        k, ambient, duty, door, load, reading = pending.popleft()
        if k < 0:
            continue
        base = k * len(VANS)
        if base >= n_events:
            return
        target = ((np.max(window, axis=0) > ALARM_C).astype(np.int64) if binary
                  else np.round(reading, 2))
        hit = faulty & (base + offsets >= truth.fault_start) & (base + offsets < truth.fault_stop)
        if hit.any():
            garbage = np.ones_like(target) if binary else np.round(target * 1.8 + 32.0, 2)
            target = np.where(hit, garbage, target)
        ts, targets = START_TS + 60.0 * k, target.tolist()
        ambient, duty, door, load = ambient.tolist(), duty.tolist(), door.tolist(), load.tolist()
        for v, van in enumerate(VANS[: n_events - base]):
            yield {"id": f"{van}-{k:07d}", "ts": ts,
                   "features": {"ambient_c": ambient[v], "compressor_duty": duty[v],
                                "door_open_s": door[v], "load_kg": load[v], "van": van,
                                "route": routes[v]},
                   "target": targets[v]}


def _malformed(kind: str, event: dict, serial: int) -> bytes:
    """One broken line of ``kind`` made from ``event``, with an id no real event has."""
    bad = {**event, "id": f"{event['features']['van']}-bad{serial:06d}",
           "features": dict(event["features"])}
    if kind == "feature_wrong_type":
        bad["features"]["load_kg"] = [bad["features"]["load_kg"]]
    elif kind == "id_wrong_type":
        bad["id"] = serial
    elif kind == "missing_features":
        del bad["features"]
    elif kind == "target_wrong_type":
        bad["target"] = "warm"
    elif kind == "unknown_feature":
        bad["features"]["probe_volts"] = 3.3
    line = orjson.dumps([bad] if kind == "not_an_object" else bad)
    if kind == "truncated_json":
        return line[: len(line) // 2]
    if kind == "nan_literal":
        return re.sub(rb'"ambient_c":[^,}]+', b'"ambient_c":NaN', line, count=1)
    if kind == "infinity_literal":
        return re.sub(rb'"target":[^,}]+', b'"target":Infinity', line, count=1)
    if kind == "invalid_utf8":
        return line.replace(b"-bad", b"-\xff\xfebad", 1)
    if kind == "oversize_line":  # whitespace is valid JSON: only the size is wrong
        return b"{" + b" " * OVERSIZE_BYTES + line[1:]
    return line


def write_lines(path: str | Path, lines: Iterable[bytes], *, gzip: bool | None = None
                ) -> tuple[str, int]:
    """Write byte ``lines`` to ``path`` in bounded chunks; return (sha256 of content, count).

    Gzip when ``gzip``, or when None and the path ends with ``.gz``; the gzip header has no name
    and mtime 0, so equal content gives equal bytes.
    """
    compress = str(path).endswith(".gz") if gzip is None else gzip
    digest, count, lines = hashlib.sha256(), 0, iter(lines)
    with open(path, "wb") as raw, (gzip_module.GzipFile(
            filename="", mode="wb", fileobj=raw, mtime=0, compresslevel=9) if compress
            else nullcontext(raw)) as out:
        while chunk := list(islice(lines, 4096)):
            data = b"\n".join(chunk) + b"\n"
            count += len(chunk)
            digest.update(data)
            out.write(data)
    return digest.hexdigest(), count


def _manifest(truth: ScenarioTruth, fmt: str, path: str | Path, digest: str, lines: int) -> dict:
    faulty = sum(truth.is_faulty(i, VANS[i % len(VANS)])
                 for i in range(truth.fault_start, truth.fault_stop))
    return {"format": fmt, "path": str(path), "variant": truth.variant, "seed": truth.seed,
            "events": truth.n_events, "lines": lines, "sha256": digest,
            "recalibration_index": truth.recalibration_index,
            "fault": {"start": truth.fault_start, "stop": truth.fault_stop, "events": faulty,
                      "vans": list(truth.faulty_vans)}}


def write_ndjson(path: str | Path, n_events: int, *, seed: int = 7, variant: str = "regression",
                 recalibration_at: float = 0.55, fault_start: float = 0.30,
                 fault_share: float = 0.02, malformed_share: float = 0.003,
                 gzip: bool | None = None) -> dict:
    """Stream the feed to ``path`` as NDJSON (gzip for a ``.gz`` path), malformed lines mixed in.

    Returns a manifest: ``events``, ``lines``, ``sha256`` of the uncompressed content,
    ``malformed`` (kind -> 1-based line numbers), the ``fault`` burst and the
    ``recalibration_index`` (both in valid-event indices). Memory stays bounded.
    """
    kwargs = dict(seed=seed, variant=variant, recalibration_at=recalibration_at,
                  fault_start=fault_start, fault_share=fault_share)
    truth = ground_truth(n_events, **kwargs)
    bad: dict[str, list[int]] = {kind: [] for kind in MALFORMED_KINDS}

    def lines() -> Iterator[bytes]:
        picker, kinds, line_no = np.random.default_rng([seed, 2]), [], 0
        for i, event in enumerate(generate(n_events, **kwargs)):
            if i % _BLOCK == 0:
                draws = (picker.random(_BLOCK) < malformed_share).tolist()
            if draws[i % _BLOCK]:
                if not kinds:  # every kind once per cycle, in a seeded order
                    kinds = picker.permutation(list(MALFORMED_KINDS)).tolist()
                kind, line_no = kinds.pop(), line_no + 1
                bad[kind].append(line_no)
                yield _malformed(kind, event, line_no)
            line_no += 1
            yield orjson.dumps(event)

    digest, count = write_lines(path, lines(), gzip=gzip)
    return _manifest(truth, "ndjson", path, digest, count) | {
        "malformed": bad, "malformed_lines": sum(map(len, bad.values())), "kinds": MALFORMED_KINDS}


def write_csv(path: str | Path, n_events: int, *, seed: int = 7, variant: str = "regression",
              recalibration_at: float = 0.55, fault_start: float = 0.30,
              fault_share: float = 0.02, gzip: bool | None = None) -> dict:
    """Stream the feed to ``path`` as CSV: a header, then ``id, ts, <features>, target`` rows.

    No malformed lines; returns the :func:`write_ndjson` manifest without ``malformed``.
    """
    kwargs = dict(seed=seed, variant=variant, recalibration_at=recalibration_at,
                  fault_start=fault_start, fault_share=fault_share)

    def lines() -> Iterator[bytes]:
        yield ",".join(("id", "ts", *NUMERIC, *CATEGORICAL, "target")).encode()
        for e in generate(n_events, **kwargs):  # str of a float is its shortest round-trip form
            row = (e["id"], e["ts"], *map(e["features"].get, NUMERIC + CATEGORICAL), e["target"])
            yield ",".join(map(str, row)).encode()

    digest, count = write_lines(path, lines(), gzip=gzip)
    return _manifest(ground_truth(n_events, **kwargs), "csv", path, digest, count)
