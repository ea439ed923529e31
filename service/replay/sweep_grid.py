"""The grid of a config sweep: ``--vary KEY=V1,V2`` options turned into validated, named configs.

``--vary steps.rule=anytime,sqrt_decay --vary monitor.window=500,2000`` derives the cartesian
product of the varied values from a base config (2 x 2 = 4 configs here). Every key must be a
dotted key of the config file (``section.key``); every value is read as a TOML value (``500`` an
integer, ``0.05`` a float, ``true`` a boolean, anything that is not a TOML value a string), and
every derived config goes through the same validation as a config file. Nothing runs before the
whole grid is valid: a bad key or value raises :class:`~service.config.ConfigError` whose
``where`` is ``--vary KEY`` and whose message names the allowed keys or values.

Each run is named from its varied values, ``rule-sqrt_decay.window-500``: the last part of each
key, a dash, the value; the pairs joined by dots. The name is the run's folder in the sweep's
output and the ``name`` of its config.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import re
import tomllib
import types
import typing
from dataclasses import dataclass

import annotated_types
from pydantic import BaseModel

from service.config import Config, ConfigError, config_from_dict

__all__ = ["GridRun", "allowed", "build_grid", "parse_vary", "to_toml"]

_NAME_LIMIT = 64  # the config's ``name`` pattern allows 64 characters
_UNSAFE = re.compile(r"[^A-Za-z0-9_.-]+")


@dataclass(frozen=True)
class GridRun:
    """One config of the grid: its run name, its varied values and the validated config."""

    name: str
    varied: dict
    config: Config

    def data(self) -> dict:
        """The config as plain data (what a worker validates again and runs)."""
        return _plain(self.config)


def _plain(config: Config) -> dict:
    data = config.resolved()
    return {k: v for k, v in data.items() if v is not None}


def _value(text: str):
    """A TOML value when the text is one (``500``, ``0.05``, ``true``, ``"x y"``), else the text."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def parse_vary(options: list[str]) -> list[tuple[str, list]]:
    """``["KEY=V1,V2", ...]`` as ``[(KEY, [v1, v2]), ...]``; malformed options raise ``ConfigError``.

    >>> parse_vary(["steps.rule=anytime,sqrt_decay", "monitor.window=500,2000"])
    [('steps.rule', ['anytime', 'sqrt_decay']), ('monitor.window', [500, 2000])]
    """
    axes: list[tuple[str, list]] = []
    for option in options:
        key, sep, rest = option.partition("=")
        key = key.strip()
        if not sep or not key or not rest.strip():
            raise ConfigError(f"expected KEY=V1,V2,... (a dotted config key and its values), got {option!r}",
                              where="--vary")
        where = f"--vary {key}"
        if any(key == k for k, _ in axes):
            raise ConfigError("the key is varied twice; give all its values in one --vary", where=where)
        values = [_value(t.strip()) for t in rest.split(",")]
        if any(t.strip() == "" for t in rest.split(",")):
            raise ConfigError(f"an empty value in {rest!r}", where=where)
        seen = [json.dumps(v) for v in values]
        if len(set(seen)) != len(seen):
            raise ConfigError(f"a value is given twice in {rest!r}", where=where)
        axes.append((key, values))
    return axes


