"""Model zoo, deterministic cached training, and bring-your-own models and packs (validation errors)."""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from sklearn.ensemble import ExtraTreesClassifier
from torch import nn

from xbench.data import load_pack
from xbench.errors import XbenchInputError
from xbench.models import ModelHandle
from xbench.models.adapters import load_user_torch_model, wrap_callable
from xbench.models.forest import export_forest, forest_predict_proba, tile_features
from xbench.models.train import state_dict_hash, train_model
from xbench.models.zoo import TORCH_KINDS, build_torch_model, count_parameters

# --------------------------------------------------------------------------------------------------
# zoo


@pytest.mark.parametrize("kind", TORCH_KINDS)
def test_zoo_shapes_layers_and_size(kind: str) -> None:
    torch.manual_seed(0)
    module = build_torch_model(kind, 6, 3)
    assert count_parameters(module) < 1_000_000
    x = torch.rand(4, 6, 48, 48)
    module.eval()
    assert module(x).shape == (4, 3)
    with pytest.warns(UserWarning, match="training mode") if module.training else warnings.catch_warnings():
        handle = ModelHandle(kind, 3, module=module)
    convs = handle.conv_layer_names()
    # explain_layer names the rectified output of the last conv block (the ReLU module that follows the
    # last conv), and the handle's default layer follows it
    assert module.explain_layer == handle.default_layer()
    assert isinstance(handle.get_layer(handle.default_layer()), nn.ReLU)
    names = [n for n, _ in module.named_modules()]
    assert names.index(module.explain_layer) > names.index(convs[-1])
    # distinct, non-inplace ReLU modules (hook-based explainers override each one)
    relus = [m for m in module.modules() if isinstance(m, nn.ReLU)]
    assert relus and all(not r.inplace for r in relus) and len({id(r) for r in relus}) == len(relus)


def test_separable_blocks_are_depthwise_then_pointwise() -> None:
    # Howard et al. 2017 (MobileNets): a depthwise conv (groups = channels) followed by a 1x1 pointwise conv
    module = build_torch_model("separable", 6, 2).eval()
    depthwise = [m for n, m in module.named_modules() if n.endswith(".depthwise")]
    pointwise = [m for n, m in module.named_modules() if n.endswith(".pointwise")]
    assert depthwise and len(depthwise) == len(pointwise)
    assert all(m.groups == m.in_channels == m.out_channels and m.kernel_size == (3, 3) for m in depthwise)
    assert all(m.kernel_size == (1, 1) and m.groups == 1 for m in pointwise)
    assert module.explain_layer == "block4.pointwise_relu"
    out = {}
    module.get_submodule(module.explain_layer).register_forward_hook(lambda _m, _a, o: out.setdefault("a", o))
    module(torch.rand(2, 6, 48, 48))
    assert out["a"].shape == (2, 64, 12, 12) and bool((out["a"] >= 0).all())  # rectified, 1/4 resolution


def test_old_bottleneck_kind_names_its_replacement(tmp_path: Path) -> None:
    with pytest.raises(XbenchInputError, match="renamed to 'separable'"):
        build_torch_model("bottleneck", 6, 2)
    from xbench.tasks import load_task

    text = (Path(__file__).parents[1] / "tasks" / "roads.toml").read_text()
    old = text.replace('name = "separable"\nkind = "separable"', 'name = "unet"\nkind = "bottleneck"')
    assert old != text
    path = tmp_path / "old.toml"
    path.write_text(old)
    with pytest.raises(XbenchInputError, match="'bottleneck' was renamed to 'separable'"):
        load_task(path)


def test_band_norm_inside_module() -> None:
    module = build_torch_model("cnn", 6, 2)
    images = np.random.default_rng(0).random((20, 6, 8, 8)).astype(np.float32) * 0.3 + 0.1
    module.norm.set_statistics(images)
    z = module.norm(torch.from_numpy(images)).numpy()
    np.testing.assert_allclose(z.mean(axis=(0, 2, 3)), 0, atol=1e-5)
    np.testing.assert_allclose(z.std(axis=(0, 2, 3)), 1, atol=1e-3)
    assert "norm.mean" in module.state_dict()


