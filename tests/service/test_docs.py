"""The reference documents tell the truth about the code: every config key, every route, every replay
output is documented, and every document a text points to exists.

The outside source is the code itself, read at test time: the pydantic config models
(``service/config.py``), the app's route table (``service/http/app.py``, ``_ROUTES``) and the files and
fields a real ``trimtab demo`` run writes. A key, route, file or field added to the code without a line
in its document fails here, naming what to write where.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import tomllib
import typing
from pathlib import Path

from pydantic import BaseModel

from service.config import Config

ROOT = Path(__file__).resolve().parents[2]
CONFIG_DOC = ROOT / "docs" / "config.md"
HTTP_DOC = ROOT / "docs" / "http.md"
REPLAY_DOC = ROOT / "docs" / "replay-outputs.md"

#: a table row of docs/config.md that documents one key: ``| `section.key` | type | default | ...``
_KEY_ROW = re.compile(r"^\|\s*`([A-Za-z_][A-Za-z0-9_.]*)`\s*\|", re.M)


def _section_model(annotation) -> type[BaseModel] | None:
    """The pydantic model inside a field's annotation (``FeedConfig | None`` counts), or None."""
    for a in (annotation, *typing.get_args(annotation)):
        if isinstance(a, type) and issubclass(a, BaseModel):
            return a
    return None


def config_keys(model: type[BaseModel] = Config, prefix: str = "") -> dict[str, object]:
    """Every dotted leaf key of the config models, walked recursively, with its pydantic field."""
    keys = {}
    for name, field in model.model_fields.items():
        sub = _section_model(field.annotation)
        if sub is not None:
            keys.update(config_keys(sub, f"{prefix}{name}."))
        else:
            keys[f"{prefix}{name}"] = field
    return keys


def _doc_rows(text: str) -> dict[str, list[str]]:
    """Documented key -> the cells of its table row."""
    rows = {}
    for line in text.splitlines():
        m = _KEY_ROW.match(line)
        if m:
            rows[m.group(1)] = [c.strip() for c in line.strip().strip("|").split("|")]
    return rows


def _where_to_document(key: str) -> str:
    section = key.rsplit(".", 1)[0] if "." in key else None
    if section is None:
        return f"`{key}`: add a row `| `{key}` | type, allowed | default | ... |` under its own heading"
    return (f"`{key}`: add a row `| `{key}` | type, allowed | default | unit | meaning |` to the table under "
            f"the heading `## `[{section}]`` (create that section if it is new)")


def test_every_config_key_is_in_the_config_reference():
    """Every dotted key of ``service.config.Config`` (walked recursively) has a row in docs/config.md,
    and every row names a key that exists."""
    keys = config_keys()
    rows = _doc_rows(CONFIG_DOC.read_text(encoding="utf-8"))
    missing = [k for k in keys if k not in rows]
    assert not missing, ("config keys missing from docs/config.md; document each of them:\n"
                         + "\n".join("  " + _where_to_document(k) for k in missing))
    stale = sorted(set(rows) - set(keys))
    assert not stale, f"docs/config.md documents keys the config does not have (remove their rows): {stale}"


def _default_in_cell(cell: str):
    """The default a docs/config.md row states: its first backticked TOML value (``left out`` for None)."""
    if cell.startswith("left out"):
        return None
    m = re.search(r"`([^`]*)`", cell)
    assert m, f"no backticked default in cell {cell!r}"
    return tomllib.loads(f"v = {m.group(1)}")["v"]


