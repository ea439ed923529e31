"""Config sweeps: the grid, its refusals, and runs on a local Dask cluster equal to one-by-one replays.

References outside the sweep: ``trimtab replay`` on configs written by editing the base TOML file
by hand (:mod:`tests.service.replay.sweepkit`), the config file validation (a value the sweep
refuses is refused the same way in a TOML file), Python's ``tomllib`` reading the configs the
sweep writes, ``hashlib`` for the state files' digests, and Dask's own ``LocalCluster`` processes.
"""

from __future__ import annotations

import hashlib
import json
import re
import subprocess

import pytest

from service.cli import main
from service.config import ConfigError, load_config
from service.engine import Engine
from service.replay.sweep_dask import execute
from service.replay.sweep_grid import build_grid
from tests.service.replay import sweepkit
from tests.service.replay.sweepkit import BASE, PYTHON, RULES, SCHEMES, VARY, run_name


@pytest.fixture(scope="module")
def feed(tmp_path_factory):
    return sweepkit.make_feed(tmp_path_factory.mktemp("sweep-feed"), 10_000)


@pytest.fixture(scope="module")
def reference(feed, tmp_path_factory):
    return sweepkit.replay_digests(feed, tmp_path_factory.mktemp("sweep-reference"))


# --------------------------------------------------------------------------- the grid
def test_grid_is_the_cartesian_product_named_by_varied_values():
    """3 x 2 values give 6 configs, each the base with exactly the varied keys changed."""
    base = load_config(BASE)
    grid = build_grid(base, VARY[1::2])
    assert [g.name for g in grid] == [run_name(r, s) for r in RULES for s in SCHEMES]
    for g in grid:
        assert g.config.steps.rule == g.varied["steps.rule"]
        assert g.config.averaging.scheme == g.varied["averaging.scheme"]
        assert g.config.model_copy(update={"name": base.name, "steps": base.steps, "averaging": base.averaging}) == base


@pytest.mark.parametrize("vary, key, words", [
    ("steps.rule=anytime,fastest", "steps.rule", ["'fastest'", "anytime", "strongly_convex"]),
    ("monitor.window=500,5", "monitor.window", ["5", ">= 10"]),
    ("steps.rulez=anytime", "steps.rulez", ["unknown key", "rule", "grad_bound"]),
    ("monitor.rollback=true,maybe", "monitor.rollback", ["maybe", "true or false"]),
])
def test_bad_vary_is_refused_naming_the_key_as_a_config_file_would_be(tmp_path, vary, key, words):
    """The sweep refuses what the config file validation refuses, naming the key and what it allows."""
    with pytest.raises(ConfigError) as err:
        build_grid(load_config(BASE), ["averaging.scheme=uniform,weighted", vary])
    assert err.value.where == f"--vary {key}"
    for word in words:
        assert word in err.value.message
    section, _, name = key.partition(".")
    bad = vary.split("=")[1].split(",")[-1]
    value = bad if bad.isdigit() else f'"{bad}"'
    text = BASE.read_text(encoding="utf-8")
    if re.search(rf"(?m)^{name} = ", text):
        text = re.sub(rf"(?m)^{name} = .*$", f"{name} = {value}", text)
    else:
        text = text.replace(f"[{section}]", f"[{section}]\n{name} = {value}", 1)
    (tmp_path / "edited.toml").write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as by_file:
        load_config(tmp_path / "edited.toml")
    assert by_file.value.where == key


