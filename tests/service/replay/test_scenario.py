"""The invented cold-chain demo feed and the open-data feeds: format, determinism, ground truth.

The learnability checks use scikit-learn's ``LinearRegression`` as the outside reference: if an
ordinary least-squares fit with one-hot van and route effects recovers the stated truth, a linear
online learner has something real to learn, and the recalibration is a real change.
"""

from __future__ import annotations

import csv
import doctest
import gzip
import hashlib
import io
import json
import math
import re
import tomllib
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import orjson
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import LinearRegression
from sklearn.preprocessing import OneHotEncoder

from service.replay import open_feeds, scenario

REPLAY_DATA = Path(__file__).resolve().parents[3] / "replay_data"
SCHEMA = {"ambient_c": float, "compressor_duty": float, "door_open_s": int, "load_kg": int,
          "van": str, "route": str}
SYNTAX_KINDS = {"truncated_json", "nan_literal", "infinity_literal", "invalid_utf8"}
N_LEARN = 48_000  # 2000 simulated minutes: enough for stable least-squares fits


def assert_valid_event(obj: object, variant: str) -> None:
    """The section-3 event rules, checked independently of the generator's code."""
    assert isinstance(obj, dict) and set(obj) == {"id", "ts", "features", "target"}
    assert isinstance(obj["id"], str)
    assert isinstance(obj["ts"], float) and math.isfinite(obj["ts"])
    features = obj["features"]
    assert isinstance(features, dict) and set(features) == set(SCHEMA)
    for name, kind in SCHEMA.items():
        assert type(features[name]) is kind, (name, features[name])
        if kind is float:
            assert math.isfinite(features[name])
    if variant == "binary":
        assert obj["target"] in (0, 1) and type(obj["target"]) is int
    else:
        assert type(obj["target"]) is float and math.isfinite(obj["target"])


def read_lines(path: Path) -> list[bytes]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rb") as f:
        return f.read().split(b"\n")[:-1]


def content_sha256(path: Path) -> str:
    with gzip.open(path, "rb") as f:
        return hashlib.sha256(f.read()).hexdigest()


@pytest.fixture(scope="module")
def learn_events() -> tuple[list[dict], scenario.ScenarioTruth]:
    return list(scenario.generate(N_LEARN)), scenario.ground_truth(N_LEARN)


def design(events: list[dict], encoder: OneHotEncoder) -> np.ndarray:
    numeric = np.array([[e["features"][n] for n in scenario.NUMERIC] for e in events], float)
    cats = encoder.transform([[e["features"]["van"], e["features"]["route"]] for e in events])
    return np.hstack([numeric, cats])


def clean_regimes(events, truth):
    """Events of each regime that did not go through the faulty gateway, in stream order."""
    clean = [(i, e) for i, e in enumerate(events) if not truth.is_faulty(i, e["features"]["van"])]
    first = [e for i, e in clean if i < truth.recalibration_index]
    second = [e for i, e in clean if i >= truth.recalibration_index]
    return first, second


def test_same_arguments_give_identical_bytes(tmp_path):
    """Same seed, same gzip bytes; another seed, another feed."""
    paths = [tmp_path / "a.ndjson.gz", tmp_path / "b.ndjson.gz", tmp_path / "c.ndjson.gz"]
    made = [scenario.write_ndjson(p, 6000, seed=s) for p, s in zip(paths, (3, 3, 4))]
    assert paths[0].read_bytes() == paths[1].read_bytes()
    assert made[0] == {**made[1], "path": str(paths[0])}
    assert content_sha256(paths[0]) == made[0]["sha256"] != made[2]["sha256"]
    assert paths[0].read_bytes() != paths[2].read_bytes()


