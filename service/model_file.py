"""The model file: ``model.json``, everything needed to score an event without trimtab.

A replay writes one per run (``DIR/<name>/model.json``). It holds both iterates twice: in the
features' own units (``raw`` and ``averaged``: intercept, one coefficient per numeric feature, one
per categorical value seen) and in the model's scaled coordinates (``scaled``: the intercept, the
numeric coefficients and every hash bucket), with the warm-up scaling's means and deviations, the
bucket layout and its hash, the config's name and fingerprint, the file's and trimtab's versions,
the state digest and the events seen. ``docs/model-file.md`` describes every field and scores one
event by hand with numpy; a test runs that example and compares it with the service's score.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from service.config_common import fingerprint
from service.version import trimtab_version

if TYPE_CHECKING:
    from service.config import Config

__all__ = ["MODEL_FILE_VERSION", "model_file"]

#: 1: name, state_digest, serving, raw, averaged; 2: self-contained (scaling, buckets, scaled
#: coordinates, metadata); the fields of version 1 keep their meaning
MODEL_FILE_VERSION = 2

_HASH = ("BLAKE2b with an 8-byte digest of the UTF-8 text '<feature>\\x1f<value>', read as a little-endian "
         "unsigned 64-bit integer h: column first_column + (h mod 2**hash_bits), sign -1 if h >= 2**63 else +1")

#: carried in the file: the numbers are decision support, not a certified instrument
CAUTION = ("Decision support only. Where food or medicine temperatures, credit or safety are at stake, keep the "
           "regulated instruments and procedures and follow local regulations and licensed practice.")


def model_file(engine, config: Config) -> dict:
    """The content of ``model.json`` for ``engine`` (a :class:`service.engine.Engine`) under ``config``."""
    model = engine.model
    spec = model.spec
    n = len(spec.numeric)
    mean, std = model.scaling
    seen: dict[str, dict[str, list]] = {name: {} for name in spec.categorical}
    for (name, text), (column, sign) in model.mapper.known_values().items():
        seen[name][text] = [int(column), float(sign)]

    def scaled(iterate: str) -> dict:
        w, b = model.weights(iterate)
        return {"intercept": b, "numeric": w[:n].tolist(), "buckets": w[n:].tolist()}

    return {
        "format": "trimtab-model", "version": MODEL_FILE_VERSION, "trimtab_version": trimtab_version(),
        "name": config.name, "config_fingerprint": fingerprint(config), "state_digest": engine.state_digest,
        "events_seen": engine.events, "learned": engine.learned, "updates": model.n_updates,
        "task": spec.task, "loss": spec.loss, "link": "logistic" if spec.task == "binary" else "identity",
        "fit_intercept": spec.fit_intercept, "serving": engine.serving,
        "scaling": {"mode": spec.scaling, "frozen": model.scaling_frozen, "names": list(spec.numeric),
                    "mean": mean.tolist(), "std": std.tolist()},
        "buckets": {"features": list(spec.categorical), "hash_bits": spec.hash_bits, "first_column": n,
                    "count": (1 << spec.hash_bits) if spec.categorical else 0, "hash": _HASH, "values_seen": seen},
        "scaled": {"raw": scaled("raw"), "averaged": scaled("averaged")},
        "raw": model.coefficients("raw"), "averaged": model.coefficients("averaged"),
        "caution": CAUTION,
    }
