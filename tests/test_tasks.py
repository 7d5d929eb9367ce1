"""Task files: the shipped tasks load; every bad key, type or value is named in the error."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from xbench.errors import XbenchInputError
from xbench.tasks import build_task_data, list_tasks, load_task

SHIPPED = ["clearings", "demo", "disturbance-type", "roads", "shortcut", "label-noise"]
# The documented keys (DEVELOPERS.md, "Names"): every shipped task lists all of them.
DESIGN_EXPLAINERS = {
    "gradient",
    "input-x-gradient",
    "integrated-gradients",
    "smoothgrad",
    "guided-backprop",
    "deeplift",
    "grad-cam",
    "grad-cam-pp",
    "occlusion",
    "rise",
    "kernel-shap",
    "activation-clusters",
    "tcav",
    "random",
    "edges",
    "oracle",
}
DESIGN_METRICS = {
    "mass-accuracy",
    "rank-accuracy",
    "pointing-game",
    "mask-auroc",
    "mask-ap",
    "topk-iou",
    "deletion-auc",
    "insertion-auc",
    "aopc-morf",
    "aopc-lerf",
    "subset-drop-corr",
    "randomization-spearman",
    "randomization-ssim",
    "max-sensitivity",
    "infidelity",
    "gini",
    "entropy",
    "concept-recovery",
    "concept-detection",
    "concept-false-alarm",
    "model-calls",
    "seconds",
}


def test_shipped_tasks_load() -> None:
    assert set(SHIPPED) <= set(list_tasks())
    for name in SHIPPED:
        task = load_task(name)
        assert task.name == name
        assert set(task.explainers) == DESIGN_EXPLAINERS
        assert set(task.metrics) == DESIGN_METRICS
        assert len(task.file_hash) == 64
        assert all(m.kind in ("cnn", "resnet", "separable", "forest") for m in task.models)
        for key in ("explain_tiles", "gallery_tiles", "batch_size", "concept_set_size", "fit_tiles"):
            assert isinstance(task.run[key], int)


def test_task_semantics() -> None:
    roads = load_task("roads")
    assert roads.class_names == ["intact", "road"]
    assert roads.class_driving_types == {0: [], 1: ["road"]}
    assert roads.lookalike_types == ["river"]
    clear = load_task("clearings")
    assert clear.class_driving_types[1] == ["clearing"]
    assert "natural-gap" in clear.lookalike_types
    dist = load_task("disturbance-type")
    assert dist.class_names == ["intact", "road", "clearing", "building"]
    shortcut = load_task("shortcut")
    assert shortcut.data.cue is not None
    assert shortcut.data.cue_rates == {"train": 0.95, "val": 0.95, "test": 0.5}
    assert load_task("label-noise").data.label_noise == pytest.approx(0.15)
    demo = load_task("demo")
    assert [m.kind for m in demo.models] == ["cnn"] and demo.seeds == [0]
    assert demo.run["explain_tiles"] <= 40 and demo.run["gallery_tiles"] <= 8


def test_unknown_task_lists_shipped() -> None:
    with pytest.raises(XbenchInputError) as exc:
        load_task("no-such-task")
    assert "no-such-task" in str(exc.value) and "roads" in str(exc.value)


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "t.toml"
    path.write_text(text)
    return path


def _variant(old: str, new: str, count: int = 1) -> str:
    base = Path(__file__).resolve().parent.parent / "tasks" / "roads.toml"
    text = base.read_text()
    assert old in text, old
    return text.replace(old, new, count)


@pytest.mark.parametrize(
    "old,new,key",
    [
        ('name = "roads"', 'name = "roads"\ncolour = "red"', "colour"),  # unknown top-level key
        ("label_noise = 0.0", "label_noise = 0.0\nwidth = 3", "data.width"),  # unknown data key
        ("size = 48", 'size = "48"', "data.size"),  # wrong type
        ("size = 48", "size = 50", "data.size"),  # not a multiple of 4
        ("size = 48", "size = true", "data.size"),  # bool is not an int
        ("label_noise = 0.0", "label_noise = 0.7", "data.label_noise"),  # out of range
        ("train = 800", "train = -5", "data.train"),  # bad count
        ("road = 0.5", "road = 1.5", "data.presence.road"),  # not a probability
        ("road = 0.5", "roads = 0.5", "data.presence.roads"),  # unknown type
        ('recipe = "conifer-upland"', 'recipe = "atlantis"', "data.recipe"),  # unknown recipe
        ('lookalikes = ["river"]', 'lookalikes = ["road"]', "data.lookalikes[0]"),  # human type
        ('kind = "cnn"', 'kind = "transformer"', "models[0].kind"),  # unknown kind
        ("epochs = 16", "epochs = 16\nlearning_rate = 0.1", "models[0].learning_rate"),  # unknown hyper-param
        ("epochs = 16", "epochs = 2.5", "models[0].epochs"),  # wrong type
        ("epochs = 16", "epochs = 0", "models[0].epochs"),  # bad value
        ('name = "resnet"', 'name = "cnn"', "models[1].name"),  # duplicate name
        ("n_trees = 200", 'n_trees = 200\nmax_features = "half"', "models[3].max_features"),
        ("seeds = [0, 1, 2]", "seeds = [0, -1, 2]", "seeds[1]"),
        ("explain_tiles = 64", "explain_tiles = 5000", "run.explain_tiles"),  # > test tiles
        ("explain_tiles = 64", "explain_tiles = 64\nworkers = 2", "run.workers"),  # unknown run key
        ("gallery_tiles = 8", "gallery_tiles = 0", "run.gallery_tiles"),
        ('keys = ["gradient"', 'keys = [3, "gradient"', "explainers.keys[0]"),  # wrong type
        ('stat = "coverage"', 'stat = "length"', "data.labels.rule[0].stat"),  # bad label rule
    ],
)
def test_bad_task_names_file_and_key(tmp_path: Path, old: str, new: str, key: str) -> None:
    path = _write(tmp_path, _variant(old, new))
    with pytest.raises(XbenchInputError) as exc:
        load_task(path)
    msg = str(exc.value)
    assert str(path) in msg, msg
    assert key in msg, msg


def test_settings_for_unlisted_key(tmp_path: Path) -> None:
    text = _variant("[run]", "[explainers.settings.lime]\nn_samples = 10\n\n[run]")
    with pytest.raises(XbenchInputError, match=re.escape("explainers.settings.lime")):
        load_task(_write(tmp_path, text))


def test_cue_rates_required_with_cue(tmp_path: Path) -> None:
    text = _variant(
        "[data.presence]", '[data.cue]\nkind = "band-offset"\nband = "blue"\nstrength = 0.02\n\n[data.presence]'
    )
    with pytest.raises(XbenchInputError, match=re.escape("data.cue_rate_train")):
        load_task(_write(tmp_path, text))
    text = _variant("label_noise = 0.0", "label_noise = 0.0\ncue_rate_test = 0.5")
    with pytest.raises(XbenchInputError, match=re.escape("data.cue_rate_test")):
        load_task(_write(tmp_path, text))


def test_toml_syntax_error_names_line(tmp_path: Path) -> None:
    path = _write(tmp_path, 'name = "x"\n[data\nrecipe = 1\n')
    with pytest.raises(XbenchInputError, match="line 2"):
        load_task(path)


def test_build_task_data_deterministic_and_split_rules(small_task_file: Path) -> None:
    task = load_task(small_task_file)
    a = build_task_data(task, use_cache=False)
    b = build_task_data(task)  # writes the cache
    c = build_task_data(task)  # reads train/val from the cache
    for split in ("train", "val", "test"):
        np.testing.assert_array_equal(a.split(split).images, b.split(split).images)
        np.testing.assert_array_equal(a.split(split).images, c.split(split).images)
        np.testing.assert_array_equal(a.split(split).labels, c.split(split).labels)
        assert len(a.split(split)) == task.data.counts[split]
    assert a.test.twins is not None and a.train.twins is None
    assert len(a.test_scenes) == task.data.counts["test"]
    # the splits are different tiles
    assert not np.array_equal(a.train.images[:5], a.val.images[:5])
    # the test labels follow the label rule applied to the kept scenes
    rule = task.label_rule
    assert [rule.apply(s) for s in a.test_scenes] == list(a.test.clean_labels)


def test_label_noise_only_in_train(tmp_path: Path, small_task_file: Path) -> None:
    text = small_task_file.read_text().replace("seed = 7", "seed = 7\nlabel_noise = 0.2")
    task = load_task(_write(tmp_path, text))
    data = build_task_data(task, use_cache=False)
    flipped = np.mean(data.train.labels != data.train.clean_labels)
    # 320 draws at p = 0.2: a binomial 99.9% interval is about [0.14, 0.27] (common practice)
    assert 0.12 < flipped < 0.29
    np.testing.assert_array_equal(data.val.labels, data.val.clean_labels)
    np.testing.assert_array_equal(data.test.labels, data.test.clean_labels)


def test_shortcut_cue_rates_per_split(tmp_path: Path, small_task_file: Path) -> None:
    text = small_task_file.read_text().replace(
        "[data.presence]",
        "cue_rate_train = 0.95\ncue_rate_val = 0.95\ncue_rate_test = 0.5\n\n"
        '[data.cue]\nkind = "band-offset"\nband = "blue"\nstrength = 0.02\n\n[data.presence]',
    )
    task = load_task(_write(tmp_path, text))
    data = build_task_data(task, use_cache=False)
    pos = data.train.clean_labels == 1
    agree = np.mean(data.train.cue == pos)
    assert agree > 0.9  # 95% agreement in train (binomial, 320 tiles)
    test_pos = data.test.clean_labels == 1
    assert 0.25 < np.mean(data.test.cue == test_pos) < 0.75  # independent in test


@pytest.mark.parametrize("name", sorted(p.stem for p in (Path(__file__).parent.parent / "tasks").glob("*.toml")))
def test_every_shipped_task_passes_the_runners_checks(name):
    # Explainer and metric keys and settings are checked by the runner before any work (names.RENAMED keys
    # fail there): every shipped task file, the imagery tasks included, must pass those checks.
    from xbench.runs.grid import validate_task_keys

    validate_task_keys(load_task(name))
