"""Content-keyed cells, verified reuse, runs that add and never shrink (issue catalogue: stale results,
damaged cell files, shrinking folders)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tests.faults.conftest import save_weights, torch_model
from xbench.errors import repo_root
from xbench.runs import load_records, run_task

KEY = ["task", "model", "seed", "explainer", "metric", "truth", "tile"]


def comparable(records: pd.DataFrame) -> pd.DataFrame:
    """Records without the run id and wall-clock seconds (the only values allowed to differ)."""
    kept = records[records["metric"] != "seconds"].drop(columns=["run_id"])
    return kept.sort_values(KEY).reset_index(drop=True)


def test_changed_weights_recompute_exactly_the_affected_cells(make_task, module_dir, tmp_path):
    save_weights(module_dir, tmp_path / "b.pt", 2)
    models = torch_model("net-a", "a.pt") + "\n" + torch_model("net-b", "b.pt")
    save_weights(module_dir, tmp_path / "a.pt", 1)
    task = make_task(models=models)
    out = tmp_path / "run"
    first = run_task(task, out)
    assert first.ok and first.cells_done == 8
    save_weights(module_dir, tmp_path / "b.pt", 5)  # "retrained" net-b
    again = run_task(task, out)
    assert (again.cells_done, again.cells_cached) == (4, 4)  # net-b's four cells, and only those
    fresh = run_task(task, tmp_path / "fresh")
    pd.testing.assert_frame_equal(comparable(load_records(out)), comparable(load_records(tmp_path / "fresh")))
    assert fresh.ok


def test_a_comment_recomputes_nothing_and_an_edited_recipe_everything(make_task, tmp_path):
    recipe = tmp_path / "recipe.toml"
    shutil.copy(repo_root() / "synthetic" / "conifer-upland.toml", recipe)
    task = make_task(recipe=str(recipe))
    out = tmp_path / "run"
    assert run_task(task, out).ok
    task.write_text("# a comment changes nothing\n" + task.read_text())
    assert run_task(task, out).cells_done == 0
    recipe.write_text(recipe.read_text().replace("\n[", "\n# edited\n[", 1))  # a comment in the recipe: nothing
    assert run_task(task, out).cells_done == 0
    text = recipe.read_text()
    edited = text.replace("description = ", 'description = "edited" #', 1)  # a changed value
    recipe.write_text(edited)
    again = run_task(task, out)
    assert again.cells_cached == 0 and again.cells_done == 4
    fresh = tmp_path / "fresh"
    run_task(task, fresh)
    pd.testing.assert_frame_equal(comparable(load_records(out)), comparable(load_records(fresh)))


@pytest.mark.parametrize("damage", ["truncate", "empty", "delete", "marker"])
def test_a_damaged_cell_file_is_repaired(make_task, tmp_path, damage):
    task = make_task()
    out = tmp_path / "run"
    assert run_task(task, out).ok
    before = comparable(load_records(out))
    victim = sorted((out / "cells").glob("*.records.parquet"))[1]
    if damage == "truncate":
        victim.write_bytes(victim.read_bytes()[: victim.stat().st_size // 2])
    elif damage == "empty":
        victim.write_bytes(b"")
    elif damage == "delete":
        victim.unlink()
    else:
        marker = victim.with_name(victim.name.split(".")[0] + ".json")
        marker.write_text(marker.read_text()[:20])
    summary = run_task(task, out)
    assert summary.ok and summary.cells_done == 1 and summary.cells_cached == 3
    if damage != "marker":
        assert len(summary.repaired) == 1
    pd.testing.assert_frame_equal(comparable(load_records(out)), before)
    manifest = json.loads((out / "manifest.json").read_text())
    assert {c["status"] for c in manifest["cells"]} == {"ok"}


def test_reruns_add_and_never_shrink(make_task, tmp_path):
    task = make_task()
    out = tmp_path / "run"
    assert run_task(task, out).ok
    full = comparable(load_records(out))
    summary = run_task(task, out, explainers=["gradient"])
    assert summary.ok and summary.cells_done == 0
    pd.testing.assert_frame_equal(comparable(load_records(out)), full)
    assert run_task(task, out, metrics=["gini"]).ok  # a metric subset keeps the other metrics
    pd.testing.assert_frame_equal(comparable(load_records(out)), full)
    other = make_task(name="faults-two", filename="two.toml", explainers='["random"]')
    assert run_task(other, out).ok
    both = load_records(out)
    assert set(both["task"]) == {"faults", "faults-two"}
    pd.testing.assert_frame_equal(comparable(both[both["task"] == "faults"]), full)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["task"] == "faults-two" and "faults" in manifest["earlier_tasks"]
    assert (out / "reasons.parquet").is_file()


def test_a_damaged_data_cache_is_rebuilt(make_task, tmp_path, monkeypatch):
    from xbench.tasks import build_task_data, cache_root, load_task

    task = load_task(make_task())
    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path / "cache"))
    first = build_task_data(task)
    for path in (cache_root() / "data").rglob("train.npz"):
        path.write_bytes(path.read_bytes()[:100])
    with pytest.warns(UserWarning, match="damaged data cache"):
        again = build_task_data(task)
    assert (again.train.images == first.train.images).all()


def test_concept_sets_are_cached_on_disk_and_a_damaged_entry_is_rebuilt(make_task, tmp_path, monkeypatch):
    from xbench.runs import execute
    from xbench.tasks import cache_root, load_task

    task = load_task(make_task())
    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path / "cache"))
    monkeypatch.setattr(execute, "_CONCEPT_CACHE", {})
    types = ["road", "river"]
    first = execute.concept_sets_for(task, types)
    (entry,) = (cache_root() / "concepts").glob("*.npz")
    monkeypatch.setattr(execute, "_CONCEPT_CACHE", {})
    read = execute.concept_sets_for(task, types)
    assert list(read) == list(first)  # the order names the concepts first, then random-0, random-1, ...
    assert all(np.array_equal(read[k], first[k]) and read[k].dtype == np.float32 for k in first)
    entry.write_bytes(entry.read_bytes()[:100])
    monkeypatch.setattr(execute, "_CONCEPT_CACHE", {})
    with pytest.warns(UserWarning, match="damaged concept-set cache"):
        again = execute.concept_sets_for(task, types)
    assert all(np.array_equal(again[k], first[k]) for k in first)


def _pack_task(tmp_path: Path, module_dir: Path) -> tuple[Path, object]:
    """A task on a user's tile pack (`mine.npz`, 16 px) with an untrained user model; returns the task file
    and a function that (re-)exports the pack from a given synthesis seed."""
    from tests.faults.conftest import MODULE_NAME
    from xbench.data import save_pack
    from xbench.scenes import parse_label_rule, synthesize

    rule = parse_label_rule(
        {
            "classes": ["intact", "road"],
            "default": "intact",
            "rule": [{"class": "road", "type": "road", "stat": "coverage", "above": 0.005}],
        },
        "rule",
    )

    def export(seed: int) -> None:
        pack, _ = synthesize("conifer-upland", 24, seed, size=16, twins=True, presence={"road": 0.6}, label_rule=rule)
        save_pack(pack, tmp_path / "mine.npz")

    save_weights(module_dir, tmp_path / "a.pt", 1)
    task = tmp_path / "pack.toml"
    task.write_text(
        'name = "pack"\nseeds = [0]\n[data]\npack = "mine.npz"\ntrain = 4\nval = 4\ntest = 16\n'
        '[data.drives]\nroad = ["road"]\n'
        f'[[models]]\nname = "n"\nkind = "user-torch"\nfactory = "{MODULE_NAME}:build_net"\nweights = "a.pt"\n'
        '[explainers]\nkeys = ["random", "oracle"]\n[metrics]\nkeys = ["mass-accuracy", "gini"]\n'
        "[run]\nexplain_tiles = 4\ngallery_tiles = 2\nfit_tiles = 4\n"
    )
    export(1)
    return task, export


def test_a_changed_tile_pack_recomputes_and_matches_a_fresh_run(tmp_path, module_dir):
    task, export = _pack_task(tmp_path, module_dir)
    out = tmp_path / "run"
    assert run_task(task, out).ok
    export(2)  # the user re-exports the pack with other tiles
    again = run_task(task, out)
    assert again.cells_cached == 0 and again.cells_done == 2
    run_task(task, tmp_path / "fresh")
    pd.testing.assert_frame_equal(comparable(load_records(out)), comparable(load_records(tmp_path / "fresh")))


def test_train_on_a_pack_task_says_what_it_does(tmp_path, module_dir, capsys):
    from xbench.cli import main as cli_main

    task, _ = _pack_task(tmp_path, module_dir)
    assert cli_main(["train", str(task), "--out", str(tmp_path / "train")]) == 0
    printed = capsys.readouterr().out
    assert "uses a tile pack" in printed and "accuracy" in printed
    assert (tmp_path / "train" / "pack__train.csv").is_file()


def test_another_package_version_recomputes_every_cell(make_task, tmp_path, monkeypatch):
    import xbench.runs.grid as grid

    task = make_task(explainers='["random", "edges"]')
    out = tmp_path / "run"
    assert run_task(task, out).ok
    assert run_task(task, out).cells_done == 0
    installed = grid.package_versions()
    monkeypatch.setattr(grid, "package_versions", lambda: installed | {"torch": "0.0"})
    assert run_task(task, out).cells_done == 2