def test_forest_arrays_reproduce_sklearn() -> None:
    rng = np.random.default_rng(1)
    images = rng.random((120, 6, 16, 16), dtype=np.float32) * 0.5
    labels = (images[:, 3].mean(axis=(1, 2)) > images[:, 3].mean()).astype(np.int64)
    feats = tile_features(images)
    clf = ExtraTreesClassifier(n_estimators=25, max_depth=6, random_state=0, n_jobs=1).fit(feats, labels)
    arrays = export_forest(clf, 3)  # a class absent from the labels gets probability 0
    ours = forest_predict_proba(arrays, feats)
    # reference: scikit-learn's own predict_proba
    np.testing.assert_allclose(ours[:, :2], clf.predict_proba(feats), atol=1e-12)
    assert np.all(ours[:, 2] == 0)


# --------------------------------------------------------------------------------------------------
# training and cache


def test_training_deterministic_and_cached(trained_small, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("XBENCH_CACHE", str(trained_small.cache_dir))
    task, data, first = trained_small.task, trained_small.data, trained_small.trained
    assert not first.cached
    assert first.weights_hash == state_dict_hash(first.handle.module.state_dict())
    # a second call hits the cache: nothing is trained, the same weights come back
    again = train_model(task, data, task.models[0], seed=0)
    assert again.cached and again.weights_hash == first.weights_hash
    assert again.accuracy == first.accuracy
    x = data.test.images[:16]
    np.testing.assert_array_equal(again.handle.probabilities(x), first.handle.probabilities(x))
    # a trained model is competent on its small task (balanced accuracy via scikit-learn)
    assert first.accuracy["test_balanced_accuracy"] >= 0.7
    for split in ("train", "val", "test"):
        assert 0 <= first.accuracy[f"{split}_accuracy"] <= 1


def test_deterministic_block_sets_the_switch_without_loading_the_compiler() -> None:
    """Inside ``deterministic_torch`` torch's deterministic mode is on (an op without a deterministic kernel
    is refused or warned about, torch's documented behaviour) and the previous mode comes back after; in a
    fresh process the block does not import torch's compiler packages (1.9 s of a cold process)."""
    import subprocess
    import sys

    from xbench.models.train import deterministic_torch

    before = torch.are_deterministic_algorithms_enabled()
    with deterministic_torch(0):
        assert torch.are_deterministic_algorithms_enabled()
    assert torch.are_deterministic_algorithms_enabled() == before
    code = (
        "import sys, torch\n"
        "from xbench.models.train import deterministic_torch\n"
        "with deterministic_torch(0):\n"
        "    assert torch.are_deterministic_algorithms_enabled()\n"
        "assert not torch.are_deterministic_algorithms_enabled()\n"
        "print(sorted(m for m in ('torch._dynamo', 'torch._inductor') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_cache_entry_written_atomically(trained_small) -> None:
    entry = trained_small.trained.cache_dir
    assert (entry / "meta.json").is_file() and (entry / "weights.pt").is_file()
    assert not list(entry.glob("*.tmp"))
    # weights are a plain state_dict readable with weights_only=True
    state = torch.load(entry / "weights.pt", weights_only=True)
    assert state_dict_hash(state) == trained_small.trained.weights_hash


def test_retrained_weights_identical_and_damaged_entry_replaced(trained_small, tmp_path: Path, monkeypatch) -> None:
    """Training again from scratch with the same seed gives bit-identical weights; a damaged cache
    entry is not trusted but retrained and overwritten."""
    import shutil

    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path))
    src = trained_small.trained.cache_dir
    dst = tmp_path / "models" / src.name
    shutil.copytree(src, dst)
    (dst / "weights.pt").write_bytes(b"not a weights file")
    spec = trained_small.task.models[0]
    out = train_model(trained_small.task, trained_small.data, spec, seed=0)
    assert not out.cached and out.weights_hash == trained_small.trained.weights_hash
    assert train_model(trained_small.task, trained_small.data, spec, seed=0).cached


def test_forest_trains_as_black_box(trained_small, monkeypatch, tmp_path: Path) -> None:
    from xbench.tasks import ModelSpec

    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path))
    spec = ModelSpec("forest", "forest", {"n_trees": 40})
    first = train_model(trained_small.task, trained_small.data, spec, seed=0)
    assert first.handle.is_black_box and not first.cached
    second = train_model(trained_small.task, trained_small.data, spec, seed=0)
    assert second.cached and second.weights_hash == first.weights_hash
    probs = second.handle.probabilities(trained_small.data.test.images[:8])
    assert probs.shape == (8, 2)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0)
    assert first.accuracy["test_balanced_accuracy"] > 0.6


