"""Tile-pack contract (DEVELOPERS.md, "Tile pack") and the model handle's boundary checks."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from xbench.data import TilePack, load_pack, save_pack, validate_pack
from xbench.errors import XbenchInputError, load_toml
from xbench.models.base import ModelHandle


def make_pack(n: int = 4, c: int = 6, size: int = 8, twins: bool = True) -> TilePack:
    rng = np.random.default_rng(0)
    images = rng.uniform(0, 1, (n, c, size, size)).astype(np.float32)
    masks = rng.uniform(0, 1, (n, 2, size, size)) > 0.7
    return TilePack(
        images=images,
        labels=np.arange(n, dtype=np.int64) % 2,
        class_names=["intact", "road"],
        band_names=["blue", "green", "red", "nir", "swir1", "swir2"][:c],
        masks=masks,
        mask_names=["road", "river"],
        twins=images * 0.5 if twins else None,
        meta={"recipe": "conifer-upland"},
    )


def test_roundtrip_keeps_every_array(tmp_path):
    pack = make_pack()
    path = save_pack(pack, tmp_path / "tiles.npz")
    back = load_pack(path)
    np.testing.assert_array_equal(back.images, pack.images)
    np.testing.assert_array_equal(back.masks, pack.masks)
    np.testing.assert_array_equal(back.twins, pack.twins)
    assert back.class_names == pack.class_names and back.mask_names == pack.mask_names
    assert back.meta == {"recipe": "conifer-upland"}
    assert not list(tmp_path.glob("*.tmp*")), "the temporary file of the atomic write is left behind"


def test_pack_without_twins_loads(tmp_path):
    back = load_pack(save_pack(make_pack(twins=False), tmp_path / "t.npz"))
    assert back.twins is None


@pytest.mark.parametrize(
    "change, array",
    [
        (lambda p: setattr(p, "images", p.images.astype(np.float64)), "images"),
        (lambda p: p.images.__setitem__((0, 0, 0, 0), np.nan), "images"),
        (lambda p: p.images.__setitem__((1, 0, 0, 0), 1.5), "images"),
        (lambda p: setattr(p, "masks", p.masks.astype(np.uint8)), "masks"),
        (lambda p: setattr(p, "labels", np.array([0, 1, 2, 0])), "labels"),
        (lambda p: setattr(p, "labels", np.array([0, 1])), "labels"),
        (lambda p: setattr(p, "band_names", ["blue"]), "band_names"),
        (lambda p: setattr(p, "twins", p.twins[:, :3]), "twins"),
    ],
)
def test_validation_names_the_array(change, array):
    pack = make_pack()
    change(pack)
    with pytest.raises(XbenchInputError) as info:
        validate_pack(pack, "mine.npz")
    assert f"mine.npz: array '{array}'" in str(info.value)


def test_missing_arrays_are_named(tmp_path):
    path = tmp_path / "bad.npz"
    np.savez(path, images=np.zeros((1, 6, 4, 4), np.float32))
    with pytest.raises(XbenchInputError, match="missing array.*labels"):
        load_pack(path)


def test_toml_syntax_error_names_file_and_line(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text('name = "x"\nsize = = 3\n')
    with pytest.raises(XbenchInputError) as info:
        load_toml(path)
    assert "broken.toml" in str(info.value) and "line 2" in str(info.value)


def tiny_torch_model() -> torch.nn.Module:
    torch.manual_seed(0)
    return torch.nn.Sequential(
        torch.nn.Conv2d(6, 4, 3, padding=1),
        torch.nn.ReLU(),
        torch.nn.AdaptiveAvgPool2d(1),
        torch.nn.Flatten(),
        torch.nn.Linear(4, 2),
    )


def test_handle_counts_images_forward_and_backward():
    handle = ModelHandle("tiny", 2, module=tiny_torch_model().eval())
    x = np.random.default_rng(1).uniform(0, 1, (5, 6, 8, 8)).astype(np.float32)
    with handle.counting() as calls:
        probs = handle.probabilities(x)
        t = torch.from_numpy(x).requires_grad_()
        handle.logits_tensor(t)[:, 0].sum().backward()
    assert probs.shape == (5, 2)
    np.testing.assert_allclose(probs.sum(axis=1), 1.0, rtol=1e-12)  # softmax rows sum to 1 (definition)
    assert (calls.forward, calls.backward) == (10, 5)


def test_handle_switches_training_mode_to_eval_with_warning():
    with pytest.warns(UserWarning, match="training mode"):
        handle = ModelHandle("tiny", 2, module=tiny_torch_model())
    assert not handle.module.training


def test_black_box_output_is_checked():
    x = np.zeros((3, 6, 4, 4), np.float32)
    wrong_shape = ModelHandle("box", 2, predict_fn=lambda imgs: np.zeros((len(imgs), 3)))
    with pytest.raises(XbenchInputError, match="output.*wrong shape"):
        wrong_shape.probabilities(x)
    non_finite = ModelHandle("box", 2, predict_fn=lambda imgs: np.full((len(imgs), 2), np.nan))
    with pytest.raises(XbenchInputError, match="non-finite"):
        non_finite.probabilities(x)


def test_layer_lookup_lists_layers():
    handle = ModelHandle("tiny", 2, module=tiny_torch_model().eval())
    assert handle.default_layer() == "0"
    with pytest.raises(XbenchInputError) as info:
        handle.get_layer("conv9")
    assert "layer not found" in str(info.value) and "one of 0, 1, 2, 3, 4" in str(info.value)


def test_pack_archive_stores_reflectances_and_deflates_the_rest(tmp_path):
    # Reflectances barely compress (noise texture) and cost most of the deflate time: kept stored; masks and the
    # rest deflated. The archive is an ordinary .npz (numpy.load reads it) and the same pack gives the same bytes.
    import zipfile

    pack = make_pack()
    first = save_pack(pack, tmp_path / "a.npz")
    second = save_pack(pack, tmp_path / "b.npz")
    assert first.read_bytes() == second.read_bytes()
    with zipfile.ZipFile(first) as archive:
        kinds = {info.filename: info.compress_type for info in archive.infolist()}
    assert kinds["images.npy"] == kinds["twins.npy"] == zipfile.ZIP_STORED
    assert kinds["masks.npy"] == kinds["labels.npy"] == zipfile.ZIP_DEFLATED
    with np.load(first) as data:
        np.testing.assert_array_equal(data["images"], pack.images)
        np.testing.assert_array_equal(data["masks"], pack.masks)
