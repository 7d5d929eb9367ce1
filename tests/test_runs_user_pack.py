"""A task on a user's own tile pack (no scenes): planted truth from the pack's masks, no verified truth."""

from __future__ import annotations

import json
import textwrap

import numpy as np
import pytest

from xbench.data import save_pack
from xbench.errors import XbenchInputError
from xbench.runs import load_records, run_task
from xbench.scenes import load_recipe, parse_label_rule, synthesize

RULE = {
    "classes": ["intact", "road"],
    "default": "intact",
    "rule": [{"class": "road", "type": "road", "stat": "coverage", "above": 0.005}],
}


def write_task(folder):
    """A task file next to `mine.npz` in `folder`."""
    path = folder / "mine.toml"
    path.write_text(
        textwrap.dedent("""
        name = "my-pack"
        seeds = [0]

        [data]
        pack = "mine.npz"
        train = 160
        val = 40
        test = 40
        lookalikes = ["river"]

        [data.drives]
        road = ["road"]

        [[models]]
        name = "cnn"
        kind = "cnn"
        width = 8
        epochs = 4

        [explainers]
        keys = ["gradient", "oracle", "tcav"]

        [metrics]
        keys = ["mass-accuracy", "deletion-auc", "concept-recovery"]

        [run]
        explain_tiles = 8
        gallery_tiles = 4
        fit_tiles = 40
        """)
    )
    return path


@pytest.fixture(scope="module")
def user_pack():
    presence = {
        "road": 0.5,
        "river": 0.4,
        "clearing": 0.0,
        "building": 0.0,
        "corridor": 0.0,
        "natural-gap": 0.0,
        "outcrop": 0.0,
    }
    pack, _ = synthesize(
        load_recipe("conifer-upland"),
        240,
        5,
        size=32,
        twins=True,
        presence=presence,
        label_rule=parse_label_rule(RULE, "test rule"),
    )
    return pack


def test_a_pack_task_runs_with_planted_truth_only(user_pack, tmp_path):
    save_pack(user_pack, tmp_path / "mine.npz")
    task = write_task(tmp_path)
    summary = run_task(task, tmp_path / "out")
    assert summary.ok, summary.failures
    records = load_records(tmp_path / "out")
    assert set(records["explainer"]) == {"gradient", "oracle"}
    assert set(records["truth"]) == {"planted", "none"}  # no scenes, so no model-verified truth
    oracle = records[(records["explainer"] == "oracle") & (records["metric"] == "mass-accuracy")]
    assert np.allclose(oracle["value"], 1.0)  # the oracle's map is the pack's own road mask
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["data"]["pack"].endswith("mine.npz")
    assert manifest["skipped"][0]["explainer"] == "tcav"
    notes = {k: v for c in manifest["cells"] for k, v in c["notes"].items()}
    assert any(k.startswith("mass-accuracy/verified") for k in notes)  # skipped, with its reason


def test_a_broken_pack_is_named_before_any_work(user_pack, tmp_path):
    images = user_pack.images.copy()
    images[3, 0, 0, 0] = np.nan
    np.savez(
        tmp_path / "mine.npz",
        images=images,
        labels=user_pack.labels,
        class_names=np.array(user_pack.class_names),
        band_names=np.array(user_pack.band_names),
        masks=user_pack.masks,
        mask_names=np.array(user_pack.mask_names),
    )
    with pytest.raises(XbenchInputError) as info:
        run_task(write_task(tmp_path), tmp_path / "never")
    message = str(info.value)
    assert "data.pack" in message and "array 'images'" in message and "tile 3" in message
    assert not (tmp_path / "never").exists()


def test_drives_must_name_the_packs_classes_and_masks(user_pack, tmp_path):
    save_pack(user_pack, tmp_path / "mine.npz")
    task = write_task(tmp_path)
    task.write_text(task.read_text().replace('road = ["road"]', 'road = ["highway"]'))
    with pytest.raises(XbenchInputError, match=r"data.drives.road\[0\].*not an allowed value.*highway"):
        run_task(task, tmp_path / "never")
