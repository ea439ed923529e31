"""The TOML config file, validated by pydantic; unknown keys are an error that names the key.

Every key is described in docs/config.md (``tests/service/test_docs.py`` fails on a key without its row).

``load_config(path)`` reads a file, ``parse_config(text)`` a string; both raise
:class:`ConfigError` whose ``where`` is the dotted key (``steps.rule``) and whose message names the
valid values. ``Config.model_spec()`` turns the learning sections into a :class:`models.ModelSpec`.
"""

from __future__ import annotations

import math
import os
import tomllib
from pathlib import Path
from typing import Literal

# pydantic looks for plugins in the entry points of every installed distribution when it builds its
# first validator (tens of milliseconds of each start); trimtab's config uses none. A value the user
# set is kept.
os.environ.setdefault("PYDANTIC_DISABLE_PLUGINS", "__all__")

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator  # noqa: E402

from models import InvalidSettings, ModelSpec  # noqa: E402

from service.config_common import ConfigError, model_spec_of, publish_key_of  # noqa: E402

__all__ = ["Config", "ConfigError", "load_config", "parse_config"]


class _Section(BaseModel):
    # strict: a string is never read as a number, nor a number as a boolean (``window = "500"`` and
    # ``base = true`` are errors); an integer is still a valid float (``radius = 20``).
    # defer_build: each section's validator is built when a config is first validated, not when this
    # module is imported (the sections' defaults are factories for the same reason): a third less of
    # the config's share of a start, the same checks
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True, defer_build=True)


#: names an event uses for itself (docs/events.md); a feature may not take one
RESERVED_NAMES = frozenset(("id", "ts", "target", "features"))


class FeaturesConfig(_Section):
    numeric: list[str] = []
    categorical: list[str] = []
    hash_bits: int = Field(12, ge=1, le=24)
    scaling: Literal["none", "warmup"] = "warmup"
    warmup_events: int = Field(500, ge=2)
    #: what the boundary does with a feature that is not declared
    unknown: Literal["reject", "ignore"] = "reject"
    #: longest categorical string value, in bytes of UTF-8; a longer one is rejected with the
    #: feature's name (the value is hashed, so a long one carries no more signal, only cost)
    max_value_bytes: int = Field(256, ge=1, le=65_536)

    @field_validator("numeric", "categorical")
    @classmethod
    def _names(cls, names: list[str]) -> list[str]:
        for name in names:
            if name in RESERVED_NAMES:
                raise ValueError(f"{name!r} is a reserved name (an event's own {', '.join(sorted(RESERVED_NAMES))}); "
                                 "rename the feature")
            if not name or not name.isprintable() or len(name.encode()) > 256:
                raise ValueError(f"feature name {name!r} must be 1-256 bytes of printable text")
        return names


class ModelConfig(_Section):
    task: Literal["regression", "binary"] = "regression"
    loss: Literal["squared", "huber", "logistic"] = "squared"
    l2: float = Field(0.0, ge=0.0)
    huber_delta: float = Field(1.0, gt=0.0)
    fit_intercept: bool = True
    kernel: Literal["lazy", "dense"] = "lazy"


class ConstraintConfig(_Section):
    set: Literal["ball", "box", "none"] = "ball"
    radius: float = Field(20.0, gt=0.0)
    lower: float = -1.0
    upper: float = 1.0


class StepsConfig(_Section):
    rule: Literal["constant", "sqrt_decay", "horizon", "anytime", "strongly_convex"] = "anytime"
    base: float = Field(0.05, gt=0.0)
    horizon: int = Field(100_000, ge=1)
    grad_bound: float | Literal["auto"] = "auto"

    @field_validator("grad_bound")
    @classmethod
    def _positive(cls, v):
        if v != "auto" and not (math.isfinite(v) and v > 0):
            raise ValueError("must be a number > 0 or \"auto\"")
        return v


class AveragingConfig(_Section):
    scheme: Literal["uniform", "weighted", "exponential"] = "uniform"
    halflife: float = Field(5000.0, gt=0.0)