# --------------------------------------------------------------------------------------------------
# bring your own model


class UserNet(nn.Module):
    """A user model: raw reflectance in, logits out."""

    def __init__(self, n_classes: int = 2):
        super().__init__()
        self.conv = nn.Conv2d(6, 4, 3, padding=1)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(4, n_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.fc(self.pool(torch.relu(self.conv(x))).flatten(1))


def make_user_net(n_classes: int = 2) -> UserNet:
    torch.manual_seed(0)
    return UserNet(n_classes)


def make_not_a_module() -> str:
    return "nope"


FACTORY = "test_models:make_user_net"  # tests/ is on sys.path under pytest's rootdir conftest


@pytest.fixture()
def weights_file(tmp_path: Path) -> Path:
    path = tmp_path / "w.pt"
    torch.save(make_user_net().state_dict(), path)
    return path


def test_load_user_model(weights_file: Path) -> None:
    with pytest.warns(UserWarning, match="training mode"):
        handle = load_user_torch_model(FACTORY, weights_file, 2, name="mine", probe=np.zeros((2, 6, 8, 8), np.float32))
    assert handle.name == "mine" and not handle.module.training
    ref = make_user_net().eval()
    x = np.random.default_rng(0).random((3, 6, 8, 8), dtype=np.float32)
    expected = torch.softmax(ref(torch.from_numpy(x)), dim=1).detach().double().numpy()
    np.testing.assert_allclose(handle.probabilities(x), expected, atol=1e-6)


@pytest.mark.parametrize(
    "spec,needle",
    [
        ("no_colon_here", "no_colon_here"),
        ("no_such_module_xyz:f", "no_such_module_xyz"),
        ("test_models:missing_factory", "missing_factory"),
        ("test_models:make_not_a_module", "torch module"),
    ],
)
def test_bad_factory_named(spec: str, needle: str, weights_file: Path) -> None:
    with pytest.raises(XbenchInputError) as exc:
        load_user_torch_model(spec, weights_file, 2)
    assert needle in str(exc.value) and spec in str(exc.value)


def test_weights_mismatch_names_keys(tmp_path: Path) -> None:
    path = tmp_path / "bad.pt"
    state = make_user_net().state_dict()
    state["extra.weight"] = torch.zeros(2)
    del state["fc.bias"]
    torch.save(state, path)
    with pytest.raises(XbenchInputError) as exc:
        load_user_torch_model(FACTORY, path, 2)
    assert "fc.bias" in str(exc.value) and "extra.weight" in str(exc.value) and str(path) in str(exc.value)


class Payload:
    """An arbitrary object: must never be unpickled from a weights file."""


def test_weights_with_arbitrary_objects_refused(tmp_path: Path) -> None:
    path = tmp_path / "evil.pt"
    torch.save({"conv.weight": torch.zeros(1), "payload": Payload()}, path)
    with pytest.raises(XbenchInputError, match="tensors only"):
        load_user_torch_model(FACTORY, path, 2)
    with pytest.raises(XbenchInputError, match="file not found"):
        load_user_torch_model(FACTORY, tmp_path / "missing.pt", 2)


def test_wrap_callable_validates_output() -> None:
    x = np.full((3, 6, 8, 8), 0.2, dtype=np.float32)
    wrong = wrap_callable(lambda im: np.ones((len(im), 3)) / 3, 2, "wrong-shape")
    with pytest.raises(XbenchInputError) as exc:
        wrong.probabilities(x)
    assert "wrong-shape" in str(exc.value) and "output" in str(exc.value) and "(3, 2)" in str(exc.value)
    nan = wrap_callable(lambda im: np.full((len(im), 2), np.nan), 2, "nan-scores")
    with pytest.raises(XbenchInputError, match="non-finite"):
        nan.probabilities(x)
    logits = wrap_callable(lambda im: np.tile([0.0, np.log(3.0)], (len(im), 1)), 2, "logits", output="logits")
    np.testing.assert_allclose(logits.probabilities(x), np.tile([0.25, 0.75], (3, 1)))
    with pytest.raises(XbenchInputError, match="not callable"):
        wrap_callable("f", 2, "str")
    with pytest.raises(XbenchInputError, match="array 'probe'"):
        wrap_callable(lambda im: np.ones((len(im), 2)) / 2, 2, "ok", probe=x.astype(np.float64))
    with pytest.raises(XbenchInputError, match="NaN"):
        bad = x.copy()
        bad[0, 0, 0, 0] = np.nan
        wrap_callable(lambda im: np.ones((len(im), 2)) / 2, 2, "ok", probe=bad)


def test_wrong_output_shape_of_torch_model(weights_file: Path) -> None:
    with pytest.warns(UserWarning):
        handle = load_user_torch_model(FACTORY, weights_file, 3)  # the module gives 2 classes
    with pytest.raises(XbenchInputError, match="output"):
        handle.probabilities(np.zeros((2, 6, 8, 8), np.float32))


# --------------------------------------------------------------------------------------------------
# bring your own tile pack: every validation error names the array


def _pack_arrays(n: int = 4) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(0)
    return {
        "images": rng.random((n, 6, 8, 8), dtype=np.float32),
        "labels": np.zeros(n, np.int64),
        "class_names": np.array(["intact", "road"]),
        "band_names": np.array(["blue", "green", "red", "nir", "swir1", "swir2"]),
        "masks": np.zeros((n, 1, 8, 8), bool),
        "mask_names": np.array(["road"]),
    }


@pytest.mark.parametrize(
    "array,change,needle",
    [
        ("images", lambda a: a[0], "images"),  # wrong shape
        ("images", lambda a: a.astype(np.float64), "images"),  # wrong dtype
        (
            "images",
            lambda a: np.where(np.arange(a.size).reshape(a.shape) == 5, np.nan, a).astype(np.float32),
            "images",
        ),  # NaN
        ("images", lambda a: a + 2, "images"),  # reflectance out of range
        ("masks", lambda a: a.astype(np.uint8), "masks"),  # non-boolean masks
        ("labels", lambda a: a + 5, "labels"),  # labels outside the classes
        ("labels", lambda a: a.astype(np.float32), "labels"),  # wrong dtype
        ("masks", lambda a: a[:, :, :4], "masks"),  # wrong shape
    ],
)
def test_user_pack_validation_names_array(tmp_path: Path, array: str, change, needle: str) -> None:
    arrays = _pack_arrays()
    arrays[array] = change(arrays[array])
    path = tmp_path / "pack.npz"
    np.savez(path, **arrays)
    with pytest.raises(XbenchInputError) as exc:
        load_pack(path)
    assert f"'{needle}'" in str(exc.value) and str(path) in str(exc.value)


def test_user_pack_without_twins_loads(tmp_path: Path) -> None:
    path = tmp_path / "pack.npz"
    np.savez(path, **_pack_arrays())
    pack = load_pack(path)
    assert pack.twins is None and len(pack) == 4
    assert os.path.getsize(path) > 0


# --------------------------------------------------------------------------------------------------
# the `xbench train` command


def test_train_command_prints_and_writes_tables(
    trained_small, small_task_file: Path, tmp_path: Path, monkeypatch, capsys
) -> None:
    import pandas as pd

    from xbench.cli import main

    monkeypatch.setenv("XBENCH_CACHE", str(trained_small.cache_dir))
    out = tmp_path / "out"
    assert main(["train", str(small_task_file), "--model", "cnn", "--seed", "0", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "cached" in text and "test_bacc" in text and "reliance of cnn" in text
    table = pd.read_csv(out / "small-roads__train.csv")
    assert list(table["status"]) == ["cached"]
    expected = trained_small.trained.accuracy["test_balanced_accuracy"]
    assert table["test_bacc"].iloc[0] == pytest.approx(expected)
    rel = pd.read_csv(out / "small-roads__reliance.csv")
    assert {"road", "river"} <= set(rel["kind"])
    assert rel.set_index("kind").loc["road", "role"] == "label-driving"
    assert rel.set_index("kind").loc["river", "role"] == "look-alike"
    # bad input: one line naming the model
    assert main(["train", str(small_task_file), "--model", "vit", "--out", str(out)]) == 2
    assert "vit" in capsys.readouterr().err
