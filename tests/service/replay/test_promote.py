"""Promote a replay to live, and the model file: replay -> ``trimtab serve --start-from`` -> the same
state digest and the same scores, in a real ``trimtab serve`` process on 127.0.0.1 with a real SQLite
data dir; the numpy example of ``docs/model-file.md``, run as printed there, against that service's
score; and the refusals of ``--start-from``, which leave the data dir untouched.

References outside trimtab: Python's ``hashlib`` (BLAKE2b, RFC 7693) and numpy in the document's
example, and the running service's own answers over HTTP.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import orjson
import pytest

from service.cli import main
from service.config import config_from_dict, load_config
from service.engine import Engine
from service.events import EventValidator
from tests.service.servicekit import FEATURES, TOKEN, TOKEN_ENV, ServeProcess, demo_events, toml_text
from tests.service.faults.faultkit import ENV, Client

ROOT = Path(__file__).resolve().parents[3]
DOC = ROOT / "docs" / "model-file.md"
MONITOR = {"check_every": 100, "window": 500}


def _config(data_dir: Path, **features):
    svc = {"host": "127.0.0.1", "port": 0, "data_dir": str(data_dir), "token_env": TOKEN_ENV}
    return config_from_dict({"name": "guarded", "features": {**FEATURES, **features}, "monitor": MONITOR,
                             "service": svc})


def _doc_example() -> str:
    blocks = re.findall(r"```python\n(.*?)```", DOC.read_text(encoding="utf-8"), flags=re.S)
    assert len(blocks) == 1, "docs/model-file.md should hold one python example"
    return blocks[0]


@pytest.fixture(scope="module")
def replayed(tmp_path_factory):
    """One replay of 4,000 demo events under the config ``guarded``: the run folder and its summary."""
    tmp = tmp_path_factory.mktemp("promote")
    feed = tmp / "feed.ndjson"
    feed.write_bytes(b"\n".join(orjson.dumps(e) for e in demo_events(4000, tag="r")) + b"\n")
    conf = tmp / "guarded.toml"
    conf.write_text(toml_text(_config(tmp / "unused")))
    assert main(["replay", str(feed), "-c", str(conf), "--out", str(tmp / "replay-out"), "--no-progress",
                 "--no-report"]) == 0
    summary = json.loads((tmp / "replay-out" / "summary.json").read_text())["runs"][0]
    return tmp, tmp / "replay-out" / "guarded", summary


def _score(client: Client, events: list[dict]) -> list[float]:
    status, got = client.call("POST", "/v1/score", {"events": [{"features": e["features"]} for e in events]})
    assert status == 200, got
    return got["scores"]


def test_replay_then_serve_start_from_keeps_digest_and_scores(replayed, monkeypatch):
    """Must-show 4 and 5: the service started from the run shows the run's state digest and scores
    exactly as the run's final state does offline; the by-hand numpy example of docs/model-file.md
    gives the service's score to 1e-12; a restart keeps the applied position."""
    tmp, run, summary = replayed
    data_dir = tmp / "live"
    config = _config(data_dir)
    conf = tmp / "serve.toml"
    conf.write_text(toml_text(config))
    server = ServeProcess(conf, env=ENV, args=("--start-from", str(run)))
    try:
        server.wait_ready()
        client = Client(server.url)
        card = client.card()
        assert card["state_digest"] == summary["state_digest"]
        assert card["counters"]["events"] == summary["events"] == 4000
        assert card["journal"] == {"applied_seq": 0, "checkpoint_seq": 0}
        started = [i for i in client.incidents() if i["kind"] == "started_from"]
        assert len(started) == 1 and started[0]["evidence"]["state_digest"] == summary["state_digest"]

        probe = demo_events(25, tag="p", start=5000)
        offline = Engine.from_bytes(config, (run / "state.bin").read_bytes())
        validator = EventValidator(config)
        expected, used = offline.score([validator.validate(e, "").features for e in probe])
        assert _score(client, probe) == expected.tolist() and used == card["serving"]

        # docs/model-file.md's example, as printed, next to the run's folder
        monkeypatch.chdir(tmp)
        namespace: dict = {"__name__": "model_file_example"}
        exec(compile(_doc_example(), str(DOC), "exec"), namespace)
        doc_event = {"features": namespace["event"]}
        served = _score(client, [doc_event])[0]
        assert abs(namespace["score"] - served) <= 1e-12
        assert math.isclose(namespace["own_margin"], namespace["margin"], rel_tol=1e-12, abs_tol=1e-12)

        more = demo_events(300, tag="live", start=6000)
        assert client.events(more)["applied_seq"] == 300
        offline.apply_events([validator.validate(e, "") for e in more])
        after = client.card()["state_digest"]
        assert after == offline.state_digest != summary["state_digest"]
    finally:
        server.stop()
    again = ServeProcess(conf, env=ENV)
    try:
        again.wait_ready()
        card = Client(again.url).card()
        assert card["journal"]["applied_seq"] == 300 and card["state_digest"] == after
    finally:
        again.stop()


