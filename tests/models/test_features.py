"""Feature mapping: missing values, booleans, categorical numbers, unknown features, hash collisions,
warm-up scaling statistics and coefficients in the features' own units.

The hash buckets are recomputed here with Python's ``hashlib`` (BLAKE2b, 8-byte digest read
little-endian, as ``models/features.py`` documents: the signed hashing trick of Weinberger, Dasgupta,
Langford, Smola and Attenberg, 2009, "Feature hashing for large scale multitask learning"); the
warm-up statistics are checked against numpy and scikit-learn's ``StandardScaler``.
"""

from __future__ import annotations

import hashlib
import itertools

import numpy as np
import pytest
from sklearn.preprocessing import StandardScaler

import models

NUMERIC = ("ambient_c", "door_open_s", "load_kg")


def bucket(name: str, text: str, n_numeric: int, hash_bits: int) -> tuple[int, float]:
    """Coordinate and sign of a categorical value, computed without the project's code."""
    h = int.from_bytes(hashlib.blake2b(f"{name}\x1f{text}".encode(), digest_size=8).digest(), "little")
    return n_numeric + (h & ((1 << hash_bits) - 1)), (-1.0 if h >> 63 else 1.0)


def _entries(model, event) -> dict[int, float]:
    rows = model.rows([event])
    assert len(rows) == 1
    return dict(zip(rows.indices.tolist(), rows.values.tolist()))


def _trained(seed=0, hash_bits=6, task="regression", scaling="warmup", n=600):
    rng = np.random.default_rng(seed)
    loss = "logistic" if task == "binary" else "squared"
    model = models.LinearModel(numeric=NUMERIC, categorical=("van", "route"), hash_bits=hash_bits, scaling=scaling,
                               warmup_events=100, task=task, loss=loss, l2=0.01, constraint="ball", radius=30.0)
    events = [{"ambient_c": float(rng.normal(12, 6)), "door_open_s": int(rng.integers(0, 120)),
               "load_kg": int(rng.integers(100, 900)), "van": f"V{int(rng.integers(1, 25)):02d}",
               "route": ("urban", "regional", "linehaul")[int(rng.integers(3))]} for _ in range(n)]
    margin = np.array([0.14 * e["ambient_c"] + 0.07 * e["door_open_s"] + 0.0006 * e["load_kg"] - 6.0 for e in events])
    y = (margin > 0).astype(float) if task == "binary" else margin + 9.8 + rng.normal(size=n) * 0.3
    model.learn_many(events, y)
    return model, events


# ------------------------------------------------------------------------------------ mapping

def test_missing_numeric_contributes_nothing_and_is_imputed_at_the_warmup_mean():
    """Absent and None numeric values map to no entry; with warm-up scaling that scores the mean."""
    model, events = _trained()
    assert _entries(model, {"ambient_c": None, "van": None}) == {} == _entries(model, {})
    mean, _ = model.scaling
    full = dict(events[0])
    for j, name in enumerate(NUMERIC):
        gone = {k: v for k, v in full.items() if k != name}
        at_mean = dict(full, **{name: float(mean[j])})
        for iterate in models.ITERATES:
            assert model.score_one(gone, iterate) == pytest.approx(model.score_one(at_mean, iterate), abs=1e-12)
            assert model.score_one(dict(full, **{name: None}), iterate) == model.score_one(gone, iterate)


def test_booleans_are_numbers_or_words():
    """True/False count 1/0 for numeric features and "true"/"false" for categorical ones."""
    model = models.LinearModel(numeric=NUMERIC, categorical=("van", "door_alarm"), hash_bits=8, scaling="none")
    assert _entries(model, {"door_open_s": True}) == _entries(model, {"door_open_s": 1.0}) == {1: 1.0}
    assert _entries(model, {"door_open_s": False}) == {1: 0.0}
    for flag, word in ((True, "true"), (False, "false")):
        assert _entries(model, {"door_alarm": flag}) == _entries(model, {"door_alarm": word})
        j, sign = bucket("door_alarm", word, len(NUMERIC), 8)
        assert _entries(model, {"door_alarm": flag}) == {j: sign}