class MonitorConfig(_Section):
    """``[monitor]``: the rules these keys tune are stated in ``service/monitor/monitor.py``'s docstring."""

    enabled: bool = True
    #: share of learning events held out (by a stable hash of the id), never learned
    holdout_share: float = Field(0.05, ge=0.0, lt=1.0)
    #: newest held-out events kept and scored at every check
    window: int = Field(2000, ge=10)
    check_every: int = Field(250, ge=1)
    #: raw iterate worse than the averaged one by more than this share (plus its noise allowance) ...
    rollback_margin: float = Field(0.10, ge=0.0)
    #: ... on this many checks in a row -> roll back
    rollback_patience: int = Field(3, ge=1)
    #: whether the monitor may roll back (false: it still scores the held-out window and reports)
    rollback: bool = True
    #: a rollback multiplies later steps by this factor
    rollback_shrink: float = Field(0.5, gt=0.0, le=1.0)
    #: the raw iterate's expected excess loss eta * G**2 / 4 times this is not counted as "worse";
    #: on the tests' clean feeds (several noise levels, losses, step rules) the excess never stayed
    #: above 1.4 times it for 3 checks in a row, nor above 5 times it on one check
    noise_allowance: float = Field(4.0, ge=0.0)
    #: usable held-out events needed before the loss rule is judged (about 2,000 events at 5%);
    #: the other rollback triggers apply from the first check
    min_holdout: int = Field(100, ge=10)
    #: events whose loss under both iterates exceeds this many window medians are left out of the
    #: window losses (garbage targets); with Gaussian noise 50 medians is about 4.8 standard deviations
    absurd_factor: float = Field(50.0, gt=1.0)
    #: the model is copied after every this many healthy checks in a row; a rollback restores the
    #: newest copy (the average absorbs a burst's updates at once; the copy predates them)
    snapshot_every: int = Field(8, ge=1)
    #: raw iterate farther than this many constraint radii (or averaged norms) from the average -> rollback
    divergence_radii: float = Field(1.0, gt=0.0)
    drift: Literal["page_hinkley", "adwin", "off"] = "page_hinkley"
    #: the detector reads, per new held-out event, 1 if its averaged-iterate loss exceeds the median of
    #: the older window events, else 0 (a fair coin while nothing changes). Page-Hinkley's threshold
    #: (lambda), in those events ...
    drift_threshold: float = Field(10.0, gt=0.0)
    #: ... its tolerated rise of the mean (delta), ...
    drift_delta: float = Field(0.05, ge=0.0)
    #: ... and the events it reads before it may fire (replaces ``drift_min_checks``: the detector
    #: now reads events, not one share per check)
    drift_min_events: int = Field(30, ge=1)
    #: ADWIN's confidence parameter (river's default), on the same 0/1 events
    adwin_delta: float = Field(0.002, gt=0.0, lt=1.0)
    #: checks after an alarm within which fresh held-out events must confirm it, else it is dismissed
    drift_confirm: int = Field(8, ge=1)
    #: level of the one-sided sign test that the averaged iterate got worse on the fresh events
    drift_level: float = Field(0.001, gt=0.0, lt=0.5)
    #: the boundary rule: the raw iterate on the constraint's boundary at this share of ...
    boundary_share: float = Field(0.8, gt=0.0, le=1.0)
    #: ... the last this many checks -> an incident and a warning that the radius may be too small
    boundary_checks: int = Field(20, ge=1)
    serve: Literal["averaged", "raw", "better"] = "averaged"
    #: share of rejected events among the last `reject_window` events that is an incident
    reject_burst_share: float = Field(0.2, gt=0.0, le=1.0)
    reject_window: int = Field(500, ge=10)