def test_config_reference_states_the_code_defaults_and_allowed_values():
    """The default column (third) of every key's row equals the model's default, and a key with a fixed set
    of values (a ``Literal``) lists each of them in its type column."""
    keys = config_keys()
    rows = _doc_rows(CONFIG_DOC.read_text(encoding="utf-8"))
    wrong = []
    for key, field in keys.items():
        cells = rows.get(key)
        if cells is None:
            continue  # reported, with where to write it, by test_every_config_key_is_in_the_config_reference
        if len(cells) < 3:
            wrong.append(f"{key}: its row needs the columns key | type, allowed | default | ...")
            continue
        stated, actual = _default_in_cell(cells[2]), field.get_default(call_default_factory=True)
        if stated != actual or type(stated) is bool and type(actual) is not bool:
            wrong.append(f"{key}: docs say {stated!r}, code has {actual!r}")
        for arg in (field.annotation, *typing.get_args(field.annotation)):
            if typing.get_origin(arg) is typing.Literal:
                absent = [v for v in typing.get_args(arg) if f'"{v}"' not in cells[1]]
                if absent:
                    wrong.append(f"{key}: allowed values {absent} missing from its type column")
    assert not wrong, "docs/config.md disagrees with service/config.py:\n" + "\n".join(wrong)


def test_config_reference_names_the_refusals_the_checker_makes():
    """Each combination refused by ``ModelSpec`` is in the refusal table, and the checker does refuse it."""
    from service.config import ConfigError, parse_config

    text = CONFIG_DOC.read_text(encoding="utf-8")
    refusals = {
        'rule = "strongly_convex"` with `l2 = 0`': '[features]\nnumeric=["x"]\n[steps]\nrule="strongly_convex"\n',
        'rule = "strongly_convex"` with `set = "none"`':
            '[features]\nnumeric=["x"]\n[model]\nl2=0.01\n[steps]\nrule="strongly_convex"\n[constraint]\nset="none"\n',
        '`set = "none"`': '[features]\nnumeric=["x"]\n[constraint]\nset="none"\n',
    }
    for phrase, toml in refusals.items():
        assert phrase in text, f"docs/config.md does not describe the refusal {phrase!r}"
        try:
            parse_config(toml)
        except ConfigError as exc:
            assert exc.where == "steps.rule"
        else:
            raise AssertionError(f"the checker accepted {toml!r}, which docs/config.md says it refuses")


# ------------------------------------------------------------------------------------------------ HTTP
def test_every_route_is_in_the_http_reference():
    """Every ``(method, path)`` of the app's route table appears as `METHOD path` in docs/http.md, and every
    route heading of docs/http.md is in the table."""
    from service.http.app import _ROUTES

    text = HTTP_DOC.read_text(encoding="utf-8")
    routes = {f"{method} {path}" for method, path, _ in _ROUTES}
    missing = sorted(r for r in routes if f"`{r}`" not in text)
    assert not missing, ("routes of service/http/app.py _ROUTES missing from docs/http.md; add a "
                         "'### `METHOD /path`' section for each: " + ", ".join(missing))
    headed = set(re.findall(r"^#+ `((?:GET|POST|PUT|DELETE|PATCH) [^`]+)`", text, re.M))
    assert headed >= routes, f"routes without their own heading in docs/http.md: {sorted(routes - headed)}"
    assert not headed - routes, f"docs/http.md describes routes the app does not have: {sorted(headed - routes)}"


# ------------------------------------------------------------------------------------------------ links
_MD_LINK = re.compile(r"\]\(([^)\s]+)\)")
_CODE_PATH = re.compile(r"`([A-Za-z0-9_.-]+(?:/[A-Za-z0-9_.-]+)*\.(?:md|py|toml))`")
_PY_DOC = re.compile(r"(?<![\w/.-])((?:[A-Za-z0-9_-]+/)*[A-Za-z0-9_-]+\.md)\b")


def _documents() -> list[Path]:
    return [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "replay_data" / "README.md",
            ROOT / "benchmarks" / "README.md", *sorted((ROOT / "docs").glob("*.md"))]


def _exists(ref: str, base: Path) -> bool:
    ref = ref.split("#", 1)[0]
    return not ref or (base / ref).exists() or (ROOT / ref).exists()