def test_categorical_numbers_use_their_text():
    """"7", 7 and 7.0 are one value; 7.5 is "7.5"; the text "7.0" is another value."""
    model = models.LinearModel(numeric=NUMERIC, categorical=("bay",), hash_bits=12, scaling="none")
    seven = _entries(model, {"bay": "7"})
    assert seven == _entries(model, {"bay": 7}) == _entries(model, {"bay": 7.0})
    assert seven == dict([bucket("bay", "7", 3, 12)])
    assert _entries(model, {"bay": 7.5}) == _entries(model, {"bay": "7.5"}) == dict([bucket("bay", "7.5", 3, 12)])
    assert _entries(model, {"bay": "7.0"}) == dict([bucket("bay", "7.0", 3, 12)]) != seven


def test_unknown_features_are_ignored():
    model, events = _trained()
    extra = dict(events[3], tyre_bar=2.4, driver="K. Obi", ambient_f=70.0)
    assert _entries(model, extra) == _entries(model, events[3])
    assert model.score_one(extra) == model.score_one(events[3])


def test_buckets_are_signed_blake2b():
    """Every bucket the mapper assigns equals the independent computation (sign from the top bit)."""
    mapper = models.FeatureMapper(NUMERIC, ("van", "route"), hash_bits=10)
    signs = set()
    for name, k in itertools.product(("van", "route"), range(200)):
        text = f"V{k:02d}"
        assert mapper.bucket(name, text) == bucket(name, text, 3, 10)
        signs.add(mapper.bucket(name, text)[1])
    assert signs == {-1.0, 1.0}


def test_rows_mapped_without_remembering_are_the_same_and_keep_nothing():
    """Scoring maps with ``remember=False``: the same rows, bit for bit, as the independent hash for
    values seen before and never seen, and the values seen are not grown (nor their coefficients)."""
    model, _ = _trained(hash_bits=8)
    seen = model.mapper.known_values()
    known = [{"ambient_c": 3.0, "van": text} for (name, text) in list(seen)[:20] if name == "van"]
    fresh = [{"ambient_c": 3.0, "van": f"never-seen-{k}", "route": f"R-{k}" * (k % 5 + 1)} for k in range(500)]
    for events in (known, fresh):
        quiet, loud = model.rows(events, remember=False), model.clone().rows(events)
        assert quiet.indices.tolist() == loud.indices.tolist() and quiet.values.tolist() == loud.values.tolist()
        assert model.predict_rows(quiet).tolist() == model.predict_rows(loud).tolist()
    for e in fresh[:50]:  # never-seen values land in the independently computed signed buckets
        rows = model.rows([e], remember=False)
        expected = {0: 3.0}
        for name in ("van", "route"):
            j, sign = bucket(name, e[name], 3, 8)
            expected[j] = expected.get(j, 0.0) + sign
        assert dict(zip(rows.indices.tolist(), rows.values.tolist())) == expected
    assert model.mapper.known_values() == seen
    assert set(model.coefficients()["categorical"]["van"]) == {t for (n, t) in seen if n == "van"}


def _collisions(hash_bits):
    """Pairs (van value, route value) that share a bucket, one with equal and one with opposite signs."""
    found = {}
    for a, b in itertools.product(range(64), range(64)):
        (ja, sa), (jb, sb) = bucket("van", f"V{a}", 1, hash_bits), bucket("route", f"R{b}", 1, hash_bits)
        if ja == jb:
            found.setdefault(sa == sb, (f"V{a}", f"R{b}", ja, sa + sb))
        if len(found) == 2:
            return found
    raise AssertionError("no collisions found")


def test_collisions_in_one_event_are_summed():
    """Two categorical values of one event in the same bucket give one entry holding the sum of signs."""
    model = models.LinearModel(numeric=("ambient_c",), categorical=("van", "route"), hash_bits=3, scaling="none",
                               rule="constant", base=0.1, constraint="none")
    for same_sign, (van, route, j, total) in _collisions(3).items():
        entries = _entries(model, {"ambient_c": 1.5, "van": van, "route": route})
        assert entries == {0: 1.5, j: total}
        assert abs(total) == (2.0 if same_sign else 0.0)
    model.learn_many([{"ambient_c": float(i % 5), "van": f"V{i % 7}", "route": f"R{i % 3}"} for i in range(50)],
                     [float(i % 4) for i in range(50)])
    w, b = model.weights("raw")
    for van, route, j, total in _collisions(3).values():
        event = {"ambient_c": 1.5, "van": van, "route": route}
        assert model.score_one(event, "raw") == pytest.approx(b + 1.5 * w[0] + total * w[j], abs=1e-12)