class ServiceConfig(_Section):
    host: str = "127.0.0.1"
    port: int = Field(8470, ge=0, le=65535)
    data_dir: str = "trimtab-data"
    checkpoint_every: int = Field(10_000, ge=1)
    #: at least this long between two periodic checkpoints: a fast feed would otherwise write several a
    #: second (each about 0.5 MB: the model, the baseline, the monitor's window and trusted copy)
    checkpoint_min_interval_s: float = Field(2.0, ge=0.0)
    checkpoints_kept: int = Field(3, ge=1)
    #: "token": every route that changes state (events, labels, remember on score, operator actions)
    #: needs ``Authorization: Bearer <token>`` with the token from the variable named by ``token_env``,
    #: and ``trimtab serve`` refuses to start (exit 2) while that variable is unset or empty;
    #: "none": writes are open to anyone who reaches the port (a warning at start and on the model card)
    auth: Literal["token", "none"] = "token"
    token_env: str = "TRIMTAB_TOKEN"
    #: whether reads (score, model card, metrics) also need the token when one is configured
    token_for_reads: bool = False
    queue_limit: int = Field(200_000, ge=1)
    #: largest body of /v1/events and /v1/labels (after Content-Encoding is undone)
    max_body_bytes: int = Field(16 * 1024 * 1024, ge=1024)
    #: largest body of /v1/score and the operator routes (scoring needs no token: keep it small)
    max_score_bytes: int = Field(1024 * 1024, ge=1024)
    #: request body bytes held at once over all requests; past it a request gets 503 and Retry-After
    #: before its body is read (chunked or compressed bodies count at their route's limit). A claim
    #: lasts until the answer, i.e. until its events are learned; parsed and queued, events take about
    #: 12 times their NDJSON size (measured), so memory stays near the idle size plus 12 times this
    max_inflight_bytes: int = Field(24 * 1024 * 1024, ge=1024)
    #: open connections; a new one past it closes the oldest connection that has no request in
    #: progress, or is answered 503 when every connection is busy
    max_connections: int = Field(512, ge=1)
    #: seconds from opening a connection to its first complete request head (else 408, closed)
    header_timeout_s: float = Field(10.0, gt=0.0)
    #: seconds to receive a whole request body once its head is in (else 408, closed)
    body_timeout_s: float = Field(30.0, gt=0.0)
    #: seconds an idle connection is kept between requests
    keepalive_timeout_s: float = Field(15.0, gt=0.0)
    #: longest request line and longest header field, and the most header fields in one request (431/400)
    max_header_bytes: int = Field(8190, ge=256, le=65536)
    max_headers: int = Field(64, ge=8, le=1024)
    max_batch: int = Field(20_000, ge=1)
    max_line_bytes: int = Field(64 * 1024, ge=256)
    remember_ttl_s: float = Field(3600.0, gt=0.0)
    remember_limit: int = Field(100_000, ge=1)
    #: SQLite ``synchronous`` for the journal: "full" fsyncs every commit (an acknowledged event
    #: survives power loss); "normal" survives a process crash but not an OS crash or power loss
    journal_sync: Literal["full", "normal"] = "full"
    #: events the learner applies per hold of the engine lock (a score waits at most one slice)
    apply_slice: int = Field(512, ge=1)
    #: events committed to the journal in one transaction at most
    chunk_events: int = Field(20_000, ge=1)
    #: delete journal rows covered by the oldest kept checkpoint; false keeps the whole history
    #: (an audit trail, or a re-replay under another config)
    prune_journal: bool = True
    #: scorer processes that answer /v1/score beside the learner behind the one address ("auto": one
    #: per CPU core but one, at least 1); 0 runs everything in one process (docs/architecture.md)
    scorers: int | str = "auto"
    #: the learner publishes its serving model for the scorers after every applied slice, but at most
    #: once per this many milliseconds (0: after every slice); a held-back state follows within it
    publish_every_ms: float = Field(0.0, ge=0.0, le=60_000.0)
    #: Linux scheduling policy of the learner's threads when scorer processes run (they also run at
    #: nice +5): "auto" (SCHED_IDLE while the learner keeps up, SCHED_BATCH while it falls behind),
    #: "batch" (SCHED_BATCH: never preempts a scorer, longer slices), "idle" (SCHED_IDLE: runs only on
    #: a core no scorer wants; ingest may stall on a saturated machine), "normal" (the nice value
    #: alone); see docs/architecture.md, "Priorities"
    learner_policy: Literal["auto", "batch", "idle", "normal"] = "auto"

    @field_validator("scorers", mode="before")
    @classmethod
    def _scorers(cls, v):
        if v == "auto" or (isinstance(v, int) and not isinstance(v, bool) and 0 <= v <= 256):
            return v
        raise ValueError(f'expected "auto" or a whole number of processes from 0 to 256, got {v!r}')


class FeedConfig(_Section):
    source: str = "redis://127.0.0.1:6379/0"
    stream: str = "trimtab.events"
    group: str = "trimtab"
    consumer: str = "learner-1"
    #: the entry field that holds one event as JSON
    field: str = "event"
    #: entries read (and acknowledged) per batch
    batch: int = Field(500, ge=1, le=100_000)
    #: how long one read waits for new entries
    block_ms: int = Field(1000, ge=1)
    #: stream that receives rejected entries with the reason (default: "<stream>.rejected")
    dead_letter: str | None = None
    dead_letter_maxlen: int = Field(100_000, ge=1)
    #: at start, entries another consumer of the group has held unacknowledged this long are taken
    #: over (the consumer is presumed dead; its entries would otherwise stay pending for ever)
    claim_idle_ms: int = Field(60_000, ge=0)
    #: an entry delivered more often than this without being learned goes to the dead-letter stream
    max_deliveries: int = Field(10, ge=1)
    #: after a lost connection the wait before the next attempt doubles from 0.1 s up to this
    reconnect_max_s: float = Field(5.0, gt=0, le=300)

    @field_validator("source")
    @classmethod
    def _redis_url(cls, v: str) -> str:
        if not v.startswith(("redis://", "rediss://", "unix://")):
            raise ValueError("must be a redis:// (or rediss://, unix://) URL")
        return v