def test_bad_vary_value_exits_2_before_anything_runs(feed, tmp_path):
    """``trimtab sweep`` with one bad value exits 2 naming the key; no output folder, no cluster."""
    out = tmp_path / "never"
    proc = subprocess.run([PYTHON, "-m", "service.cli", "sweep", str(feed), "-c", str(BASE),
                           "--vary", "steps.rule=anytime,sqrt_decay,fastest", "--vary", "monitor.window=500,2000",
                           "--out", str(out)], env=sweepkit.env(), capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "--vary steps.rule" in proc.stderr and "'fastest'" in proc.stderr and "sqrt_decay" in proc.stderr
    assert "Dask" not in proc.stderr and "runs finished" not in proc.stderr
    assert not out.exists()


# --------------------------------------------------------------------------- runs on a local cluster
def test_sweep_on_local_cluster_equals_six_replays_one_by_one(feed, reference, tmp_path, capsys):
    """A 3 x 2 sweep on a local Dask cluster (2 worker processes) gives the six replays' digests,
    every run learning from the chunks the sweep parsed once and sent to both workers.

    Each run's folder holds a config that ``tomllib`` reads back to the derived config, and a state
    file whose SHA-256 (``hashlib``) is the one recorded and which restores the run's exact model.
    """
    out = tmp_path / "sweep"
    code = main(["sweep", str(feed), "-c", str(BASE), *VARY, "--out", str(out), "--workers", "2"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert sweepkit.sweep_digests(out) == reference
    assert "6/6 runs finished" in captured.err and "ETA" in captured.err
    sweep = json.loads((out / "sweep.json").read_text())
    assert sweep["executor"] == {**sweep["executor"], "kind": "local", "workers": 2}
    held = [row["holdout_loss"] for row in sweep["ranking"]]
    assert held == sorted(held) and [row["rank"] for row in sweep["ranking"]] == [1, 2, 3, 4, 5, 6]
    assert all(row["verdict"] and row["attempts"] == 1 for row in sweep["ranking"])
    # the feed is parsed once and every run learns from a copy of its chunks: the digests above
    # then also show that sharing them changes nothing; both workers ran runs
    assert {row["parsed"] for row in sweep["ranking"]} == {"shared"}
    assert len({row["worker"]["pid"] for row in sweep["ranking"]}) == 2
    replayed = json.loads((out / "summary.json").read_text())["runs"]
    assert {r["name"]: r["state_digest"] for r in replayed} == reference
    derived = {g.name: g.config for g in build_grid(load_config(BASE), VARY[1::2])}
    for row in sweep["ranking"]:
        folder = out / row["name"]
        config = load_config(folder / "config.toml")
        assert config == derived[row["name"]] and config.steps.rule == row["varied"]["steps.rule"]
        blob = (folder / "state.bin").read_bytes()
        assert hashlib.sha256(blob).hexdigest() == row["state_sha256"]
        assert Engine.from_bytes(config, blob).state_digest == row["state_digest"]
    page = (out / "sweep.html").read_text()
    best = sweep["ranking"][0]["name"]
    assert best in page and "<figure class='chart'" in page and "</svg>" in page and "Caution" in page


def test_a_run_that_fails_is_reported_and_the_rest_completes(feed, reference):
    """A config that the worker refuses fails alone, with the worker's reason; the grid completes."""
    grid = build_grid(load_config(BASE), ["steps.rule=anytime,sqrt_decay"])

    class Broken:
        name, varied, config = "broken", {"steps.rule": "broken"}, grid[0].config

        def data(self):
            return {**grid[0].data(), "name": "broken", "steps": {"rule": "broken"}}

    outcomes, executor = execute([str(feed)], [grid[0], Broken(), grid[1]], workers=2, quiet=True)
    assert [o.result is not None for o in outcomes] == [True, False, True]
    assert "steps.rule" in outcomes[1].error and "'broken'" in outcomes[1].error
    assert outcomes[1].attempts == 1  # a refused config fails the same way again: not retried
    assert outcomes[0].result["summary"]["state_digest"] == reference[run_name("anytime", "uniform")]
    assert outcomes[2].result["summary"]["state_digest"] == reference[run_name("sqrt_decay", "uniform")]


@pytest.mark.parametrize("extra, where", [
    ([], "--vary"),
    (["--vary", "steps.rule=anytime", "--workers", "0"], "--workers"),
    (["--vary", "steps.rule=anytime", "--workers", "2", "--cluster", "tcp://127.0.0.1:1"], "--workers"),
])
def test_sweep_arguments_are_checked_before_anything_runs(tmp_path, capsys, extra, where):
    """No grid, no worker or a worker count beside a cluster: exit 2 naming the option, nothing written
    (checked before the feed, absent here, is even looked at)."""
    out = tmp_path / "never"
    assert main(["sweep", str(tmp_path / "absent.ndjson"), "-c", str(BASE), "--out", str(out), *extra]) == 2
    assert f"config error: {where}" in capsys.readouterr().err and not out.exists()