def test_every_document_a_text_points_to_exists():
    """Relative links and backticked paths (``*.md``, ``*.py``, ``*.toml`` with a folder, or any ``*.md``) in
    README.md, DEVELOPERS.md, replay_data/README.md, benchmarks/README.md and docs/*.md, and every ``*.md``
    path named in a docstring or comment of a ``*.py`` file, exist in the repository (relative to the
    naming file's folder or to the repository root)."""
    broken, seen = [], 0
    for doc in _documents():
        text = doc.read_text(encoding="utf-8")
        refs = [r for r in _MD_LINK.findall(text) if not re.match(r"^[a-z]+:", r)]
        refs += [r for r in _CODE_PATH.findall(text) if "/" in r or r.endswith(".md")]
        for ref in refs:
            seen += 1
            if not _exists(ref, doc.parent):
                broken.append(f"{doc.relative_to(ROOT)}: {ref}")
    for src in sorted(ROOT.glob("*/**/*.py")):
        if ".venv" in src.parts or "site-packages" in src.parts:
            continue
        code = src.read_text(encoding="utf-8")
        for m in _PY_DOC.finditer(code):
            if code[max(0, m.start() - 3):m.start()] in ('/ "', "/ '"):
                continue  # the last part of a path built with pathlib (ROOT / "docs" / name), not a path
            ref = m.group(1)
            seen += 1
            if not _exists(ref, src.parent):
                broken.append(f"{src.relative_to(ROOT)}: {ref}")
    assert seen > 20, f"only {seen} references found: the patterns no longer match the documents"
    assert not broken, "references to files that do not exist:\n" + "\n".join(broken)


_DOTTED = re.compile(r"`((features|model|constraint|steps|averaging|monitor|service|feed)\.([a-z_]+))`")


def test_every_config_key_a_document_names_exists():
    """A backticked ``section.key`` in README.md, DEVELOPERS.md, replay_data/README.md, benchmarks/README.md or
    docs/*.md is a key of the config models, unless it is a file (``model.json``), a module
    (``service.config``) or the path of a demo feed's feature in a rejection (``features.ambient_c``)."""
    import importlib.util

    from service.replay.scenario import CATEGORICAL, NUMERIC

    keys = config_keys()
    examples = {f"features.{n}" for n in (*NUMERIC, *CATEGORICAL, "probe_volts")}
    stale, seen = [], 0
    for doc in _documents():
        for token, _, key in _DOTTED.findall(doc.read_text(encoding="utf-8")):
            seen += 1
            if token in keys or token in examples or key in ("json", "py", "md", "toml", "html"):
                continue
            try:
                if importlib.util.find_spec(token) is not None:
                    continue
            except ModuleNotFoundError:  # its parent (``monitor``, ``steps``, ...) is no package
                pass
            stale.append(f"{doc.relative_to(ROOT)}: {token}")
    assert seen > 50, f"only {seen} dotted keys found: the pattern no longer matches the documents"
    assert not stale, "documents name config keys that do not exist:\n" + "\n".join(sorted(set(stale)))


# ------------------------------------------------------------------------------------------------ replay
def test_every_replay_output_is_in_the_replay_outputs_reference(tmp_path):
    """A real ``trimtab demo --events 1000`` (two replay runs and the report): every file it writes, every
    top-level and per-run field of summary.json, every certificate field and every model.json field is
    named in docs/replay-outputs.md."""
    out = tmp_path / "demo"
    proc = subprocess.run([sys.executable, "-m", "service.cli", "demo", "--out", str(out), "--events", "1000"],
                          cwd=tmp_path, capture_output=True, text=True, timeout=280)
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = REPLAY_DOC.read_text(encoding="utf-8")
    summary = json.loads((out / "summary.json").read_text())
    names = {r["name"] for r in summary["runs"]}
    files = sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.is_file())
    assert "summary.json" in files and "report.html" in files
    generic = {re.sub(r"^(" + "|".join(map(re.escape, names)) + ")/", "<name>/", f) for f in files}
    generic = {re.sub(r"-\d+\.ndjson\.gz$", "-<N>.ndjson.gz", f) for f in generic}
    missing = [f"file {f}" for f in sorted(generic) if f"`{f}`" not in text]
    fields = set(summary) | {k for r in summary["runs"] for k in r}
    missing += [f"summary.json field {k}" for k in sorted(fields) if f"`{k}`" not in text]
    cert = {k for r in summary["runs"] for k in r["certificate"]}
    missing += [f"certificate field {k}" for k in sorted(cert) if f"`{k}`" not in text]
    model = json.loads((out / sorted(names)[0] / "model.json").read_text())
    model_fields = set(model) | set(model["averaged"])
    missing += [f"model.json field {k}" for k in sorted(model_fields) if f"`{k}`" not in text]
    assert not missing, ("replay outputs missing from docs/replay-outputs.md (name each in backticks, with "
                         "its meaning):\n" + "\n".join("  " + m for m in missing))


