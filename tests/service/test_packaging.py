"""The distribution holds every package of the source tree.

A package list written by hand once left ``service.publish`` out of the wheel: an installed (not
editable) trimtab then failed at ``trimtab serve``. The test applies ``pyproject.toml``'s package
discovery (setuptools' own finder, the one a wheel build runs) to the checkout and compares it
with every folder that holds an ``__init__.py``.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from setuptools.discovery import PackageFinder

ROOT = Path(__file__).resolve().parents[2]


def test_every_package_of_the_tree_is_distributed():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    include = config["packages"]["find"]["include"]
    found = set(PackageFinder.find(str(ROOT), include=include))
    tree = {str(init.parent.relative_to(ROOT)).replace("/", ".")
            for top in ("models", "service") for init in (ROOT / top).rglob("__init__.py")}
    assert "service.publish" in tree
    assert tree == found, f"packages in the tree but not distributed: {sorted(tree - found)}"


def test_package_data_names_files_that_exist():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    for package, patterns in config["package-data"].items():
        folder = ROOT / package.replace(".", "/")
        for pattern in patterns:
            assert list(folder.glob(pattern)), f"{package}: {pattern} matches no file"