class PublishConfig(_Section):
    """Publication of the serving model to Redis, for scorers on other machines (``--role scorer``)."""

    #: the Redis server the learner publishes to and remote scorers read from
    source: str = "redis://127.0.0.1:6379/0"
    #: the hash that holds the newest model (default: "trimtab.<name>.model")
    key: str | None = None
    #: a remote scorer's /readyz answers 503 once its model has not been published or confirmed by
    #: the learner for this long (a learner with nothing new confirms about every second)
    max_model_age_s: float = Field(30.0, gt=0, le=86_400)
    #: a remote scorer checks the hash at least this often (a publication notice wakes it sooner)
    poll_ms: int = Field(100, ge=1, le=60_000)
    #: after a lost connection the wait before the next attempt doubles from 0.1 s up to this
    reconnect_max_s: float = Field(5.0, gt=0, le=300)

    _redis_url = field_validator("source")(FeedConfig._redis_url.__func__)


class Config(_Section):
    name: str = Field("model", pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
    features: FeaturesConfig = Field(default_factory=FeaturesConfig)
    model: ModelConfig = Field(default_factory=ModelConfig)
    constraint: ConstraintConfig = Field(default_factory=ConstraintConfig)
    steps: StepsConfig = Field(default_factory=StepsConfig)
    averaging: AveragingConfig = Field(default_factory=AveragingConfig)
    monitor: MonitorConfig = Field(default_factory=MonitorConfig)
    service: ServiceConfig = Field(default_factory=ServiceConfig)
    feed: FeedConfig | None = None
    publish: PublishConfig | None = None

    @model_validator(mode="after")
    def _learnable(self):
        if not (self.features.numeric or self.features.categorical):
            raise InvalidSettings("no features declared: list them in [features] numeric = [...] and/or "
                                  "categorical = [...]", where="features")
        self.model_spec()  # raises InvalidSettings naming the key
        return self

    def model_spec(self) -> ModelSpec:
        return model_spec_of(self)

    def publish_key(self) -> str:
        """The Redis hash of ``[publish]`` (its ``key``, or one named after the config)."""
        return publish_key_of(self)

    def resolved(self) -> dict:
        """Every setting with defaults filled in, as plain data."""
        return self.model_dump(mode="json")


def parse_config(text: str, source: str = "<config>") -> Config:
    """Parse and validate TOML text."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", where=source) from None
    return config_from_dict(data, source)


def config_from_dict(data: dict, source: str = "<config>") -> Config:
    """Validate parsed TOML; every problem found is reported at once (:class:`ConfigError`)."""
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        problems: dict[str, str] = {}
        for err in exc.errors():
            where, msg = _describe(err, source)
            if where in problems:  # a union (grad_bound) reports each of its members: one line is enough
                continue
            problems[where] = msg
        pairs = list(problems.items())
        raise ConfigError(pairs[0][1], where=pairs[0][0], problems=pairs) from None
    except InvalidSettings as exc:
        raise ConfigError(exc.message, where=exc.where) from None


def _describe(err: dict, source: str) -> tuple[str, str]:
    """One pydantic error as (dotted key, message naming the valid values)."""
    if "ctx" in err and isinstance(err["ctx"].get("error"), InvalidSettings):
        inner = err["ctx"]["error"]
        return inner.where, inner.message
    loc = [str(p) for p in err["loc"] if not (p == "float" or str(p).startswith("literal["))]
    where = ".".join(loc) or source
    kind, got = err["type"], err.get("input")
    if kind == "extra_forbidden":
        return where, "unknown key"
    if where == "steps.grad_bound":
        return where, f'must be a number > 0 or "auto", got {got!r}'
    if kind == "literal_error":
        return where, f"invalid value {got!r}; " + err["msg"].replace("Input should be", "valid values are")
    if kind.endswith("_type") and not isinstance(got, dict):
        wanted = {"int_type": "an integer", "float_type": "a number", "bool_type": "true or false",
                  "string_type": "a string", "list_type": "a list"}.get(kind, err["msg"])
        return where, f"expected {wanted}, got {type(got).__name__} {got!r}"
    msg = err["msg"].removeprefix("Value error, ")
    return where, msg


def load_config(path: str | Path) -> Config:
    """Read and validate a config file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read config: {exc.strerror}", where=str(p)) from None
    return parse_config(text, source=str(p))