# ------------------------------------------------------------------------------------------------ coordinates
def _fitted(constraint: str, **bounds):
    """A model on one numeric feature with a small deviation (0.01) and a steep target, so that its
    coefficient in the feature's own units is far above 1 while the scaled one is about 5."""
    import numpy as np

    from models import LinearModel

    rng = np.random.default_rng(7)
    model = LinearModel(numeric=["x"], categorical=["van"], hash_bits=4, scaling="warmup", warmup_events=50,
                        constraint=constraint, rule="constant", base=0.05, **bounds)
    for _ in range(3000):
        x = 2.0 + 0.01 * rng.standard_normal()
        van = f"V{rng.integers(1, 4):02d}"
        model.learn_one({"x": x, "van": van}, 50.0 + 500.0 * (x - 2.0) + rng.normal(0, 0.1))
    return model


def test_penalty_ball_and_box_act_on_the_scaled_coordinates_as_documented():
    """docs/config.md, "In which coordinates the model learns": the ball bounds ``||(w_scaled, b)||`` and the
    box clips every scaled coefficient and the intercept, while the coefficient in the feature's own units
    (``w_scaled / std``, the model card's) goes far past the bound; the documented meaning of both
    intercepts holds to 1e-12. Outside reference: the sets' definitions (ball ``{x : ||x|| <= R}``, box
    ``{x : lower <= x_i <= upper}``) and the change of units ``x -> (x - mean) / std``."""
    import numpy as np

    ball = _fitted("ball", radius=1.0)
    w, b = ball.weights("raw")
    assert np.sqrt(w @ w + b * b) <= 1.0 + 1e-9
    assert abs(ball.coefficients("raw")["numeric"]["x"]) > 5.0  # |w_x| <= 1 scaled, / std 0.01 in own units

    box = _fitted("box", lower=-1.0, upper=1.0)
    w, b = box.weights("raw")
    assert np.all(np.abs(w) <= 1.0 + 1e-12) and abs(b) <= 1.0 + 1e-12
    assert np.sum(np.abs(w) > 0.999) >= 1 and abs(b) > 0.999  # the box binds: the target needs ~50
    coef = box.coefficients("raw")
    assert abs(coef["numeric"]["x"]) > 5.0

    mean, std = box.scaling
    assert abs(std[0] - 0.01) < 0.003
    # internal intercept b: the margin of an event with x at its warm-up mean (missing) and no category;
    # the card's intercept: the margin at x = 0 in the feature's own units and no category
    assert abs(box.score_one({}, "raw") - b) <= 1e-12
    assert abs(box.score_one({"x": 0.0}, "raw") - coef["intercept"]) <= 1e-12 * max(1.0, abs(coef["intercept"]))