def test_model_file_is_self_contained(replayed):
    """model.json carries the scaling, the bucket layout and the metadata the document lists, and its
    own-units coefficients are the scaled ones with the scaling undone."""
    _, run, summary = replayed
    m = json.loads((run / "model.json").read_text())
    state = json.loads((run / "state.json").read_text())
    assert (m["format"], m["version"], m["name"]) == ("trimtab-model", 2, "guarded")
    assert m["state_digest"] == summary["state_digest"] == state["state_digest"]
    assert m["events_seen"] == summary["events"] and m["config_fingerprint"] == state["config_fingerprint"]
    sc = m["scaling"]
    assert sc["names"] == FEATURES["numeric"] and sc["frozen"] and all(s > 0 for s in sc["std"])
    assert m["buckets"]["count"] == len(m["scaled"]["raw"]["buckets"]) == 2 ** FEATURES["hash_bits"]
    for it in ("raw", "averaged"):
        scaled, own = m["scaled"][it], m[it]
        for name, w, mean, std in zip(sc["names"], scaled["numeric"], sc["mean"], sc["std"]):
            assert own["numeric"][name] == pytest.approx(w / std, rel=1e-12)
        shift = sum(w / std * mean for w, mean, std in zip(scaled["numeric"], sc["mean"], sc["std"]))
        assert own["intercept"] == pytest.approx(scaled["intercept"] - shift, rel=1e-9, abs=1e-12)
        for name, values in m["buckets"]["values_seen"].items():
            for text, (column, sign) in values.items():
                bucket = scaled["buckets"][column - m["buckets"]["first_column"]]
                assert own["categorical"][name][text] == sign * bucket


def _serve(argv: list[str], monkeypatch) -> int:
    monkeypatch.setenv(TOKEN_ENV, TOKEN)
    return main(argv)


def test_start_from_refuses_other_features_naming_them(replayed, tmp_path, capsys, monkeypatch):
    """A config whose hash_bits and l2 differ from the run's is refused, both keys named with both
    values, and the data dir is never created."""
    _, run, _ = replayed
    data_dir = tmp_path / "live"
    config = _config(data_dir, hash_bits=8)
    config = config.model_copy(update={"model": config.model.model_copy(update={"l2": 0.01})})
    conf = tmp_path / "other.toml"
    conf.write_text(toml_text(config))
    assert _serve(["serve", "-c", str(conf), "--start-from", str(run)], monkeypatch) == 2
    err = capsys.readouterr().err
    assert "features.hash_bits: the run had 10, this config has 8" in err
    assert "model.l2: the run had 0.0, this config has 0.01" in err
    assert not data_dir.exists()


def test_start_from_refuses_a_data_dir_in_use(replayed, tmp_path, capsys, monkeypatch):
    """A data dir that holds anything is refused by name, and left as it was."""
    _, run, _ = replayed
    data_dir = tmp_path / "live"
    data_dir.mkdir()
    (data_dir / "notes.txt").write_text("kept")
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(_config(data_dir)))
    assert _serve(["serve", "-c", str(conf), "--start-from", str(run)], monkeypatch) == 2
    assert f"the data dir {data_dir} is not empty" in capsys.readouterr().err
    assert [p.name for p in data_dir.iterdir()] == ["notes.txt"]


def test_start_from_refuses_a_changed_state_file(replayed, tmp_path, capsys, monkeypatch):
    """A state.bin whose SHA-256 is not the one state.json records is refused before anything is written."""
    _, run, _ = replayed
    copy = tmp_path / "run"
    copy.mkdir()
    blob = bytearray((run / "state.bin").read_bytes())
    blob[100] ^= 1
    (copy / "state.bin").write_bytes(bytes(blob))
    (copy / "state.json").write_text((run / "state.json").read_text())
    conf = tmp_path / "serve.toml"
    conf.write_text(toml_text(_config(tmp_path / "live")))
    assert _serve(["serve", "-c", str(conf), "--start-from", str(copy)], monkeypatch) == 2
    assert "was changed or damaged" in capsys.readouterr().err
    assert not (tmp_path / "live").exists()


def test_replay_config_loads_back(replayed):
    """The run's settings recorded in state.json equal those of the config file it ran under."""
    tmp, run, _ = replayed
    resolved = load_config(tmp / "guarded.toml").resolved()
    learning = json.loads((run / "state.json").read_text())["learning"]
    assert learning == {k: resolved[k] for k in learning}


def test_start_from_a_sweep_run_folder_reads_its_config_toml(replayed, tmp_path):
    """A sweep keeps a run as ``state.bin``, a ``state.json`` without the settings, and ``config.toml``
    (docs/sweeps.md): the settings are then read from ``config.toml``."""
    from service.storage.promote import start_from

    tmp, run, summary = replayed
    folder = tmp_path / "sweep-run"
    folder.mkdir()
    blob = (run / "state.bin").read_bytes()
    (folder / "state.bin").write_bytes(blob)
    meta = json.loads((run / "state.json").read_text())
    (folder / "state.json").write_text(json.dumps({k: meta[k] for k in ("format", "sha256", "bytes", "state_digest")}
                                                  | {"config": "config.toml"}))
    (folder / "config.toml").write_text((tmp / "guarded.toml").read_text())
    config = _config(tmp_path / "live")
    started = start_from(config, tmp_path / "live", folder)
    assert started["state_digest"] == summary["state_digest"]
    assert (tmp_path / "live" / "trimtab.sqlite").is_file()
