"""The engine: applies validated events to a model and its monitor, in order, deterministically.

The live service and ``trimtab replay`` run this same code; only the source of the events differs.
For each event, in order:

* an event without a target is scored only;
* a learning event whose id falls in the held-out share (a stable hash of the id, so replay and
  live agree) is scored and kept in the monitor's window, never learned;
* any other learning event is scored with the serving iterate (its loss is the *progressive loss*)
  and then learned;
* every ``check_every`` learned events the monitor checks and may roll back or restart.

Beside the model, the engine scores a baseline on the same events (the running mean of the target,
or the base rate; :mod:`service.baseline`), so every figure of the model's loss has one to compare with.

Because every step is deterministic, the same events in the same order under the same config give
a bit-identical state, however they are chunked.
"""

from __future__ import annotations

import hashlib
import math
from collections import deque
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import orjson

from models import LinearModel, Outcome, Rows
from models.binary_metrics import RunningBinaryMetrics, binary_metrics
from models.losses import overflowed

from service.baseline import Baseline
from service.events import Event, EventValidator
from service.idhash import HOLDOUT_PREFIX
from service.monitor.monitor import Monitor
from service.state_json import TraceJson, exact, record_json, unexact, untagged
from service.storage.checkpoint import CheckpointFormatError, read_sections, write_sections

if TYPE_CHECKING:
    from service.config import Config

__all__ = ["INCIDENTS_KEPT", "Applied", "Engine", "PreparedBatch", "STATE_COUNTERS", "holdout_fraction"]

_TWO64 = float(2**64)
#: most incidents a live engine's monitor keeps (the newest; a replay keeps all): the same cap as the
#: service's own incidents, so ``GET /v1/incidents`` shows as many of each
INCIDENTS_KEPT = 1000
_BASELINE_WORDS = {False: "the running mean of the target", True: "the base rate"}


#: BLAKE2b state after the prefix; copying it and adding the id gives ``stable_hash64("holdout\x1f" + id)``
#: byte for byte (a hash is the same however its input is split) at about 2/3 of the cost
_HOLDOUT_STATE = hashlib.blake2b(HOLDOUT_PREFIX, digest_size=8)


def holdout_fraction(event_id: str) -> float:
    """A number in [0, 1) fixed by the id: events below ``holdout_share`` are held out."""
    h = _HOLDOUT_STATE.copy()
    h.update(event_id.encode("utf-8", "surrogatepass"))
    return int.from_bytes(h.digest(), "little") / _TWO64


@dataclass
class PreparedBatch:
    """Events mapped to model coordinates, ready for :meth:`Engine.apply` (a pure function of the
    events and the config, so it can be built in another thread or process)."""

    ids: list
    ts: np.ndarray
    rows: Rows
    y: np.ndarray
    mode: np.ndarray  # 0 score only, 1 learn, 2 held out

    def __len__(self) -> int:
        return len(self.ids)


@dataclass
class Applied:
    """What :meth:`Engine.apply` did: per-event predictions and outcome codes, and counts."""

    outcome: Outcome
    first_event: int
    learned: int
    held_out: int
    scored: int
    refused: int
    actions: list


