"""The config file is strict: every bad value is an error naming its key, and every error is shown.

The keys and their valid values are the config contract (README "Config", ``trimtab check-config``); each case
below is one mistake a user can make, with the key the error must name.
"""

from __future__ import annotations

import subprocess
import sys

import pytest

from service.config import ConfigError, parse_config

BASE = '[features]\nnumeric = ["ambient_c", "door_open_s"]\ncategorical = ["van"]\n'

# (id, TOML after the base (lines before any table header continue [features]; `name` goes first),
#  key the error must name, a fragment the message must contain)
BAD = [
    ("string-for-int", '[monitor]\nwindow = "500"', "monitor.window", "integer"),
    ("bool-for-float", "[steps]\nbase = true", "steps.base", "number"),
    ("string-for-float", '[model]\nl2 = "0.1"', "model.l2", "number"),
    ("int-for-bool", "[monitor]\nenabled = 1", "monitor.enabled", "true or false"),
    ("float-for-int", "[steps]\nhorizon = 1000.0", "steps.horizon", "integer"),
    ("unknown-key", "[steps]\nbases = 0.1", "steps.bases", "unknown key"),
    ("unknown-section", "[stepz]\nbase = 0.1", "stepz", "unknown key"),
    ("bad-rule", '[steps]\nrule = "adagrad"', "steps.rule", "anytime"),
    ("bad-set", '[constraint]\nset = "sphere"', "constraint.set", "ball"),
    ("bad-scheme", '[averaging]\nscheme = "median"', "averaging.scheme", "uniform"),
    ("bad-loss", '[model]\nloss = "hinge"', "model.loss", "squared"),
    ("loss-task-mismatch", '[model]\ntask = "binary"\nloss = "squared"', "model.loss", "logistic"),
    ("grad-bound-word", '[steps]\ngrad_bound = "big"', "steps.grad_bound", '"auto"'),
    ("grad-bound-negative", "[steps]\ngrad_bound = -1.0", "steps.grad_bound", '"auto"'),
    ("negative-radius", "[constraint]\nradius = -2.0", "constraint.radius", "greater than 0"),
    ("holdout-one", "[monitor]\nholdout_share = 1.0", "monitor.holdout_share", "less than 1"),
    ("hash-bits-big", "hash_bits = 40", "features.hash_bits", "24"),
    ("bad-drift", '[monitor]\ndrift = "cusum"', "monitor.drift", "page_hinkley"),
    ("bad-serve", '[monitor]\nserve = "best"', "monitor.serve", "averaged"),
    ("port-range", "[service]\nport = 70000", "service.port", "65535"),
    ("bad-journal-sync", '[service]\njournal_sync = "off"', "service.journal_sync", "full"),
    ("scorers-negative", "[service]\nscorers = -1", "service.scorers", '"auto"'),
    ("scorers-word", '[service]\nscorers = "many"', "service.scorers", '"auto"'),
    ("scorers-fraction", "[service]\nscorers = 1.5", "service.scorers", "whole number"),
    ("publish-every-negative", "[service]\npublish_every_ms = -2", "service.publish_every_ms", "greater than"),
    ("learner-policy-word", '[service]\nlearner_policy = "realtime"', "service.learner_policy", "'idle'"),
    ("strongly-convex-no-l2", '[steps]\nrule = "strongly_convex"', "steps.rule", "l2 > 0"),
    ("strongly-convex-unbounded", '[steps]\nrule = "strongly_convex"\n[model]\nl2 = 0.01\n[constraint]\nset = "none"',
     "steps.rule", "bounded"),
    ("anytime-unbounded", '[constraint]\nset = "none"', "steps.rule", "radius"),
    ("boundary-share", "[monitor]\nboundary_share = 1.5", "monitor.boundary_share", "less than or equal to 1"),
    ("removed-key", "[monitor]\nconfirm_recent = 4", "monitor.confirm_recent", "unknown key"),
    ("bad-name", 'name = "my model!"', "name", "pattern"),
    ("feed-url", '[feed]\nsource = "http://127.0.0.1:6379"', "feed.source", "redis://"),
    ("feed-claim-negative", "[feed]\nclaim_idle_ms = -1", "feed.claim_idle_ms", "greater than or equal to 0"),
    ("feed-deliveries-zero", "[feed]\nmax_deliveries = 0", "feed.max_deliveries", "greater than or equal to 1"),
    ("publish-url", '[publish]\nsource = "http://127.0.0.1:6379"', "publish.source", "redis://"),
    ("publish-age-zero", "[publish]\nmax_model_age_s = 0", "publish.max_model_age_s", "greater than 0"),
    ("publish-unknown", "[publish]\nmax_age = 3", "publish.max_age", "unknown key"),
]


@pytest.mark.parametrize("extra, key, fragment", [pytest.param(*c[1:], id=c[0]) for c in BAD])
def test_bad_value_names_its_key(extra, key, fragment):
    with pytest.raises(ConfigError) as err:
        parse_config(extra + "\n" + BASE if extra.startswith("name") else BASE + extra + "\n")
    assert err.value.where == key, str(err.value)
    assert fragment in err.value.message, err.value.message


@pytest.mark.parametrize("text, fragment", [
    ("", "no features declared"),
    ('[features]\nnumeric = ["target"]', "reserved"),
    ('[features]\ncategorical = ["id"]', "reserved"),
    ('[features]\nnumeric = ["a", "a"]', "declared twice"),
    ('[features]\nnumeric = ["a"]\ncategorical = ["a"]', "declared twice"),
    ('[features]\nnumeric = ["a\\tb"]', "printable"),
])
def test_features_are_declared_under_free_names(text, fragment):
    with pytest.raises(ConfigError) as err:
        parse_config(text)
    assert err.value.where.startswith("features"), str(err.value)
    assert fragment in err.value.message


def test_every_problem_of_a_file_is_reported():
    text = BASE + '[monitor]\nwindow = "500"\n[steps]\nbase = true\n[constraint]\nradius = "20"\n'
    with pytest.raises(ConfigError) as err:
        parse_config(text)
    wheres = [w for w, _ in err.value.problems]
    assert sorted(wheres) == ["constraint.radius", "monitor.window", "steps.base"]
    shown = str(err.value).splitlines()
    assert len(shown) == 3 and all(any(line.startswith(w) for line in shown) for w in wheres)


def test_an_integer_is_a_valid_number():
    """Strict does not mean pedantic: ``radius = 20`` is a float setting given as a TOML integer."""
    cfg = parse_config(BASE + "[constraint]\nradius = 20\n[steps]\nbase = 1\n")
    assert cfg.constraint.radius == 20.0 and isinstance(cfg.steps.base, float | int)


def test_check_config_lists_every_problem_and_exits_2(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(BASE + '[monitor]\nwindow = "500"\n[steps]\nbase = true\nrule = "nope"\n')
    proc = subprocess.run([sys.executable, "-m", "service.cli", "check-config", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    for key in ("monitor.window", "steps.base", "steps.rule"):
        assert key in proc.stderr
