"""Hostile or broken user code: plugins that write into their input, sleep, or exit; black boxes that return
raw scores; a test split without a tile to explain. Each has one stated outcome, never a silent pass."""

from __future__ import annotations

import json
import time

import numpy as np
import pandas as pd
import pytest

from tests.faults.conftest import MODULE_NAME
from tests.faults.test_cells import comparable
from xbench.cli import main as cli_main
from xbench.explainers import registry
from xbench.runs import load_records


@pytest.fixture()
def hostile_plugins():
    @registry.register_explainer("writes-input", citation="none (test)", needs=set(), defaults={}, description="x")
    def writes_input(model, images, targets, context, **settings):
        images[:] = 0.0  # vandalises the array it was given
        targets[:] = 0
        if context.masks is not None:
            context.masks[:] = False
        return np.ones(images.shape[:1] + images.shape[2:], dtype=np.float32)

    @registry.register_explainer("sleeps", citation="none (test)", needs=set(), defaults={}, description="x")
    def sleeps(model, images, targets, context, **settings):
        time.sleep(60)
        return np.zeros(images.shape[:1] + images.shape[2:], dtype=np.float32)

    @registry.register_explainer("exits", citation="none (test)", needs=set(), defaults={}, description="x")
    def exits(model, images, targets, context, **settings):
        raise SystemExit(0)

    yield
    for key in ("writes-input", "sleeps", "exits"):
        registry.unregister_explainer(key)


def test_hostile_plugins_leave_the_others_unchanged(make_task, tmp_path, hostile_plugins, capsys):
    task = make_task(timeout=2)
    clean = tmp_path / "clean"
    assert cli_main(["run", str(task), "--out", str(clean), "--quiet"]) == 0
    out = tmp_path / "hostile"
    order = "writes-input,gradient,sleeps,random,exits,edges,oracle"
    started = time.perf_counter()
    code = cli_main(["run", str(task), "--out", str(out), "--quiet", "--explainers", order])
    assert time.perf_counter() - started < 30  # the sleeper was stopped at its 2 s limit
    assert code == 1
    printed = capsys.readouterr().out
    assert "time limit" in printed and "sys.exit" in printed
    status = {c["explainer"]: c["status"] for c in json.loads((out / "manifest.json").read_text())["cells"]}
    # the tiles and targets it gets are its own copies; the context's arrays are read-only views (not copied:
    # the concept sets alone are ~120 MB), so writing into the masks fails its own cell, loudly
    assert status["sleeps"] == "failed" and status["exits"] == "failed" and status["writes-input"] == "failed"
    errors = {c["explainer"]: c.get("error") or "" for c in json.loads((out / "manifest.json").read_text())["cells"]}
    assert "read-only" in errors["writes-input"]
    records = comparable(load_records(out))
    others = records[records["explainer"].isin(["gradient", "random", "edges", "oracle"])].reset_index(drop=True)
    pd.testing.assert_frame_equal(others, comparable(load_records(clean)))


def test_black_box_with_raw_scores_is_refused_before_any_work(make_task, tmp_path, module_dir, capsys):
    models = f'[[models]]\nname = "box"\nkind = "user-callable"\nfactory = "{MODULE_NAME}:raw_scores"\n'
    task = make_task(models=models, explainers='["random", "edges"]')
    assert cli_main(["run", str(task), "--out", str(tmp_path / "r"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "not probabilities" in err and "\n" not in err
    assert not (tmp_path / "r" / "cells").exists()


def test_factory_calling_sys_exit_is_an_error(make_task, tmp_path, module_dir, capsys):
    models = f'[[models]]\nname = "box"\nkind = "user-callable"\nfactory = "{MODULE_NAME}:exits"\n'
    task = make_task(models=models, explainers='["random"]')
    assert cli_main(["run", str(task), "--out", str(tmp_path / "r"), "--quiet"]) == 2
    assert "sys.exit" in capsys.readouterr().err


def test_test_split_without_a_target_tile_is_an_error(make_task, tmp_path, capsys):
    task = make_task(road=0.0)
    assert cli_main(["run", str(task), "--out", str(tmp_path / "r"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert "no test tile" in err and "\n" not in err


def test_skipped_metrics_are_said_and_stored(make_task, tmp_path, capsys):
    task = make_task()
    text = task.read_text().replace('"gini", "deletion-auc"]', '"gini", "deletion-auc", "concept-detection"]')
    task.write_text(text)
    assert cli_main(["run", str(task), "--out", str(tmp_path / "r"), "--quiet", "--explainers", "random"]) == 0
    printed = capsys.readouterr().out
    assert "concept-detection/none: " in printed  # its reason, on screen
    assert "near chance level" in printed  # an untrained network: flagged, with its balanced accuracy
    reasons = pd.read_parquet(tmp_path / "r" / "reasons.parquet")
    assert (reasons["metric"] == "concept-detection").any() and reasons["reason"].str.len().min() > 0
    from xbench.report.load import load_runs

    assert len(load_runs(tmp_path / "r").reasons) == len(reasons)  # the report reads them from the table
