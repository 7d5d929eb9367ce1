"""The code base stays ruff-clean and keeps the pipeline's one-way imports (DEVELOPERS.md)."""

from __future__ import annotations

import ast
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
STAGES = ["scenes", "tasks", "models", "explainers", "truth", "metrics", "runs", "report", "check"]


@pytest.mark.skipif(shutil.which("ruff") is None, reason="ruff not installed")
def test_ruff_clean():
    res = subprocess.run(["ruff", "check", "xbench", "tests"], cwd=ROOT, capture_output=True, text=True)
    assert res.returncode == 0, res.stdout + res.stderr


def _stage_of(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "xbench" or len(parts) < 2:
        return None
    return parts[1] if parts[1] in STAGES else None


def test_no_stage_imports_a_later_stage():
    # errors.py and data.py (tile packs) are foundations every stage may use.
    order = {s: i for i, s in enumerate(STAGES)}
    problems = []
    for path in (ROOT / "xbench").rglob("*.py"):
        rel = path.relative_to(ROOT / "xbench").with_suffix("")
        own = rel.parts[0]
        if own not in order:
            continue  # cli, commands, pytest_plugin (edges); errors, data (foundations)
        for node in ast.walk(ast.parse(path.read_text())):
            names = []
            if isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            elif isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            for name in names:
                stage = _stage_of(name)
                if stage and order[stage] > order[own]:
                    problems.append(f"{rel}: imports {name}")
    assert not problems, "\n".join(problems)