def test_nonfinite_feature_names_the_event_and_feature():
    mapper = models.FeatureMapper(NUMERIC, (), hash_bits=4)
    with pytest.raises(models.NonFiniteInput) as err:
        mapper.map([{"ambient_c": 1.0}, {"load_kg": float("nan")}], where="events")
    assert err.value.where == "events[1].features.load_kg"


# ------------------------------------------------------------------------------ warm-up scaling

def test_warmup_statistics_equal_numpy_and_sklearn():
    """Mean and std (ddof=0) over the first warmup_events *learning* events, missing values left out.

    Events scored only (mode 0) or held out (mode 2) do not count. A constant feature gets std 1,
    which is also what scikit-learn's ``StandardScaler`` does with a zero variance.
    """
    warmup = 37
    rng = np.random.default_rng(5)
    model = models.LinearModel(numeric=NUMERIC + ("setpoint_c",), categorical=("van",), hash_bits=4,
                               warmup_events=warmup)
    n = 120
    x = np.column_stack([rng.normal(12, 6, n), rng.integers(0, 120, n).astype(float), rng.normal(500, 200, n),
                         np.full(n, 4.0)])
    x[rng.random((n, 4)) < 0.2] = np.nan
    events = [{name: (None if np.isnan(v) else float(v)) for name, v in zip(model.spec.numeric, row)} | {"van": "V01"}
              for row in x]
    mode = rng.choice(np.array([0, 1, 2], np.int8), size=n, p=[0.2, 0.6, 0.2])
    learning = np.flatnonzero(mode == 1)
    last = learning[warmup - 1]
    rows = model.rows(events)
    y = rng.normal(size=n)
    out = models.Outcome.empty(n)
    model.process(rows, y, mode, out, stop=int(last))
    assert not model.scaling_frozen
    mean, std = model.scaling
    assert np.all(mean == 0.0) and np.all(std == 1.0)
    model.process(rows, y, mode, out, start=int(last))
    assert model.scaling_frozen
    first = x[learning[:warmup]]
    mean, std = model.scaling
    ref_std = np.nanstd(first, axis=0, ddof=0)
    ref_std[ref_std == 0.0] = 1.0
    np.testing.assert_allclose(mean, np.nanmean(first, axis=0), rtol=1e-12)
    np.testing.assert_allclose(std, ref_std, rtol=1e-12)
    scaler = StandardScaler().fit(first)
    np.testing.assert_allclose(mean, scaler.mean_, rtol=1e-12)
    np.testing.assert_allclose(std, scaler.scale_, rtol=1e-12)
    assert std[3] == 1.0
    assert model.n_updates + model.refused == int(np.count_nonzero(mode == 1))


# ---------------------------------------------------------------------------- coefficients

@pytest.mark.parametrize("task", ["regression", "binary"])
@pytest.mark.parametrize("hash_bits", [3, 10])
def test_coefficients_reproduce_predictions(task, hash_bits):
    """intercept + sum coef * x_raw + the categorical values' coefficients is the model's margin.

    With ``hash_bits=3`` values share buckets, and their coefficients share the bucket's weight. A
    missing numeric feature is scored at its warm-up mean, so it adds ``coef * mean``.
    """
    model, events = _trained(seed=2, hash_bits=hash_bits, task=task)
    mean, _ = model.scaling
    for iterate in models.ITERATES:
        coef = model.coefficients(iterate)
        assert coef["iterate"] == iterate
        probes = [dict(e) for e in events[-25:]]
        probes[0]["load_kg"] = None
        margins = model.score_rows(model.rows(probes), iterate)
        for event, margin in zip(probes, margins):
            total = coef["intercept"]
            for j, name in enumerate(NUMERIC):
                x = event.get(name)
                total += coef["numeric"][name] * (float(mean[j]) if x is None else x)
            for name in ("van", "route"):
                total += coef["categorical"][name][event[name]]
            assert total == pytest.approx(margin, rel=1e-9, abs=1e-9)
            if task == "regression":
                assert model.score_one(event, iterate) == margin
        assert len(coef["categorical"]["van"]) == 24 and len(coef["categorical"]["route"]) == 3