def test_l2_penalty_acts_on_the_scaled_coefficients_and_the_intercept_as_documented():
    """docs/config.md: the l2 penalty ``l2/2 (||w_scaled||^2 + b^2)`` includes the intercept and acts on scaled
    coordinates. Outside reference: the closed-form ridge minimizer of ``E[(w z + b - y)^2]/2 + l2/2 (w^2 + b^2)``
    for a standardized ``z`` independent of the noise, ``w = a / (1 + l2)``, ``b = c / (1 + l2)`` when
    ``y = a z + c`` (solved exactly below for the scaling the warm-up froze). With l2 = 1 both roughly halve;
    were the intercept unpenalized ``b`` would stay near ``E[y]``, and were the penalty on the feature's own
    units (std 0.01) the coefficient would be crushed towards 0."""
    import numpy as np

    from models import LinearModel

    rng = np.random.default_rng(11)
    model = LinearModel(numeric=["x"], scaling="warmup", warmup_events=200, constraint="none", rule="sqrt_decay",
                        base=0.2, l2=1.0)
    for _ in range(40_000):
        x = 2.0 + 0.01 * rng.standard_normal()
        model.learn_one({"x": x}, 50.0 + 500.0 * (x - 2.0) + rng.normal(0, 0.1))  # y = 5 z + 50
    # the exact minimizer for the frozen scaling: z = (x - m)/s has mean mu = (2 - m)/s, variance v = (0.01/s)^2
    (m,), (s,) = model.scaling
    mu, v = (2.0 - m) / s, (0.01 / s) ** 2
    ez2, a = v + mu * mu, 500.0 * s  # y = a z + 50 + 500 (m - 2)
    ey = 50.0 + 500.0 * (m - 2.0) + a * mu
    want = np.linalg.solve([[ez2 + 1.0, mu], [mu, 2.0]], [a * ez2 + (ey - a * mu) * mu, ey])
    w, b = model.weights("averaged")
    print("averaged iterate", w, b, "ridge minimizer", want)
    assert abs(b - want[1]) < 0.05 * abs(want[1]) and abs(w[0] - want[0]) < 0.05 * abs(want[0])
    assert b < 0.6 * ey  # an unpenalized intercept would sit near E[y], about 50
    assert w[0] > 1.0  # a penalty on the own units (std 0.01) would crush the scaled coefficient to ~0


def test_every_request_and_response_field_is_in_the_http_reference():
    """Every field of the request and response models (``service/http/schemas.py``) and of the model card
    (``service/http/handlers.py``, ``_card``, built here from a real engine that learned a few events, with
    writes open so that ``warning`` is there too) is named in docs/http.md."""
    import threading
    from types import SimpleNamespace

    from service.config import parse_config
    from service.engine import Engine
    from service.events import Event
    from service.http import handlers, schemas

    text = HTTP_DOC.read_text(encoding="utf-8")
    missing = []
    for model in (schemas.ScoreRequest, schemas.ScoreResponse, schemas.IngestResponse, schemas.LabelIn,
                  schemas.RollbackRequest, schemas.Version, schemas.Rejection, schemas.ErrorDetail):
        missing += [f"{model.__name__}.{k}" for k in model.model_fields if f"`{k}`" not in text]
    config = parse_config('name = "vans"\n[features]\nnumeric = ["ambient_c"]\ncategorical = ["van"]\n'
                          '[service]\nauth = "none"\n')
    engine = Engine(config)
    engine.apply_events([Event(f"V0{i % 3}-{i:07d}", None, {"ambient_c": 10.0 + i % 7, "van": f"V0{i % 3}"},
                               4.0 + 0.1 * (i % 7)) for i in range(600)])
    ing = SimpleNamespace(engine=engine, applied_seq=600, checkpoint_seq=0, lock=threading.Lock())
    card = handlers._card(SimpleNamespace(config=config, token=None), ing)
    fields = set(card) | {f"{k}" for part in ("counters", "journal", "norms") for k in card[part]}
    fields |= set(card["coefficients"]["averaged"])
    missing += [f"model card field {k}" for k in sorted(fields) if f"`{k}`" not in text]
    assert not missing, "fields missing from docs/http.md (name each in backticks with its meaning):\n" + \
        "\n".join("  " + m for m in missing)
