"""The package layout: the one-way flow between subpackages, torch-free theory, module size.

The rules are the ones each subpackage's ``__init__`` docstring states. Imports are read with
``ast`` (every import, at module level or inside a function), so a lazy import cannot hide one.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "sgdstab"
SUBPACKAGES = ("theory", "shadows", "outputs", "tracking", "cli")

#: What each subpackage may import from sgdstab (besides itself and the top-level package).
MAY_IMPORT = {
    "theory": set(),
    "shadows": {"theory"},
    "outputs": {"theory"},
    "tracking": {"theory", "shadows", "outputs"},
    "cli": {"theory", "shadows", "outputs", "tracking"},
}
#: Third-party libraries a subpackage never imports, not even lazily.
NEVER = {"theory": {"torch"}}
#: The one deliberate exception, lazy: ``Constants.estimate`` is a convenience on the record that
#: runs the torch estimators; it can only be called with a torch model, so theory still loads no
#: torch (checked in a subprocess below).
EXCEPTIONS = {("theory/constants.py", "tracking")}

#: Modules allowed past MAX_LINES for now, each with the reason.
MAX_LINES = 400
OVER_THE_LIMIT: dict[str, str] = {}   # none left; a module that must stay longer says why here


def _modules() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def _imports(path: Path) -> list[str]:
    """Absolute dotted names this module imports (relative imports resolved)."""
    here = path.relative_to(PACKAGE.parent).with_suffix("").parts
    package = here[:-1] if path.name != "__init__.py" else here[:-1]
    found = []
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            found += [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = list(package[: len(package) - node.level + 1])
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            found.append(stem)
            if node.level and not node.module:   # `from .. import theory` names a subpackage
                found += [f"{stem}.{alias.name}" for alias in node.names]
    return found


def _where(path: Path) -> str | None:
    parts = path.relative_to(PACKAGE).parts
    return parts[0] if len(parts) > 1 else None


def test_the_imports_reader_sees_relative_and_lazy_imports(tmp_path):
    # A check that cannot fail proves nothing: feed the reader a module that breaks the rules.
    probe = PACKAGE / "theory" / "_layout_probe.py"
    probe.write_text("def f():\n    from ..tracking import tracker\n    import torch\n")
    try:
        assert {"sgdstab.tracking", "torch"} <= set(_imports(probe))
    finally:
        probe.unlink()


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_module_imports_against_the_flow(path):
    where = _where(path)
    if where is None:
        return   # the top-level package and its shims may name any subpackage
    assert where in SUBPACKAGES, f"{where}: a new subpackage needs its rule in MAY_IMPORT"
    name = str(path.relative_to(PACKAGE))
    for imported in _imports(path):
        root, _, rest = imported.partition(".")
        if root in NEVER.get(where, set()):
            pytest.fail(f"{name} imports {imported}: {where} must not import {root}")
        if root != "sgdstab" or not rest:
            continue
        target = rest.split(".")[0]
        if target in SUBPACKAGES and target != where and target not in MAY_IMPORT[where]:
            if (name, target) not in EXCEPTIONS:
                pytest.fail(f"{name} imports {imported}: {where} may import only "
                            f"{sorted(MAY_IMPORT[where]) or 'nothing of sgdstab'}")


def test_the_whole_theory_package_loads_without_torch():
    modules = sorted(p.stem for p in (PACKAGE / "theory").glob("*.py") if p.stem != "__init__")
    code = ("import sys\n" + "".join(f"import sgdstab.theory.{m}\n" for m in modules)
            + "sys.exit(1 if 'torch' in sys.modules else 0)")
    assert len(modules) >= 6
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr or "importing sgdstab.theory loaded torch"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_module_is_longer_than_the_limit(path):
    name = str(path.relative_to(PACKAGE))
    lines = len(path.read_text().splitlines())
    if name in OVER_THE_LIMIT:
        assert lines > MAX_LINES, f"{name} is short enough now: take it off OVER_THE_LIMIT"
        return
    assert lines <= MAX_LINES, f"{name} has {lines} lines (limit {MAX_LINES}): split it"


def test_the_console_script_names_the_command_line_entry():
    import importlib

    from .test_packaging import PYPROJECT as pyproject

    target = pyproject["project"]["scripts"]["sgdstab"]
    module, _, name = target.partition(":")
    entry = getattr(importlib.import_module(module), name)
    assert callable(entry) and entry is importlib.import_module("sgdstab.cli.main").main
    assert entry is importlib.import_module("sgdstab.__main__").main   # python -m sgdstab
    assert "sgdstab*" in pyproject["tool"]["setuptools"]["packages"]["find"]["include"]