def test_ids_order_and_clock():
    events = list(scenario.generate(24 * 50 + 7))
    ids = [e["id"] for e in events]
    assert len(set(ids)) == len(ids) == 24 * 50 + 7
    for i, e in enumerate(events):
        van = scenario.VANS[i % 24]
        assert e["features"]["van"] == van and e["id"] == f"{van}-{i // 24:07d}"
        assert e["ts"] == scenario.START_TS + 60.0 * (i // 24)
        assert_valid_event(e, "regression")
    assert {e["features"]["route"] for e in events} == set(scenario.ROUTES)
    door = np.array([e["features"]["door_open_s"] for e in events])
    assert 0.0 < np.mean(door > 0) < 0.3  # mostly closed, with bursts at stops


def test_manifest_matches_file(tmp_path):
    """Every line the manifest calls malformed breaks the rule its kind names; the rest are valid."""
    path = tmp_path / "feed.ndjson"
    n = 20_000
    made = scenario.write_ndjson(path, n, seed=11, malformed_share=0.01, gzip=False)
    lines = read_lines(path)
    kind_of = {no: kind for kind, nos in made["malformed"].items() for no in nos}
    assert set(made["malformed"]) == set(scenario.MALFORMED_KINDS)
    assert all(made["malformed"].values()), "every kind appears at 1% of 20,000 lines"
    assert made["lines"] == len(lines) == n + len(kind_of) == n + made["malformed_lines"]
    valid = []
    for no, line in enumerate(lines, start=1):
        kind = kind_of.get(no)
        if kind is None:
            assert len(line) < scenario.OVERSIZE_BYTES
            valid.append(orjson.loads(line))
            assert_valid_event(valid[-1], "regression")
        elif kind in SYNTAX_KINDS:
            with pytest.raises(orjson.JSONDecodeError):
                orjson.loads(line)
            if kind == "invalid_utf8":
                with pytest.raises(UnicodeDecodeError):
                    line.decode("utf-8")
            elif kind != "truncated_json":  # Python's lenient parser shows the bad value
                obj = json.loads(line)
                bad = obj["features"]["ambient_c"] if kind == "nan_literal" else obj["target"]
                assert not math.isfinite(bad)
        else:
            obj = orjson.loads(line)
            if kind == "oversize_line":
                assert len(line) > 64 * 1024
                assert_valid_event(obj, "regression")
            elif kind == "not_an_object":
                assert isinstance(obj, list)
            elif kind == "missing_features":
                assert "features" not in obj and "target" in obj
            elif kind == "target_wrong_type":
                assert isinstance(obj["target"], str)
            elif kind == "id_wrong_type":
                assert isinstance(obj["id"], int)
            elif kind == "feature_wrong_type":
                assert any(isinstance(v, list) for v in obj["features"].values())
            else:
                assert set(obj["features"]) - set(SCHEMA)
    assert valid == list(scenario.generate(n, seed=11))
    assert hashlib.sha256(path.read_bytes()).hexdigest() == made["sha256"]


def test_csv_has_the_same_events(tmp_path):
    path = tmp_path / "feed.csv.gz"
    made = scenario.write_csv(path, 3000, variant="binary")
    with gzip.open(path, "rt", newline="") as f:
        rows = list(csv.DictReader(f))
    assert made["lines"] == len(rows) + 1 and made["sha256"] == content_sha256(path)
    assert list(rows[0]) == ["id", "ts", *scenario.NUMERIC, *scenario.CATEGORICAL, "target"]
    for row, event in zip(rows, scenario.generate(3000, variant="binary"), strict=True):
        assert row["id"] == event["id"] and float(row["ts"]) == event["ts"]
        assert int(row["target"]) == event["target"]
        for name, kind in SCHEMA.items():
            assert kind(row[name]) == event["features"][name]


def test_shipped_files_are_reproduced(tmp_path):
    """`python3 -m service.replay.open_feeds --out DIR` rebuilds every shipped feed, byte for byte."""
    with redirect_stdout(io.StringIO()) as out:
        assert open_feeds.main(["--out", str(tmp_path)]) == 0
    summary = {m["feed"]: m for m in json.loads(out.getvalue())}
    assert set(summary) == {"coldchain-demo", "coldchain-demo-binary", *open_feeds.FEEDS}
    for name, made in summary.items():
        shipped = REPLAY_DATA / f"{name}.ndjson.gz"
        assert content_sha256(shipped) == content_sha256(tmp_path / shipped.name) == made["sha256"]
    assert (REPLAY_DATA / "coldchain-demo.ndjson.gz").stat().st_size < 5_000_000
    assert (REPLAY_DATA / "coldchain-demo-binary.ndjson.gz").stat().st_size < 2_000_000


def test_each_regime_is_learnable_and_the_recalibration_is_real(learn_events):
    """scikit-learn least squares recovers each regime's stated truth; the old fit fails later."""
    events, truth = learn_events
    first, second = clean_regimes(events, truth)
    encoder = OneHotEncoder(sparse_output=False).fit(
        [[e["features"]["van"], e["features"]["route"]] for e in events])
    fits, tests = [], []
    for regime, part in zip(truth.regimes, (first, second)):
        cut = int(0.7 * len(part))  # fit on the earlier 70%, score on the later 30%
        x, y = design(part, encoder), np.array([e["target"] for e in part])
        model = LinearRegression().fit(x[:cut], y[:cut])
        assert model.score(x[cut:], y[cut:]) > 0.8
        for j, name in enumerate(scenario.NUMERIC):
            assert model.coef_[j] == pytest.approx(regime.coefficients[name],
                                                   rel=0.1, abs=2e-4), name
        fits.append(model)
        tests.append((x[cut:], y[cut:]))
    x2, y2 = tests[1]
    own = np.mean((fits[1].predict(x2) - y2) ** 2)
    stale = np.mean((fits[0].predict(x2) - y2) ** 2)
    assert own == pytest.approx(truth.regimes[1].noise_sd ** 2, rel=0.3)
    assert stale > 3 * own


def test_fault_burst_is_far_from_the_truth(learn_events):
    """Garbage targets sit far from the stated truth; every other target is truth plus noise."""
    events, truth = learn_events
    hit = [i for i, e in enumerate(events) if truth.is_faulty(i, e["features"]["van"])]
    assert hit[0] >= truth.fault_start and hit[-1] < truth.fault_stop
    assert truth.fault_stop - truth.fault_start == round(0.02 * N_LEARN)
    assert 0.6 < len(hit) / (truth.fault_stop - truth.fault_start) < 0.9  # most vans
    errors = np.array([events[i]["target"] - truth.regime(i).mean(events[i]["features"])
                       for i in range(len(events))])
    faulty = np.zeros(len(events), bool)
    faulty[hit] = True
    assert np.all(np.abs(errors[faulty]) > 20.0)
    assert np.all(np.abs(errors[~faulty]) < 6 * truth.regimes[0].noise_sd)
    assert np.std(errors[~faulty]) == pytest.approx(truth.regimes[0].noise_sd, rel=0.05)


def test_binary_labels_follow_the_readings():
    """The alarm label is 1 exactly when a reading of the next 30 minutes exceeds 8 degC."""
    n = 24 * 1440
    labels = np.array([e["target"] for e in scenario.generate(n, variant="binary")])
    readings = np.array([e["target"] for e in scenario.generate(n)]).reshape(-1, 24)
    truth = scenario.ground_truth(n, variant="binary")
    for regime in (slice(0, truth.recalibration_index), slice(truth.recalibration_index, n)):
        assert 0.03 < labels[regime].mean() < 0.25
    faulty = np.array([truth.is_faulty(i, scenario.VANS[i % 24]) for i in range(n)])
    assert np.all(labels[faulty] == 1)
    by_minute, inner = labels.reshape(-1, 24), range(14, len(readings) - 15)
    # readings of events t-14 .. t+15 are the hold at minutes t+1 .. t+30
    expected = np.array([(readings[t - 14:t + 16] > 8.0).any(axis=0) for t in inner])
    clean = ~faulty.reshape(-1, 24)
    # a reading within rounding (0.005 degC) of the threshold cannot be judged from the file
    judged = np.array([clean[t - 14:t + 16].all(axis=0)
                       & ~(np.abs(readings[t - 14:t + 16] - 8.0) <= 0.006).any(axis=0)
                       for t in inner])
    assert judged.mean() > 0.9
    np.testing.assert_array_equal(by_minute[14:len(readings) - 15][judged], expected[judged])


def test_doctests_hold():
    for module in (scenario, open_feeds):
        result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
        assert result.attempted > 0 and result.failed == 0


def test_bad_arguments_name_the_valid_values():
    with pytest.raises(ValueError, match="regression, binary"):
        scenario.ground_truth(100, variant="ordinal")
    with pytest.raises(ValueError, match="fault_start"):
        next(scenario.generate(100, fault_start=0.99, fault_share=0.05))


def sklearn_rows(loader):
    data = loader()
    return list(data.feature_names), data.data.tolist(), data.target.tolist()


def river_rows():
    from river import datasets

    pairs = list(datasets.Phishing())
    return list(pairs[0][0]), [list(x.values()) for x, _ in pairs], [int(y) for _, y in pairs]


@pytest.mark.parametrize(("name", "rows", "reference"), [
    ("diabetes", 442, lambda: sklearn_rows(lambda: load_diabetes(scaled=False))),
    ("breast_cancer", 569, lambda: sklearn_rows(load_breast_cancer)),
    ("phishing", 1250, river_rows),
])
def test_open_feeds_keep_their_datasets(tmp_path, name, rows, reference):
    """Row counts, order, names and targets equal the packaged datasets read directly."""
    events = list(open_feeds.FEEDS[name]())
    assert len(events) == rows == len({e["id"] for e in events})
    names, x, y = reference()
    assert [list(e["features"]) for e in events] == [names] * rows
    assert [list(e["features"].values()) for e in events] == x
    assert [e["target"] for e in events] == y
    if name != "diabetes":
        assert {type(e["target"]) for e in events} == {int} and set(y) == {0, 1}
    shuffled = list(open_feeds.FEEDS[name](seed=5))
    assert [e["id"] for e in shuffled] != [e["id"] for e in events]
    assert sorted(shuffled, key=lambda e: e["id"]) == events
    made = open_feeds.write_feed(tmp_path / "feed.ndjson.gz", events)
    assert made["events"] == rows
    assert [orjson.loads(line) for line in read_lines(tmp_path / "feed.ndjson.gz")] == events


SECTION_4_KEYS = {  # the config contract (README "Config"), without the optional [feed]; key names may grow
    "": {"name"},
    "features": {"numeric", "categorical", "hash_bits", "scaling", "warmup_events"},
    "model": {"task", "loss", "l2"},
    "constraint": {"set", "radius"},
    "steps": {"rule", "base", "horizon", "grad_bound"},
    "averaging": {"scheme", "halflife"},
    "monitor": {"holdout_share", "window", "check_every", "rollback_margin", "rollback_patience",
                "drift", "serve"},
    "service": {"host", "port", "data_dir", "checkpoint_every", "token_env"},
}


@pytest.mark.parametrize("name", ["guarded", "unguarded"])
def test_demo_configs_use_the_documented_keys(name):
    with open(REPLAY_DATA / "configs" / f"{name}.toml", "rb") as f:
        config = tomllib.load(f)
    assert {k for k, v in config.items() if not isinstance(v, dict)} == SECTION_4_KEYS[""]
    for section, keys in SECTION_4_KEYS.items():
        if section:
            assert keys <= set(config[section]), section
    assert config["name"] == name
    assert tuple(config["features"]["numeric"]) == scenario.NUMERIC
    assert tuple(config["features"]["categorical"]) == scenario.CATEGORICAL
    steps, monitor = config["steps"], config["monitor"]
    if name == "guarded":
        assert (steps["rule"], config["constraint"]["set"], config["averaging"]["scheme"]) == (
            "anytime", "ball", "uniform")
        assert monitor["drift"] == "page_hinkley" and monitor["serve"] in ("better", "averaged")
    else:
        assert (steps["rule"], steps["base"], config["constraint"]["set"]) == ("constant", 0.05,
                                                                              "ball")
        assert (monitor["drift"], monitor["serve"]) == ("off", "raw")
        assert monitor["rollback"] is False  # observe only


def test_readme_lists_every_file_with_its_checksum():
    readme = (REPLAY_DATA / "README.md").read_text(encoding="utf-8")
    listed = dict(re.findall(r"\| `([\w.-]+\.ndjson\.gz)` \| `([0-9a-f]{64})` \|", readme))
    shipped = {p.name: content_sha256(p) for p in REPLAY_DATA.glob("*.ndjson.gz")}
    assert listed == shipped and len(shipped) == 5
    for path in (REPLAY_DATA / "configs").glob("*.toml"):
        assert f"configs/{path.name}" in readme
    prose = " ".join(readme.replace(">", " ").replace("*", "").split())
    assert "are invented" in prose and "decision support only" in prose