def _section_model(annotation):
    """The pydantic section behind a field annotation (``FeedConfig | None`` -> ``FeedConfig``)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    if isinstance(annotation, types.UnionType) or typing.get_origin(annotation) is typing.Union:
        for arg in typing.get_args(annotation):
            if isinstance(arg, type) and issubclass(arg, BaseModel):
                return arg
    return None


def _field(key: str):
    """The pydantic field of a dotted key; ``ConfigError`` naming the valid keys when there is none."""
    where = f"--vary {key}"
    parts = key.split(".")
    if parts == ["name"]:
        raise ConfigError("the name is not varied: each run is named from its varied values", where=where)
    model, field = Config, None
    for depth, part in enumerate(parts):
        fields = model.model_fields if model is not None else {}
        if part not in fields:
            scope = ".".join(parts[:depth]) or "the config"
            valid = ", ".join(sorted(k for k in fields if k != "name"))
            raise ConfigError(f"unknown key; valid keys of {scope} are: {valid}", where=where)
        field = fields[part]
        model = _section_model(field.annotation)
    if model is not None:
        valid = ", ".join(f"{key}.{k}" for k in sorted(model.model_fields))
        raise ConfigError(f"{key} is a section; vary one of its keys: {valid}", where=where)
    return field


def allowed(field) -> str:
    """The values a config field accepts, in words (``'constant', 'anytime'``; ``an integer >= 10``)."""
    annotation = field.annotation
    literals = [a for a in _flatten(annotation) if typing.get_origin(a) is typing.Literal]
    words = []
    for lit in literals:
        words.extend(json.dumps(v) for v in typing.get_args(lit))
    kinds = [a for a in _flatten(annotation) if a in (int, float, bool, str)]
    bounds = []
    for meta in field.metadata:
        for attr, sign in (("ge", ">="), ("gt", ">"), ("le", "<="), ("lt", "<")):
            if isinstance(meta, getattr(annotated_types, attr.capitalize())):
                bounds.append(f"{sign} {getattr(meta, attr)}")
    for kind in kinds:
        noun = {int: "an integer", float: "a number", bool: "true or false", str: "a string"}[kind]
        words.append(" ".join([noun] + ([" and ".join(bounds)] if bounds and kind in (int, float) else [])))
    if typing.get_origin(annotation) is list:
        words.append("a list (not variable in a sweep)")
    return ", ".join(words) or "see the config reference"


def _flatten(annotation) -> list:
    if isinstance(annotation, types.UnionType) or typing.get_origin(annotation) is typing.Union:
        return [x for a in typing.get_args(annotation) for x in _flatten(a)]
    return [annotation]


def _set(data: dict, key: str, value) -> dict:
    out = json.loads(json.dumps(data))  # a deep copy of plain data
    node = out
    parts = key.split(".")
    for part in parts[:-1]:
        node = node.setdefault(part, {})
    node[parts[-1]] = value
    return out


def _text(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return _UNSAFE.sub("-", str(value)).strip("-") or "x"


def _names(axes: list[tuple[str, list]], combos: list[tuple]) -> list[str]:
    last = [k.rsplit(".", 1)[-1] for k, _ in axes]
    labels = [lab if last.count(lab) == 1 else k.replace(".", "-") for lab, (k, _) in zip(last, axes)]
    names = []
    for combo in combos:
        name = ".".join(f"{lab}-{_text(v)}" for lab, v in zip(labels, combo))
        if len(name) > _NAME_LIMIT:
            tag = hashlib.sha256(name.encode()).hexdigest()[:8]
            name = name[:_NAME_LIMIT - 9].rstrip(".-_") + "-" + tag
        names.append(name)
    return names


def build_grid(base: Config, options: list[str]) -> list[GridRun]:
    """Every config of the grid, validated and named; ``ConfigError`` before anything runs.

    Each varied value is first checked alone on the base (so the error names its key and what the
    key accepts); then every combination is validated whole (settings that constrain each other).
    """
    axes = parse_vary(options)
    if not axes:
        raise ConfigError("give at least one --vary KEY=V1,V2,...", where="--vary")
    data = _plain(base)
    for key, values in axes:
        field = _field(key)
        for value in values:
            try:
                config_from_dict(_set(data, key, value))
            except ConfigError as exc:
                raise ConfigError(f"value {value!r} refused ({exc.message}); allowed values: {allowed(field)}",
                                  where=f"--vary {key}") from None
    combos = list(itertools.product(*(values for _, values in axes)))
    names = _names(axes, combos)
    if len(set(names)) != len(names):
        raise ConfigError("two values give the same run name; use values that differ in letters or digits",
                          where="--vary")
    runs = []
    for name, combo in zip(names, combos):
        derived = data
        for (key, _), value in zip(axes, combo):
            derived = _set(derived, key, value)
        derived["name"] = name
        try:
            config = config_from_dict(derived)
        except ConfigError as exc:
            varied = ", ".join(f"{k}={v!r}" for (k, _), v in zip(axes, combo))
            raise ConfigError(f"the combination {varied} is refused: {exc.message} ({exc.where})",
                              where="--vary") from None
        runs.append(GridRun(name, {k: v for (k, _), v in zip(axes, combo)}, config))
    return runs


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)  # JSON string escapes are TOML basic-string escapes
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"no TOML form for {value!r}")


def to_toml(config: Config, header: str = "") -> str:
    """The config as a TOML file that :func:`service.config.load_config` reads back to an equal config."""
    data = _plain(config)
    lines = [f"# {line}" for line in header.splitlines()]
    lines += [f"{k} = {_toml_value(v)}" for k, v in data.items() if not isinstance(v, dict)]
    for section, values in data.items():
        if isinstance(values, dict):
            lines += ["", f"[{section}]"]
            lines += [f"{k} = {_toml_value(v)}" for k, v in values.items() if v is not None]
    return "\n".join(lines) + "\n"
