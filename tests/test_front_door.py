"""The Python front door (xbench.api): the verbs, tasks as path / dict / Task, and the README's example."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

import xbench
from xbench.cli import main as cli_main
from xbench.errors import XbenchInputError
from xbench.runs import load_records
from xbench.tasks import load_task

ROOT = Path(__file__).resolve().parent.parent
TINY = Path(__file__).parent / "data" / "tiny_task.toml"
KEY = ["model", "seed", "explainer", "metric", "truth", "tile"]
SUBSET = {"explainers": ["gradient", "random", "oracle"], "metrics": ["mass-accuracy", "deletion-auc"]}


def _values(run_dir: Path) -> pd.DataFrame:
    frame = load_records(run_dir)
    return frame.sort_values(KEY).reset_index(drop=True)[[*KEY, "value"]]


def test_import_is_light_and_lists_the_verbs():
    # `import xbench` must not load torch (start-up cost of every command and script).
    code = "import sys, xbench; print(sorted(xbench.VERBS)); print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert "'check', 'explain', 'load', 'report', 'run', 'score', 'synthesize', 'train'" in out
    assert out.strip().endswith("False")


def test_report_and_check_stay_callable_after_their_subpackages_load():
    import xbench.check
    import xbench.report

    assert callable(xbench.report) and callable(xbench.check)


def test_a_task_is_the_same_from_a_path_a_dict_and_a_task_object():
    import tomllib

    from_path = load_task(TINY)
    from_dict = xbench.load(tomllib.loads(TINY.read_text()))
    assert xbench.load(from_path) is from_path
    assert from_dict.file_hash == from_path.file_hash  # the hash is of the content, not of the file's bytes
    assert from_dict.explainers == from_path.explainers and from_dict.run == from_path.run


def test_a_dict_task_error_names_the_key():
    import tomllib

    doc = tomllib.loads(TINY.read_text())
    doc["run"]["explain_tiles"] = 0
    with pytest.raises(XbenchInputError, match=r"key run\.explain_tiles: out of range"):
        xbench.load(doc)


@pytest.mark.slow
def test_python_run_equals_the_cli_run(tmp_path):
    import tomllib

    cli_out, py_out = tmp_path / "cli", tmp_path / "py"
    code = cli_main(
        [
            "run",
            str(TINY),
            "--out",
            str(cli_out),
            "--explainers",
            ",".join(SUBSET["explainers"]),
            "--metrics",
            ",".join(SUBSET["metrics"]),
            "--quiet",
        ]
    )
    assert code == 0
    summary = xbench.run(tomllib.loads(TINY.read_text()), py_out, **SUBSET)
    assert summary.cells_failed == 0
    pd.testing.assert_frame_equal(_values(cli_out), _values(py_out))


@pytest.mark.slow
def test_the_readme_python_example_runs(tmp_path):
    text = (ROOT / "README.md").read_text()
    section = text.split("## From Python", 1)[1]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    env = {**os.environ, "MPLBACKEND": "Agg"}
    res = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, env=env)
    assert res.returncode == 0, res.stderr[-3000:]
    records = load_records(tmp_path / "runs" / "mini")
    assert {"gradient", "occlusion", "oracle"} <= set(records["explainer"])
    assert (tmp_path / "runs" / "mini-report").is_dir()
