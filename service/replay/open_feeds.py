"""Replay feeds built from open datasets that ship inside installed packages (nothing downloaded).

=================  ==============================================  ======  ==========  =========
feed               source                                          rows    task        id
=================  ==============================================  ======  ==========  =========
``diabetes``       scikit-learn ``load_diabetes(scaled=False)``    442     regression  diab-0000
``breast_cancer``  scikit-learn ``load_breast_cancer``             569     binary      bc-0000
``phishing``       river ``datasets.Phishing``                     1250    binary      phish-0000
=================  ==============================================  ======  ==========  =========

Features keep the datasets' own names and units (the diabetes feed uses the unscaled values). Targets:
diabetes, the disease progression one year after baseline (Efron, Hastie, Johnstone and Tibshirani,
2004, "Least Angle Regression"); breast cancer, scikit-learn's coding of the UCI Wisconsin Diagnostic
Breast Cancer labels (0 malignant, 1 benign); phishing, river's boolean label as 0/1. Rows come in
the dataset's own order. A ``seed`` shuffles them, and each id still names the original row. Events
carry no ``ts``, which is optional.

These are benchmark datasets, and a model learned from them is not fit for any clinical use.

Examples
--------
>>> first = next(diabetes_events())
>>> first["id"], first["features"]["bmi"], first["target"]
('diab-0000', 32.1, 151.0)
>>> sum(1 for _ in phishing_events()), next(phishing_events(seed=3))["id"]
(1250, 'phish-1069')
"""

from __future__ import annotations

import sys
import argparse
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path

import numpy as np
import orjson

from service.replay.scenario import write_lines, write_ndjson

__all__ = ["FEEDS", "breast_cancer_events", "diabetes_events", "phishing_events", "write_feed",
           "write_replay_data"]


def _events(prefix: str, rows: Sequence[dict], targets: Sequence[float | int],
            seed: int | None) -> Iterator[dict]:
    """Events from feature dicts and targets, in order or in a seeded permutation."""
    width = max(4, len(str(len(rows) - 1)))
    order = range(len(rows)) if seed is None else np.random.default_rng(seed).permutation(len(rows))
    for i in order:
        yield {"id": f"{prefix}-{int(i):0{width}d}", "features": rows[i], "target": targets[i]}


def _sklearn(loader: Callable, prefix: str, seed: int | None, **kwargs: object) -> Iterator[dict]:
    data = loader(**kwargs)
    names = [str(name) for name in data.feature_names]
    rows = [dict(zip(names, row)) for row in data.data.tolist()]
    return _events(prefix, rows, data.target.tolist(), seed)


def diabetes_events(*, seed: int | None = None) -> Iterator[dict]:
    """The 442 diabetes patients: ten baseline measurements, target the progression a year on."""
    from sklearn.datasets import load_diabetes

    return _sklearn(load_diabetes, "diab", seed, scaled=False)


def breast_cancer_events(*, seed: int | None = None) -> Iterator[dict]:
    """The 569 breast-mass images: thirty measurements, target 1 benign, 0 malignant."""
    from sklearn.datasets import load_breast_cancer

    return _sklearn(load_breast_cancer, "bc", seed)


def phishing_events(*, seed: int | None = None) -> Iterator[dict]:
    """The 1250 web pages of river's Phishing set: nine features, target 1 phishing, else 0."""
    from river import datasets

    pairs = list(datasets.Phishing())
    return _events("phish", [dict(x) for x, _ in pairs], [int(y) for _, y in pairs], seed)


FEEDS: dict[str, Callable[..., Iterator[dict]]] = {
    "breast_cancer": breast_cancer_events,
    "diabetes": diabetes_events,
    "phishing": phishing_events,
}


def write_feed(path: str | Path, events: Iterable[dict], *, gzip: bool | None = None) -> dict:
    """Write ``events`` to ``path`` as NDJSON (gzip for a ``.gz`` path); return a manifest."""
    digest, count = write_lines(path, map(orjson.dumps, events), gzip=gzip)
    return {"format": "ndjson", "path": str(path), "events": count, "lines": count,
            "sha256": digest}


def write_replay_data(out: str | Path, *, seed: int = 7, events: int = 103_680,
                      binary_events: int = 34_560) -> list[dict]:
    """Write every feed shipped in ``replay_data/`` into ``out``; return their manifests.

    The cold-chain feeds are made by :func:`service.replay.scenario.write_ndjson` with ``seed``, and the
    open feeds keep their datasets' order. Each file's progress goes to stderr.
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    manifests = []
    for name, n, variant in (("coldchain-demo", events, "regression"),
                             ("coldchain-demo-binary", binary_events, "binary")):
        print(f"writing {name}.ndjson.gz ({n} events)", file=sys.stderr)
        made = write_ndjson(out / f"{name}.ndjson.gz", n, seed=seed, variant=variant)
        made["malformed"] = {kind: len(lines) for kind, lines in made["malformed"].items()}
        manifests.append({"feed": name, **made})
    for name, feed in FEEDS.items():
        print(f"writing {name}.ndjson.gz", file=sys.stderr)
        manifests.append({"feed": name, **write_feed(out / f"{name}.ndjson.gz", feed())})
    return manifests


def main(argv: list[str] | None = None) -> int:
    """Regenerate the feeds shipped in ``replay_data/`` (progress on stderr, manifests on stdout)."""
    parser = argparse.ArgumentParser(prog="python3 -m service.replay.open_feeds", description=main.__doc__)
    parser.add_argument("--out", type=Path, required=True, help="directory to write into")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--events", type=int, default=103_680, help="regression events (3 days)")
    parser.add_argument("--binary-events", type=int, default=34_560, help="binary events (1 day)")
    args = parser.parse_args(argv)
    summary = write_replay_data(args.out, seed=args.seed, events=args.events,
                                           binary_events=args.binary_events)
    print(orjson.dumps(summary, option=orjson.OPT_INDENT_2).decode())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