class Engine:
    """Owns a model and its monitor; the only code that changes learned state.

    Parameters
    ----------
    config
        The validated config.
    trace_limit
        How many check records to keep for plots and the dashboard (``None``: all, for replay).
    incidents_kept
        How many of its newest incidents the monitor keeps (``None``: all, for replay).
    """

    def __init__(self, config: Config, *, trace_limit: int | None = 10_000,
                 incidents_kept: int | None = INCIDENTS_KEPT) -> None:
        self.config = config
        self.model = LinearModel(config.model_spec())
        self.monitor = Monitor(config.monitor, self.model, incidents_kept) if config.monitor.enabled else None
        self.validator = EventValidator(config)
        self._share = config.monitor.holdout_share if config.monitor.enabled else 0.0
        self._check_every = config.monitor.check_every
        self._binary = config.model.task == "binary"
        self.events = 0
        self.learned = 0
        self.held_out = 0
        self.scored = 0
        self.refused = 0
        self.rejected = 0
        self._loss_sum = 0.0
        self._loss_n = 0
        self._since_check = 0
        self._seg_loss = 0.0
        self._seg_n = 0
        self._seg_base = 0.0
        self.nonfinite_losses = 0
        self._tally = RunningBinaryMetrics() if self._binary else None
        window = config.monitor.window if self._share > 0.0 else 0
        self.baseline = Baseline(config.model.loss, window, huber_delta=config.model.huber_delta)
        self.trace: deque = deque(maxlen=trace_limit)
        self._trace_json = TraceJson()  # each trace record serialized once, for every checkpoint

    # ---------------------------------------------------------------- serving
    @property
    def serving(self) -> str:
        """The iterate scores come from now."""
        if self.monitor is not None:
            return self.monitor.serving
        return "raw" if self.config.monitor.serve == "raw" else "averaged"

    @property
    def state_digest(self) -> str:
        return self.model.digest

    @property
    def progressive_loss(self) -> float | None:
        return self._loss_sum / self._loss_n if self._loss_n else None

    @property
    def baseline_loss(self) -> dict:
        """The baseline's ``{"progressive": x, "holdout": y}`` (``None`` where there are no events)."""
        return self.baseline.losses()

    def score(self, features: list[dict], iterate: str | None = None) -> tuple[np.ndarray, str]:
        """Predictions for feature dicts (validated upstream) and the iterate used."""
        it = iterate or self.serving
        return self.model.predict_rows(self.model.rows(features), it), it

    # ---------------------------------------------------------------- learning
    def prepare(self, events: list[Event]) -> PreparedBatch:
        """Map validated events to rows and decide each event's mode (no state changes)."""
        rows = self.model.rows([e.features for e in events])
        # a missing ts or target becomes NaN (numpy converts None so in a float array)
        ts = np.array([e.ts for e in events], dtype=np.float64)
        y = np.array([e.target for e in events], dtype=np.float64)
        share = self._share
        mode = np.array([0 if e.target is None else 2 if share > 0.0 and holdout_fraction(e.id) < share else 1
                         for e in events], dtype=np.int8)
        return PreparedBatch([e.id for e in events], ts, rows, y, mode)

    def apply_events(self, events: list[Event]) -> Applied:
        return self.apply(self.prepare(events))

    def apply(self, batch: PreparedBatch) -> Applied:
        """Apply a prepared batch in order; monitor checks fall at the same learned counts however
        the events are chunked."""
        n = len(batch)
        out = Outcome.empty(n)
        mode, y, rows = batch.mode, batch.y, batch.rows
        first = self.events
        actions = []
        self.baseline.update(y, mode)
        if self.monitor is not None:  # held-out events are never learned: the window takes them all now
            self.monitor.hold_out(rows, y, mode, first)
        i = 0
        while i < n:
            budget = self._check_every - self._since_check
            nxt = self.model.process(rows, y, mode, out, serve=self.serving, start=i, max_learn=budget)
            seg = slice(i, nxt)
            learn = mode[seg] == 1
            # a loss that overflowed (a feature of 1e300, a model that blew up) is counted, never summed:
            # one event must not turn a running figure into inf or NaN for the rest of the run
            losses = out.loss[seg][learn]
            finite = ~overflowed(losses)
            self._seg_loss += float(np.sum(losses[finite]))
            self._seg_n += int(np.count_nonzero(finite))
            self._since_check += int(np.count_nonzero(learn))
            self._seg_base += self.baseline.segment_loss(i, nxt)
            refused = int(np.count_nonzero(out.code[seg] == 2))
            if self.monitor is not None and refused:
                self.monitor.note_refused(refused)
            self.refused += refused
            i = nxt
            if self._since_check >= self._check_every:
                self._since_check = 0
                record = self._check(first + i - 1, batch.ts[i - 1])
                record["baseline_holdout"] = self.baseline.holdout_at(i)
                if record.get("action"):
                    actions.append(record)
        learned = int(np.count_nonzero(mode == 1))
        held = int(np.count_nonzero(mode == 2))
        self.events += n
        self.learned += learned
        self.held_out += held
        self.scored += n - learned - held
        lossed = out.loss[mode == 1]
        finite = ~overflowed(lossed)
        self._loss_sum += float(np.sum(lossed[finite]))
        self._loss_n += int(np.count_nonzero(finite))
        self.nonfinite_losses += len(lossed) - int(np.count_nonzero(finite))
        if self._tally is not None:
            pred, target = out.pred[mode == 1][finite], y[mode == 1][finite]
            self._tally.update(target, pred)
        return Applied(out, first, learned, held, n - learned - held, int(np.count_nonzero(out.code == 2)), actions)

    def _check(self, event: int, ts: float) -> dict:
        ts = None if np.isnan(ts) else float(ts)
        record = {"event": event}
        if self.monitor is not None:
            record = self.monitor.check(self.model, event, ts)
            restored = self.monitor.take_restored()
            if restored is not None:  # a rollback went back to the last trusted state
                self.model = restored
        else:
            record["serving"] = self.serving
        record["progressive_loss"] = self._seg_loss / self._seg_n if self._seg_n else None
        record["baseline_progressive"] = self._seg_base / self._seg_n if self._seg_n else None
        record["step"] = self.model.last_step
        record["step_scale"] = self.model.step_scale
        if "distance" not in record:  # the monitor's record has it already (an O(dim) pass)
            record["distance"] = self.model.distance()
        self._seg_loss = 0.0
        self._seg_n = 0
        self._seg_base = 0.0
        self.trace.append(record)
        return record

    def note_rejected(self, rejected: int, total: int, ts: float | None = None) -> None:
        """Count input rejected at the boundary (it never reached the model)."""
        self.rejected += rejected
        if self.monitor is not None:
            self.monitor.note_rejected(rejected, total, self.events, ts)

    def rollback(self, reason: str = "operator request") -> None:
        if self.monitor is not None:
            self.monitor.rollback(self.model, self.events, reason)
        else:
            self.model.rollback(self.config.monitor.rollback_shrink)

    # ---------------------------------------------------------------- reporting
    @property
    def incidents(self) -> list[dict]:
        return list(self.monitor.incidents) if self.monitor is not None else []

    def certificate(self) -> dict:
        """The model's certificate, saying from which event it applies when the monitor restarted."""
        return self.model.certificate(self.monitor.restarted_at if self.monitor is not None else None)

    def holdout_losses(self) -> dict:
        """Held-out loss of both iterates on the current window (``None`` without a monitor)."""
        if self.monitor is None:
            return {"raw": None, "averaged": None}
        return self.monitor.holdout_losses(self.model)

    def divergence(self) -> str | None:
        """Why the model blew up, or ``None``: a weight norm that is not finite or above
        :data:`DIVERGED_NORM`, a loss (held-out of the serving iterate; progressive without a held-out
        window) that is not finite or above :data:`DIVERGED_FACTOR` times the baseline's on the same
        events, or losses that overflowed on more than :data:`DIVERGED_OVERFLOW_SHARE` of the learned
        events."""
        norms = {it: self.model.norm(it) for it in ("raw", "averaged")}
        if any(not (math.isfinite(v) and v <= DIVERGED_NORM) for v in norms.values()):
            return (f"the weights blew up (norm of the raw iterate {norms['raw']:.3g}, of the averaged "
                    f"{norms['averaged']:.3g})")
        # the held-out figure says how the model does now; the progressive one (the whole run, early
        # events included) stands in only without a held-out window, as for :attr:`warnings`
        where, loss, base = "held-out", self.holdout_losses().get(self.serving), self.baseline.holdout_loss()
        if loss is None:
            where, loss, base = "progressive", self.progressive_loss, self.baseline.progressive_loss
        if loss is not None and not math.isfinite(loss):
            return f"the {where} loss is not finite ({loss})"
        if loss is not None and base is not None and base > 0 and loss > DIVERGED_FACTOR * base:
            return (f"the {where} loss blew up: {loss:.4g}, {loss / base:.3g} times the baseline's "
                    f"{base:.4g} on the same events")
        count = self.nonfinite_losses
        if count >= 10 and count > DIVERGED_OVERFLOW_SHARE * max(self.learned, 1):
            return f"the loss overflowed on {count:,} of {self.learned:,} learned events"
        return None

    def binary_metrics(self) -> dict | None:
        """Accuracy at 0.5, ROC AUC, Brier score, log loss and base rate (:mod:`models.binary_metrics`) of
        the serving iterate: ``progressive`` over the learned events (each scored before it was learned),
        ``holdout`` on the monitor's held-out window now; ``None`` for a regression."""
        if self._tally is None:
            return None
        held = None
        if self.monitor is not None and len(self.monitor.window):
            rows, y, _ = self.monitor.window.view()
            p = self.model.predict_rows(rows, self.serving)
            ok = np.isfinite(p)
            held = binary_metrics(y[ok], p[ok]).to_dict()
        return {"iterate": self.serving, "progressive": self._tally.result().to_dict(), "holdout": held}

    @property
    def warnings(self) -> list[str]:
        """Plain-words warnings for the model card and the report: the monitor's own (its ``warnings``,
        when it has any), then a model that does no better than the baseline: on the held-out window
        when there is one (the current models), else over the progressive losses of the whole run; and
        learned events whose loss overflowed (left out of the running figures)."""
        out = list(getattr(self.monitor, "warnings", None) or [])
        model, base = self.holdout_losses().get(self.serving), self.baseline.holdout_loss()
        where = "on the held-out window"
        if model is None or base is None:
            model, base = self.progressive_loss, self.baseline.progressive_loss
            where = "over the run's progressive losses"
        if model is not None and base is not None and not model < base:
            out.append(f"the model's loss {where} ({model:.4g}) is not below the baseline's ({base:.4g}, "
                       f"{_BASELINE_WORDS[self._binary]}): it does no better than a constant prediction")
        if self.nonfinite_losses:
            out.append(f"the loss of {self.nonfinite_losses:,} learned event(s) overflowed and is left out of the "
                       "progressive figures (nonfinite_losses)")
        return out

    def counters(self) -> dict:
        return {"events": self.events, "learned": self.learned, "held_out": self.held_out, "scored": self.scored,
                "refused": self.refused, "rejected": self.rejected, "nonfinite_losses": self.nonfinite_losses,
                "progressive_loss": self.progressive_loss,
                "baseline_progressive_loss": self.baseline.progressive_loss}

    # ---------------------------------------------------------------- state
    def to_bytes(self, *, position: int | None = None, trace: bool = True) -> bytes:
        """The engine as a checkpoint (:mod:`service.storage.checkpoint`, no pickle): the model
        snapshot, the monitor's own bytes, counters and trace as JSON; ``position`` is the journal
        position it was taken at (recorded in the ``meta`` section). :meth:`from_bytes` restores an
        engine that continues identically. Without ``trace`` the trace section is empty (the service
        stores its records beside the checkpoints, :meth:`trace_rows`)."""
        sections = {
            "meta": orjson.dumps({"state": "engine", "position": position, "counters": list(STATE_COUNTERS),
                                  "monitor": self.monitor is not None}),
            "model": self.model.to_bytes(),
            "counters": orjson.dumps({k: exact(getattr(self, k)) for k in STATE_COUNTERS}),
            "baseline": orjson.dumps({k: [exact(x) for x in v] if isinstance(v, list) else exact(v)
                                      for k, v in self.baseline.state().items()}),
            "trace": self._trace_json(self.trace) if trace else b"[]",
            "metrics": orjson.dumps({"binary": _tally_state(self._tally)}),
        }
        if self.monitor is not None:
            sections["monitor"] = self.monitor.to_bytes()
        return write_sections(sections)

    def trace_rows(self, after: int) -> list[tuple[int, bytes]]:
        """The check records made after event ``after``, oldest first, each as ``(event, its exact JSON)``:
        what a checkpoint without its trace leaves to be stored beside it."""
        rows = []
        for r in reversed(self.trace):
            if r["event"] <= after:
                break
            rows.append((r["event"], record_json(r)))
        return rows[::-1]

    def load_trace(self, records: list[bytes]) -> None:
        """Append stored check records (:meth:`trace_rows`' JSON, oldest first): a service checkpoint's
        engine starts with an empty trace and gets its records back this way."""
        self.trace.extend(untagged(orjson.loads(r)) for r in records)

    @classmethod
    def from_bytes(cls, config: Config, blob: bytes, *, trace_limit: int | None = 10_000) -> Engine:
        """An engine from :meth:`to_bytes`; :class:`CheckpointFormatError` (with the reason) for
        anything else, including a checkpoint of another format version or layout."""
        parts = read_sections(blob, _SECTIONS, frozenset({"monitor"}))
        meta = orjson.loads(parts["meta"])
        counters = orjson.loads(parts["counters"])
        if meta.get("state") != "engine" or list(counters) != list(STATE_COUNTERS):
            raise CheckpointFormatError(f"checkpoint counters {sorted(counters)} are not this version's "
                                        f"{sorted(STATE_COUNTERS)}")
        engine = cls(config, trace_limit=trace_limit)
        if ("monitor" in parts) != (engine.monitor is not None):
            raise CheckpointFormatError("checkpoint and config disagree on whether a monitor runs")
        engine.model = LinearModel.from_bytes(parts["model"])
        if engine.monitor is not None:
            engine.monitor.load_bytes(parts["monitor"])
        for k, v in counters.items():
            setattr(engine, k, unexact(v))
        engine.baseline.load_state({k: [unexact(x) for x in v] if isinstance(v, list) else unexact(v)
                                    for k, v in orjson.loads(parts["baseline"]).items()})
        engine.trace.extend(untagged(r) for r in orjson.loads(parts["trace"]))
        binary = orjson.loads(parts["metrics"])["binary"]
        if (binary is None) != (engine._tally is None):
            raise CheckpointFormatError("checkpoint and config disagree on whether the task is binary")
        if binary is not None:
            engine._tally.load_state({k: unexact(v) for k, v in binary.items()})
        return engine

    @staticmethod
    def checkpoint_position(blob: bytes) -> int | None:
        """The journal position recorded in a checkpoint's ``meta`` section (``None``: not recorded)."""
        return orjson.loads(read_sections(blob, _SECTIONS, frozenset({"monitor"}))["meta"]).get("position")


#: a weight norm above this (in scaled coordinates) has blown up; common practice, no published
#: source: far above any model of targets in sensible units, far below where squares overflow
DIVERGED_NORM = 1e100
#: a loss this many times the baseline's (a constant prediction) on the same events has blown up;
#: common practice, no published source
DIVERGED_FACTOR = 1e3
#: overflowing losses on more than this share of the learned events mean a blown-up model, not a few
#: absurd feature values; common practice, no published source
DIVERGED_OVERFLOW_SHARE = 0.01

#: engine attributes a checkpoint holds; changing this tuple changes the state: bump FORMAT_VERSION
STATE_COUNTERS = ("events", "learned", "held_out", "scored", "refused", "rejected", "_loss_sum", "_loss_n",
                  "_since_check", "_seg_loss", "_seg_n", "_seg_base", "nonfinite_losses")
#: the sections every engine checkpoint has (``monitor`` besides, when a monitor runs)
_SECTIONS = frozenset({"meta", "model", "counters", "baseline", "trace", "metrics"})


def _tally_state(tally: RunningBinaryMetrics | None) -> dict | None:
    return None if tally is None else {k: exact(v) for k, v in tally.state().items()}
