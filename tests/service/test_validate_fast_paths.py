"""The validator's fast paths (a value of the common exact type taken as is) give the same event,
or the same rejection, as the per-rule checks they skip (``check_id``, ``parse_ts``, ``target``,
``_checked``, ``_categorical``), for any mix of values, including the edge ones."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from models import InvalidInput

from service.config import load_config
from service.events import INT64_MAX, Event, EventValidator, _checked, _number, check_id, parse_ts

from tests.service.servicekit import ROOT

edge_floats = st.sampled_from([0.0, -0.0, 1e100, -1e100, 1.0000000000000002e100, math.inf, -math.inf, math.nan,
                               1.5, 7.0])
numbers = st.one_of(st.floats(allow_nan=True, allow_infinity=True), edge_floats,
                    st.integers(min_value=-(1 << 70), max_value=1 << 70),
                    st.sampled_from([INT64_MAX, INT64_MAX + 1, -INT64_MAX - 1, -INT64_MAX - 2]))
values = st.one_of(numbers, st.booleans(), st.none(), st.text(max_size=40), st.lists(st.integers(), max_size=2))
ids = st.one_of(st.none(), st.text(max_size=12), st.text(min_size=250, max_size=260), st.integers())


def _reference(v: EventValidator, obj: dict) -> Event:
    """Every rule through its own check, in the validator's order (nothing skipped)."""
    ident = obj.get("id")
    if ident is not None:
        check_id(ident, "e.id")
    target = obj.get("target")
    if target is not None:
        target = v.target(target, "e.target")
        if ident is None:
            raise InvalidInput("required", where="e.id")
    ts = parse_ts(obj.get("ts"), "e.ts")
    clean = {}
    for name, x in obj["features"].items():
        where = f"e.features.{name}"
        if name in v.numeric:
            if x is None or x is True or x is False:
                clean[name] = None if x is None else float(x)
            elif isinstance(x, (int, float)):
                clean[name] = _checked(_number(x), where)
            else:
                raise InvalidInput("expected a number", where=where)
        elif name in v.categorical:
            clean[name] = v._categorical(x, where)
    return Event(ident, ts, clean, target)


@pytest.fixture(scope="module")
def validator():
    return EventValidator(load_config(ROOT / "replay_data" / "configs" / "guarded.toml"))


@settings(max_examples=400, deadline=None)
@given(ident=ids, ts=st.one_of(st.none(), numbers), target=st.one_of(st.none(), numbers, st.booleans()),
       ambient=values, load=values, van=values)
def test_fast_paths_agree_with_the_rules(validator, ident, ts, target, ambient, load, van):
    obj = {"features": {"ambient_c": ambient, "load_kg": load, "van": van}}
    for key, x in (("id", ident), ("ts", ts), ("target", target)):
        if x is not None:
            obj[key] = x
    try:
        want = _reference(validator, obj)
    except InvalidInput as exc:
        with pytest.raises(InvalidInput) as got:
            validator.validate(obj, "e")
        assert got.value.where == exc.where
        return
    got = validator.validate(obj, "e")
    assert repr(got) == repr(want)  # same values, same types, -0.0 kept apart from 0.0
