"""Transplant mode: structures planted into real background tiles; exact twins, scene-matched materials,
a model trained on transplanted tiles relies on the planted type."""

from __future__ import annotations

import textwrap

import numpy as np
import pytest

from xbench.imagery.generate import write_vellardine_geotiff
from xbench.imagery.raster import read_raster_tiles
from xbench.imagery.transplant import PALETTE_RANGES, scene_palette, transplant, transplant_recipe
from xbench.scenes import BANDS, LIBRARY, load_recipe, ndvi

PRESENCE = {
    "road": 0.5,
    "clearing": 0.5,
    "river": 0.4,
    "natural-gap": 0.3,
    "outcrop": 0.3,
    "building": 0.3,
    "corridor": 0.3,
    "field": 0.0,
}


@pytest.fixture(scope="module")
def scene_file(tmp_path_factory):
    return write_vellardine_geotiff(tmp_path_factory.mktemp("bg") / "scene.tif", size=320)


@pytest.fixture(scope="module")
def backgrounds(scene_file):
    return read_raster_tiles(scene_file, 32)


@pytest.fixture(scope="module")
def planted(backgrounds):
    pack, scenes = transplant(
        "conifer-upland",
        backgrounds.images,
        60,
        3,
        presence=PRESENCE,
        georef=backgrounds.georef,
        georef_meta=backgrounds.georef_meta(),
    )
    return pack, scenes


def test_tile_differs_from_its_twin_only_under_planted_coverage(backgrounds, planted):
    pack, scenes = planted
    n_bg = len(backgrounds.images)
    assert pack.twins is not None
    for i in range(len(pack)):
        bg = backgrounds.images[i % n_bg]
        # the twin is the untouched real tile, bit for bit
        np.testing.assert_array_equal(pack.twins[i], bg)
        covered = pack.coverage[i].sum(axis=0) > 0
        changed = (pack.images[i] != pack.twins[i]).any(axis=0)
        assert not (changed & ~covered).any()
        np.testing.assert_array_equal(pack.images[i][:, ~covered], bg[:, ~covered])
        np.testing.assert_array_equal(pack.georef[i], backgrounds.georef[i % n_bg])
    assert sum(len(s.instances) for s in scenes) > 40
    # per-instance twins (after the cached fields were released): leaving one instance out changes
    # exactly the pixels it visibly covers
    for scene in scenes[:12]:
        full = scene.render()
        for inst in scene.instances:
            diff = (scene.render(omit=[inst.instance_id]) != full).any(axis=0)
            assert not (diff & ~(inst.coverage > 0)).any()
        np.testing.assert_array_equal(scene.render(omit=scene.instance_ids()), scene.background)


def test_scene_materials_keep_their_ndvi_ranges(backgrounds, planted):
    palette = scene_palette(backgrounds.images, backgrounds.band_names)
    # the generated scene holds bare soil (a ploughed field), conifer forest and lakes
    assert set(palette.spectra) == set(PALETTE_RANGES)
    # NDVI ranges of the trade (common practice; Rouse et al. 1974): dense vegetation 0.6-0.9,
    # bare soil 0.05-0.3, water below 0, asphalt near 0
    assert 0.05 < ndvi(palette.spectra["scene-soil"]) < 0.3
    assert 0.6 < ndvi(palette.spectra["scene-vegetation"]) < 0.9
    assert ndvi(palette.spectra["scene-water"]) < 0
    assert abs(ndvi(LIBRARY["asphalt"].spectrum)) < 0.1
    assert 0.05 < ndvi(LIBRARY["gravel"].spectrum) < 0.3
    pack, scenes = planted
    seen = set()
    for scene in scenes:
        for inst in scene.instances:
            material, value = inst.params.get("material"), float(ndvi(inst.look["s1"]))
            seen.add((inst.kind, material))
            if material == "scene-soil":
                assert 0.05 < value < 0.3
            elif material in ("scene-water", "river-water", "lake-water"):
                assert value < 0
            elif material == "asphalt":
                assert abs(value) < 0.1
    # clear-cuts show the scene's own soil, rivers its own water; roads keep their made surfaces
    assert ("clearing", "scene-soil") in seen and ("river", "scene-water") in seen
    assert {m for k, m in seen if k == "road"} <= {"gravel", "asphalt"}
    assert pack.meta["transplant"]["palette"]["scene-soil"]["pixels"] >= 16


def test_without_soil_pixels_the_library_material_stays():
    forest = np.broadcast_to(LIBRARY["conifer"].spectrum[None, :, None, None], (4, 6, 16, 16)).copy()
    palette = scene_palette(forest, BANDS)
    assert "scene-soil" not in palette.spectra and "scene-vegetation" in palette.spectra
    rec = transplant_recipe("conifer-upland", palette)
    assert rec.spec("clearing").params["material"] == load_recipe("conifer-upland").spec("clearing").params["material"]
    # the shipped recipe object is left as it was
    assert "scene-vegetation" not in load_recipe("conifer-upland").materials


TASK = """
name = "transplant-small"
seeds = [0]

[data]
recipe = "conifer-upland"
backgrounds = ["{scene}"]
size = 32
train = 200
val = 40
test = 48
seed = 3

[data.presence]
road = 0.5
river = 0.3
clearing = 0.0
natural-gap = 0.0
outcrop = 0.2
building = 0.0
corridor = 0.0

[data.labels]
classes = ["intact", "road"]
default = "intact"

[[data.labels.rule]]
class = "road"
type = "road"
stat = "coverage"
above = 0.008

[[models]]
name = "cnn"
kind = "cnn"
width = 8
epochs = 6
patience = 3
batch_size = 16

[run]
explain_tiles = 32
gallery_tiles = 4
"""


@pytest.mark.slow
def test_model_trained_on_transplanted_tiles_relies_on_the_planted_type(tmp_path, scene_file, one_torch_thread):
    from xbench.models.train import train_model
    from xbench.tasks import build_task_data, load_task
    from xbench.truth import compute_reliance

    path = tmp_path / "transplant.toml"
    path.write_text(textwrap.dedent(TASK).replace("{scene}", str(scene_file)))
    task = load_task(path)
    data = build_task_data(task)
    assert data.test.twins is not None and len(data.test_scenes) == 48 and data.test.georef.shape == (48, 9)
    trained = train_model(task, data, task.models[0], seed=0)
    rel = compute_reliance(trained.handle, data.test_scenes, data.test.labels, seed=0, n_boot=300)
    road = rel.type_table[rel.type_table["kind"] == "road"].iloc[0]
    assert road["ci_low"] > 0, rel.type_table


def test_synth_with_backgrounds_writes_a_transplanted_pack(tmp_path, scene_file, capsys):
    from xbench.cli import main
    from xbench.data import load_pack

    out = tmp_path / "tiles"
    args = ["synth", "--recipe", "conifer-upland", "--backgrounds", str(scene_file), "--count", "6"]
    assert main(args + ["--size", "32", "--twins", "--presence", "road=1", "--no-preview", "--out", str(out)]) == 0
    assert "skipped for nodata" in capsys.readouterr().out
    pack = load_pack(out / "tiles.npz")
    assert pack.twins is not None and pack.georef is not None and pack.meta["source"] == "xbench.imagery.transplant"
    road = pack.coverage[:, pack.mask_names.index("road")]
    assert (road.sum(axis=(1, 2)) > 0).all()  # road=1 forces a road into every tile
    changed = (pack.images != pack.twins).any(axis=1)
    assert not (changed & ~(pack.coverage.sum(axis=1) > 0)).any()
