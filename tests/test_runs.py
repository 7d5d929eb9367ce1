"""The grid runner and its result store: resume after a kill, determinism, dask, failing cells."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xbench.cli import main as cli_main
from xbench.errors import XbenchInputError
from xbench.runs import RECORD_COLUMNS, load_records, run_task

TINY = Path(__file__).parent / "data" / "tiny_task.toml"
KEY = ["model", "seed", "explainer", "metric", "truth", "tile"]


@pytest.fixture(scope="module")
def cache_dir(tmp_path_factory):
    path = tmp_path_factory.mktemp("xbench-cache")
    old = os.environ.get("XBENCH_CACHE")
    os.environ["XBENCH_CACHE"] = str(path)
    yield path
    if old is None:
        os.environ.pop("XBENCH_CACHE", None)
    else:
        os.environ["XBENCH_CACHE"] = old


@pytest.fixture(scope="module")
def first_run(cache_dir, tmp_path_factory):
    out = tmp_path_factory.mktemp("run-a")
    summary = run_task(TINY, out)
    assert summary.ok, summary.failures
    return out, summary


def comparable(records: pd.DataFrame) -> pd.DataFrame:
    """Records without wall-clock timings (the only values allowed to differ between runs)."""
    kept = records[records["metric"] != "seconds"].drop(columns=["run_id"])
    return kept.sort_values(KEY).reset_index(drop=True)


def test_store_holds_the_tidy_tables(first_run):
    out, summary = first_run
    records = load_records(out)
    assert list(records.columns) == RECORD_COLUMNS
    assert not records.duplicated(KEY).any()
    assert set(records["explainer"]) == {"gradient", "grad-cam", "occlusion", "random", "edges", "oracle"}
    assert set(records["truth"]) <= {"planted", "verified", "none"}
    per_tile = records[records["tile"] >= 0]
    assert per_tile.groupby(["explainer", "metric", "truth"]).size().max() == 12  # explain_tiles
    csv = pd.read_csv(out / "records.csv")
    assert len(csv) == len(records)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["task"] == "tiny" and manifest["data"]["counts"] == {"train": 240, "val": 60, "test": 60}
    assert {c["status"] for c in manifest["cells"]} == {"ok"}
    assert manifest["models"][0]["accuracy"]
    gallery = np.load(out / "artifacts" / "gallery__tiny__cnn__0.npz")
    assert gallery["images"].shape[0] == 4 and "map__oracle" in gallery.files
    for name in ("curves.parquet", "reliance.parquet", "concepts.parquet"):
        assert (out / name).is_file()
    assert summary.cells_done == summary.cells_total == 6


def test_rerun_reuses_every_cell(first_run):
    out, _ = first_run
    before = load_records(out)
    summary = run_task(TINY, out)
    assert summary.cells_cached == summary.cells_total and summary.cells_done == 0
    pd.testing.assert_frame_equal(load_records(out), before)


def test_same_seed_gives_same_records(first_run, tmp_path):
    out, _ = first_run
    run_task(TINY, tmp_path / "again")
    pd.testing.assert_frame_equal(comparable(load_records(tmp_path / "again")), comparable(load_records(out)))


def test_killed_run_resumes_to_the_same_records(first_run, tmp_path, cache_dir):
    out, _ = first_run
    target = tmp_path / "killed"
    env = dict(os.environ, XBENCH_CACHE=str(cache_dir))
    proc = subprocess.Popen(
        [sys.executable, "-m", "xbench.cli", "run", str(TINY), "--out", str(target), "--quiet"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    deadline = time.time() + 120
    while time.time() < deadline and proc.poll() is None:
        if len(list((target / "cells").glob("*.json"))) >= 2:
            break
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    committed = len(list((target / "cells").glob("*.json")))
    assert 1 <= committed < 6, "the run should be killed part-way"
    assert not (target / "records.parquet").exists()
    summary = run_task(TINY, target)
    assert summary.cells_cached == committed and summary.cells_done == 6 - committed
    resumed = comparable(load_records(target))
    assert not resumed.duplicated(KEY).any()
    pd.testing.assert_frame_equal(resumed, comparable(load_records(out)))


def test_dask_executor_matches_local(first_run, tmp_path):
    pytest.importorskip("dask.distributed")
    out, _ = first_run
    summary = run_task(TINY, tmp_path / "dask", executor="dask", jobs=2, explainers=["gradient", "oracle"])
    assert summary.ok, summary.failures
    local = comparable(load_records(out))
    local = local[local["explainer"].isin(["gradient", "oracle"])].reset_index(drop=True)
    pd.testing.assert_frame_equal(comparable(load_records(tmp_path / "dask")), local)


def test_failing_explainer_is_recorded_and_the_rest_completes(first_run, tmp_path, capsys):
    from xbench.explainers import registry

    @registry.register_explainer(
        "broken-for-test", citation="none (test plugin)", needs=set(), defaults={}, description="always raises"
    )
    def broken(model, images, targets, context, **settings):
        raise RuntimeError("this plugin is broken on purpose")

    try:
        code = cli_main(
            [
                "run",
                str(TINY),
                "--out",
                str(tmp_path / "broken"),
                "--quiet",
                "--explainers",
                "random,broken-for-test,edges",
            ]
        )
    finally:
        registry.unregister_explainer("broken-for-test")
    assert code == 1
    printed = capsys.readouterr().out
    assert "1 failed" in printed and "this plugin is broken on purpose" in printed
    manifest = json.loads((tmp_path / "broken" / "manifest.json").read_text())
    status = {c["explainer"]: c["status"] for c in manifest["cells"]}
    assert status == {"random": "ok", "broken-for-test": "failed", "edges": "ok"}
    assert "broken on purpose" in next(c["error"] for c in manifest["cells"] if c["status"] == "failed")
    assert set(load_records(tmp_path / "broken")["explainer"]) == {"random", "edges"}


def test_bad_task_stops_before_any_work(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(TINY.read_text().replace('"edges", "oracle"]', '"edges", "oracel"]'))
    with pytest.raises(XbenchInputError) as info:
        run_task(bad, tmp_path / "never")
    assert "bad.toml" in str(info.value) and "oracel" in str(info.value)
    assert not (tmp_path / "never").exists()


def test_unknown_executor_is_a_usage_error(tmp_path, capsys):
    assert cli_main(["run", str(TINY), "--out", str(tmp_path / "x"), "--executor", "slurm"]) == 2


def test_run_folder_keeps_the_tiles_attributes_the_breakdowns_read(first_run, tmp_path):
    # The run writes each test tile's class, main planted type and its coverage (tiles.parquet): the report's
    # breakdowns read them instead of synthesizing the test split again from the task file, and they must be the
    # attributes of the tiles the task's test split holds (rebuilt here from the task, as older folders are).
    from xbench.data import tiles_from_pack
    from xbench.report.breakdown import tile_attributes
    from xbench.tasks import build_task_data, load_task

    out, _ = first_run
    written = pd.read_parquet(out / "tiles.parquet")
    task = load_task(TINY)
    test = build_task_data(task).test
    expected = tiles_from_pack("tiny", test, [t for t in test.mask_names if t not in task.lookalike_types])
    pd.testing.assert_frame_equal(written, expected)
    manifest = json.loads((out / "manifest.json").read_text())
    log: list[str] = []
    pd.testing.assert_frame_equal(tile_attributes([out], [manifest], log), expected)
    assert not log
    # a run of another task into the same folder keeps this task's rows
    (tmp_path / "other.parquet").write_bytes((out / "tiles.parquet").read_bytes())
    other = written.assign(task="other")
    other.to_parquet(out / "tiles.parquet", index=False)
    try:
        run_task(TINY, out)
        both = pd.read_parquet(out / "tiles.parquet")
        assert sorted(set(both["task"])) == ["other", "tiny"] and len(both) == 2 * len(written)
    finally:
        (out / "tiles.parquet").write_bytes((tmp_path / "other.parquet").read_bytes())
