"""What pip and type checkers see: license metadata, py.typed, versions, the changelog.

Outside sources: PEP 639 (``license`` as an SPDX expression, ``license-files``; supported from
setuptools 77.0, from its changelog, from memory), PEP 561 (a ``py.typed`` marker in the
package), the MIT license text as published by the Open Source Initiative (from memory, first
lines only).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

import sgdstab

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the same parser as a package
    tomllib = pytest.importorskip("tomli")

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_the_license_is_an_spdx_expression_with_its_file():
    project = PYPROJECT["project"]
    assert project["license"] == "MIT"             # PEP 639: a string, not a table
    assert project["license-files"] == ["LICENSE"]
    text = (ROOT / "LICENSE").read_text(encoding="utf-8")
    assert text.startswith("MIT License") and "Permission is hereby granted, free of charge" in text
    requirement = PYPROJECT["build-system"]["requires"][0]
    minimum = int(re.fullmatch(r"setuptools>=(\d+)", requirement).group(1))
    assert minimum >= 77


def test_the_package_is_marked_typed_and_ships_the_marker():
    assert (Path(sgdstab.__file__).parent / "py.typed").is_file()   # PEP 561
    assert "py.typed" in PYPROJECT["tool"]["setuptools"]["package-data"]["sgdstab"]


def test_one_version_everywhere_and_in_the_changelog():
    assert PYPROJECT["project"]["version"] == sgdstab.__version__
    changelog = (ROOT / "CHANGELOG.md").read_text(encoding="utf-8")
    assert f"## {sgdstab.__version__}" in changelog


def test_the_test_extra_has_what_the_tests_and_the_type_check_use():
    extra = " ".join(PYPROJECT["project"]["optional-dependencies"]["test"])
    for name in ("pytest", "mypy", "pandas", "matplotlib", "scikit-learn"):
        assert name in extra
    checked = PYPROJECT["tool"]["mypy"]["files"]
    assert all((ROOT / path).exists() for path in checked)
