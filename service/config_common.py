"""What a validated config does, whichever object holds it: the pydantic :class:`service.config.Config`
or the :class:`service.config_cache.CachedConfig` rebuilt from the cache of validated configs.

No pydantic here: ``trimtab replay`` loads a config it has validated before without importing it
(:mod:`service.config_cache`). :class:`ConfigError` lives here for the same reason (modules on the
replay path raise it); :mod:`service.config` re-exports it.
"""

from __future__ import annotations

import hashlib

import orjson

from models import InvalidSettings, ModelSpec

__all__ = ["LEARNING_SECTIONS", "ConfigError", "fingerprint", "model_spec_of", "publish_key_of"]

#: the config sections that decide learned state (the journal's fingerprint covers them)
LEARNING_SECTIONS = ("features", "model", "constraint", "steps", "averaging", "monitor")


class ConfigError(InvalidSettings):
    """The config file cannot be read or keys have invalid values.

    ``where`` and ``message`` describe the first problem; ``problems`` lists every one found, each a
    ``(where, message)`` pair, and ``str()`` shows them all, one per line.
    """

    def __init__(self, message: str, *, where: str = "", problems: list[tuple[str, str]] | None = None) -> None:
        super().__init__(message, where=where)
        self.problems = problems or [(where, message)]

    def __str__(self) -> str:
        return "\n".join(f"{w}: {m}" if w else m for w, m in self.problems)


def model_spec_of(config) -> ModelSpec:
    """The learning sections of ``config`` as a :class:`models.ModelSpec` (which checks them together)."""
    f, m, c, s, a = config.features, config.model, config.constraint, config.steps, config.averaging
    return ModelSpec(
        numeric=tuple(f.numeric), categorical=tuple(f.categorical), hash_bits=f.hash_bits,
        scaling=f.scaling, warmup_events=f.warmup_events, task=m.task, loss=m.loss,
        huber_delta=m.huber_delta, l2=m.l2, fit_intercept=m.fit_intercept, constraint=c.set,
        radius=c.radius, lower=c.lower, upper=c.upper, rule=s.rule, base=s.base, horizon=s.horizon,
        grad_bound=None if s.grad_bound == "auto" else float(s.grad_bound), averaging=a.scheme,
        halflife=a.halflife, kernel=m.kernel)


def publish_key_of(config) -> str:
    """The Redis hash of ``[publish]`` (its ``key``, or one named after the config)."""
    return (config.publish.key if config.publish is not None and config.publish.key
            else f"trimtab.{config.name}.model")


def fingerprint(config) -> str:
    """SHA-256 of the settings that decide learned state; a journal only continues under the same."""
    d = config.resolved()
    keep = {k: d[k] for k in LEARNING_SECTIONS}
    return hashlib.sha256(orjson.dumps(keep, option=orjson.OPT_SORT_KEYS)).hexdigest()
