"""Real processes killed at a store write resume to the same records (no loss, no duplicate)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from tests.faults.test_cells import comparable
from xbench.runs import load_records, run_task

# Runs the CLI with the shared atomic write patched to kill the process (SIGKILL) at its N-th call,
# after the temporary file is written and before it is renamed.
KILLER = """
import os, signal, sys
import xbench.data as data
count = {"n": 0}
real = data.atomic_write
def dying(path, write):
    count["n"] += 1
    if count["n"] == int(os.environ["KILL_AT"]):
        write(str(path) + ".partial")
        os.kill(os.getpid(), signal.SIGKILL)
    return real(path, write)
data.atomic_write = dying
import xbench.runs.store as store
store.atomic_write = dying
from xbench.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_kill_at_a_store_write_resumes_to_the_same_records(make_task, tmp_path, module_dir):
    kill_at = 9  # inside the second cell's commit
    task = make_task()
    clean = tmp_path / "clean"
    assert run_task(task, clean).ok
    out = tmp_path / "killed"
    env = dict(os.environ, KILL_AT=str(kill_at))
    env["PYTHONPATH"] = os.pathsep.join([str(module_dir), str(Path(__file__).parents[2]), env.get("PYTHONPATH", "")])
    proc = subprocess.run(
        [sys.executable, "-c", KILLER, "run", str(task), "--out", str(out), "--quiet"], env=env, capture_output=True
    )
    assert proc.returncode == -9, proc.stderr.decode()[-800:]
    summary = run_task(task, out)
    assert summary.ok
    records = comparable(load_records(out))
    assert not records.duplicated().any()
    pd.testing.assert_frame_equal(records, comparable(load_records(clean)))


class Killed(BaseException):
    """Stands for a kill: raised by the patched write after its temporary file is complete, before the rename."""


def test_every_store_write_interrupted_resumes_to_the_same_records(make_task, tmp_path, monkeypatch):
    """In-process sweep: the run is stopped at its store writes in turn and then resumed."""
    import xbench.runs.store as store

    task = make_task(explainers='["random", "oracle"]')
    clean = tmp_path / "clean"
    assert run_task(task, clean).ok
    expected = comparable(load_records(clean))
    real = store.atomic_write
    calls = {"n": 0, "at": 0}

    def interrupted(path, write):
        calls["n"] += 1
        if calls["n"] == calls["at"]:
            Path(path).parent.mkdir(parents=True, exist_ok=True)
            write(str(path) + ".partial")  # a half-done temporary file, as a kill would leave it
            raise Killed()
        return real(path, write)

    monkeypatch.setattr(store, "atomic_write", interrupted)
    calls["at"] = 10**9
    run_task(task, tmp_path / "count")
    total = calls["n"]
    assert total >= 15  # two cells of six files each, and the run folder's tables
    # every other write (cell tables, markers, the folder's tables) and the last one, to keep the suite fast
    for at in sorted(set(range(1, total + 1, 2)) | {total}):
        out = tmp_path / f"k{at}"
        calls.update(n=0, at=at)
        with pytest.raises(Killed):
            run_task(task, out)
        calls.update(n=0, at=10**9)
        summary = run_task(task, out)
        assert summary.ok, (at, summary.failures)
        records = comparable(load_records(out))
        assert not records.duplicated().any(), at
        pd.testing.assert_frame_equal(records, expected, obj=f"stopped at write {at}")
