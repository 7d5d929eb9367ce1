"""The code base stays ruff-clean and keeps the pipeline's one-way imports (DEVELOPERS.md)."""

from __future__ import annotations

import ast
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
STAGES = ["scenes", "imagery", "tasks", "models", "explainers", "truth", "metrics", "runs", "report", "check"]


@pytest.mark.skipif(shutil.which("ruff") is None, reason="ruff not installed")
def test_ruff_clean():
    res = subprocess.run(["ruff", "check", "xbench", "tests"], cwd=ROOT, capture_output=True, text=True)
    assert res.returncode == 0, res.stdout + res.stderr


@pytest.mark.skipif(shutil.which("ruff") is None, reason="ruff not installed")
def test_ruff_format_clean():
    res = subprocess.run(["ruff", "format", "--check", "xbench", "tests"], cwd=ROOT, capture_output=True, text=True)
    assert res.returncode == 0, res.stdout + res.stderr


def _stage_of(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "xbench" or len(parts) < 2:
        return None
    return parts[1] if parts[1] in STAGES else None


def imported_modules(tree: ast.AST, package: str) -> list[str]:
    """Every module an xbench file imports, in every form: ``import xbench.x``, ``from xbench.x import y``,
    ``from xbench import x``, relative imports (``from ..x import y``, ``from .. import x``) resolved
    against ``package`` (the file's own package, e.g. ``xbench.metrics``), and ``importlib.import_module``
    or ``__import__`` with a literal name."""
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            names.append(module)
            names += [f"{module}.{a.name}" for a in node.names]  # `from xbench import runs`
        elif isinstance(node, ast.Call) and node.args and isinstance(node.args[0], ast.Constant):
            func = node.func
            called = func.attr if isinstance(func, ast.Attribute) else getattr(func, "id", "")
            if called in ("import_module", "__import__") and isinstance(node.args[0].value, str):
                names.append(node.args[0].value)
    return names


def upward_imports(path: Path, source: str | None = None) -> list[str]:
    """The imports of one file of the package that reach a later pipeline stage."""
    order = {s: i for i, s in enumerate(STAGES)}
    rel = path.relative_to(ROOT / "xbench").with_suffix("")
    own = rel.parts[0]
    if own not in order:
        return []  # cli, commands, api, pytest_plugin (edges); errors, names, schema, data (foundations)
    package = (
        ".".join(["xbench", *rel.parts[:-1]]) if path.name != "__init__.py" else ".".join(["xbench", *rel.parts[:-1]])
    )
    tree = ast.parse(source if source is not None else path.read_text())
    found = []
    for name in imported_modules(tree, package):
        stage = _stage_of(name)
        if stage and order[stage] > order[own]:
            found.append(f"{rel}: imports {name}")
    return found


def test_no_stage_imports_a_later_stage():
    problems = [p for path in (ROOT / "xbench").rglob("*.py") for p in upward_imports(path)]
    assert not problems, "\n".join(problems)


@pytest.mark.parametrize(
    "planted",
    [
        "import xbench.runs",
        "import xbench.runs.store as store",
        "from xbench.runs import run_task",
        "from xbench import runs",
        "from xbench import report as r",
        "from ..runs import store",
        "from .. import runs",
        "import importlib\nimportlib.import_module('xbench.runs.store')",
        "__import__('xbench.report')",
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from xbench.runs import Cell",
    ],
)
def test_the_import_check_catches_every_form(planted):
    # Mutation test: plant an upward import in a copy of a metrics module's text; the check must see it.
    path = ROOT / "xbench" / "metrics" / "spread.py"
    source = path.read_text() + "\n" + planted + "\n"
    assert upward_imports(path) == []
    assert upward_imports(path, source), planted
