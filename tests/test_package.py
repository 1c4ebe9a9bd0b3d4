"""The distribution installs one top-level import package, ``curvekeeper`` (source root
``service/``), and nothing imports a package named ``service``."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from setuptools import find_namespace_packages, find_packages

ROOT = Path(__file__).parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())


def test_the_only_top_level_package_is_curvekeeper() -> None:
    found = PYPROJECT["tool"]["setuptools"]["packages"]["find"]
    packages = find_packages(where=str(ROOT / found["where"][0]), include=found["include"])
    assert packages and {p.split(".")[0] for p in packages} == {"curvekeeper"}
    # nothing else under the source root would be importable from site-packages
    others = {p.split(".")[0] for p in find_namespace_packages(where=str(ROOT / "service"))} - {"curvekeeper"}
    assert not others, others


def test_the_console_script_and_the_distribution_keep_their_names() -> None:
    assert PYPROJECT["project"]["name"] == "curvekeeper"
    assert PYPROJECT["project"]["scripts"] == {"curvekeeper": "curvekeeper.cli:main"}


def test_nothing_imports_a_package_named_service() -> None:
    pattern = re.compile(r"^\s*(from|import)\s+service(\.|\s|$)", re.MULTILINE)
    offenders = [str(p.relative_to(ROOT)) for folder in ("service", "tests", "samples")
                 for p in (ROOT / folder).rglob("*.py") if pattern.search(p.read_text())]
    assert not offenders, offenders
