"""Landscape synthesizer: spectra, geometry, twins, determinism, labels, bad input, CLI."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import binom

from xbench.cli import main as cli_main
from xbench.data import load_pack
from xbench.errors import XbenchInputError
from xbench.scenes import (
    ALL_TYPES,
    BANDS,
    HUMAN_TYPES,
    LOOKALIKE_TYPES,
    list_recipes,
    load_recipe,
    ndvi,
    parse_cue,
    parse_label_rule,
    rebuild_scenes,
    render,
    sample_scene,
    scenes_to_json,
    synthesize,
)
from xbench.scenes.geometry import disc_coverage, polygons_coverage, shoelace_area, stroke_polygon
from xbench.schema import Where

RECIPES = list_recipes()
ALL_ON = {t: 1.0 for t in ALL_TYPES}
NIR, RED = BANDS.index("nir"), BANDS.index("red")


def test_shipped_recipes():
    assert {"conifer-upland", "lowland-farmland", "wetland-mosaic"} <= set(RECIPES)
    assert set(HUMAN_TYPES) == {"road", "clearing", "building", "corridor", "field"}
    assert set(LOOKALIKE_TYPES) == {"river", "natural-gap", "outcrop"}


# ---------------------------------------------------------------------------------------------- spectra


@pytest.mark.parametrize("name", RECIPES)
def test_material_spectra_in_typical_ranges(name):
    recipe = load_recipe(name)
    for m in recipe.materials.values():
        s = m.spectrum
        assert s.shape == (6,) and np.isfinite(s).all() and (s >= 0).all() and (s <= 1).all(), m.name
        v = float(ndvi(s))
        # NDVI (Rouse et al. 1974); ranges are common practice, from memory
        if m.kind == "vegetation":
            assert 0.6 <= v <= 0.9, (m.name, v)
            assert s[NIR] > s[RED], m.name
        elif m.kind == "water":
            assert v < 0, (m.name, v)
            assert s[NIR] < 0.05, m.name
        elif m.kind == "soil":
            assert 0.05 <= v <= 0.3, (m.name, v)
            assert np.all(np.diff(s[:5]) > 0), f"{m.name}: soil rises with wavelength up to swir1"
        elif m.kind == "dry-vegetation":
            assert 0.2 <= v <= 0.55, (m.name, v)


def _pure_pixels(scene, k):
    f = scene.fields()
    free = scene.type_coverage(ALL_TYPES) == 0
    return (f["weights"][k] > 0.999) & free


@pytest.mark.parametrize("name", RECIPES)
def test_rendered_background_spectra(name):
    recipe = load_recipe(name)
    matrix = int(np.argmax([c.share for c in recipe.landcover]))
    water = [i for i, c in enumerate(recipe.landcover) if recipe.materials[c.material].kind == "water"]
    veg_ndvi, water_ndvi = [], []
    for seed in range(6):
        scene = sample_scene(recipe, 64, seed)
        img = render(scene)
        # reflectance finite and within [0, 1]
        assert img.dtype == np.float32 and np.isfinite(img).all() and img.min() >= 0 and img.max() <= 1
        nd = ndvi(img)
        sel = _pure_pixels(scene, matrix)
        if sel.sum() > 20:
            veg_ndvi.append(float(np.median(nd[sel])))
            assert np.median(img[NIR][sel]) > np.median(img[RED][sel])  # vegetation: nir > red
        for k in water:
            sel = _pure_pixels(scene, k)
            if sel.sum() > 20:
                water_ndvi.append(float(np.median(nd[sel])))
    assert veg_ndvi, "no pure matrix pixels sampled"
    if recipe.materials[recipe.landcover[matrix].material].kind == "vegetation":
        # vegetated background NDVI 0.6-0.9 (common practice; NDVI per Rouse et al. 1974)
        assert all(0.6 <= v <= 0.9 for v in veg_ndvi), veg_ndvi
    assert all(v < 0 for v in water_ndvi), water_ndvi  # open water NDVI < 0 (common practice)


def test_rendered_structures_keep_their_spectra():
    recipe = load_recipe("conifer-upland")
    soil_ndvi = []
    for seed in range(8):
        scene = sample_scene(recipe, 64, seed, presence={"road": 1.0})
        img = render(scene)
        for inst in scene.instances:
            if inst.kind == "road" and not inst.params["paved"]:
                sel = inst.coverage >= 0.999
                if sel.sum() >= 5:
                    soil_ndvi.append(float(np.median(ndvi(img)[sel])))
    assert soil_ndvi
    # bare soil / gravel NDVI 0.05-0.3 (common practice, from memory)
    assert all(0.05 <= v <= 0.3 for v in soil_ndvi), soil_ndvi


# --------------------------------------------------------------------------------------------- geometry


@st.composite
def star_polygons(draw):
    """Simple polygons, star-shaped around their centre: vertices in angular order, every angular gap
    below pi (jittered even spacing), random radii."""
    n = draw(st.integers(3, 14))
    cx = draw(st.floats(20, 44))
    cy = draw(st.floats(20, 44))
    r = draw(st.floats(4.5, 16))
    jitter = np.array(draw(st.lists(st.floats(-0.2, 0.2), min_size=n, max_size=n)))
    turn = draw(st.floats(0, 2 * np.pi))
    angles = turn + (np.arange(n) + jitter) * (2 * np.pi / n)
    radii = np.array(draw(st.lists(st.floats(0.45, 1.0), min_size=n, max_size=n))) * r
    poly = np.stack([cx + radii * np.cos(angles), cy + radii * np.sin(angles)], axis=1)
    if draw(st.booleans()):
        poly = poly[::-1]
    return poly


@settings(max_examples=150, deadline=None)
@given(star_polygons())
def test_polygon_area_matches_shoelace(poly):
    area = abs(shoelace_area(poly))
    if area < 50:
        return
    patch = polygons_coverage([poly], 64, 64)
    cov = patch.full(64, 64)
    assert cov.min() >= 0 and cov.max() <= 1
    # raster area within 2% of the shoelace area (Gauss's area formula)
    assert abs(float(cov.sum()) - area) <= 0.02 * area


@settings(max_examples=100, deadline=None)
@given(st.floats(4.0, 20.0), st.floats(0, 1), st.floats(0, 1))
def test_disc_area_matches_pi_r2(r, fx, fy):
    cx = r + fx * (64 - 2 * r)
    cy = r + fy * (64 - 2 * r)
    cov = disc_coverage(cx, cy, r, 64, 64).full(64, 64)
    assert abs(float(cov.sum()) - np.pi * r * r) <= 0.02 * np.pi * r * r
    # the same disc as a 720-gon through the polygon rasteriser
    t = np.linspace(0, 2 * np.pi, 720, endpoint=False)
    poly = np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], axis=1)
    cov2 = polygons_coverage([poly], 64, 64).full(64, 64)
    assert np.abs(cov2 - cov).max() <= 2 / 64 + 1e-6


def test_coverage_clipped_at_tile_edge_and_thin_lines_antialiased():
    sq = np.array([[-10.0, -10.0], [10.0, -10.0], [10.0, 10.0], [-10.0, 10.0]])
    assert polygons_coverage([sq], 64, 64).area() == pytest.approx(100.0)
    assert polygons_coverage([sq + 100], 64, 64) is None
    # a road 0.5 px wide crossing the tile mixes with the background: coverage ~0.5 per pixel
    line = stroke_polygon(np.array([[-2.0, 30.2], [66.0, 30.2]]), 0.25)
    cov = polygons_coverage([line], 64, 64).full(64, 64)
    assert cov.max() < 1 and cov[30].mean() == pytest.approx(0.5, abs=0.02)
    assert cov.sum() == pytest.approx(32.0, rel=0.02)


# ------------------------------------------------------------------------------------------------ twins


def _changed(a, b):
    return (a != b).any(axis=0)


@pytest.mark.parametrize("name", RECIPES)
def test_twin_differs_exactly_where_structures_are(name):
    recipe = load_recipe(name)
    for seed in range(4):
        scene = sample_scene(recipe, 64, seed, presence=ALL_ON)
        assert {i.kind for i in scene.instances} >= {"road", "clearing", "river"}
        full = render(scene)
        twin = render(scene, omit=scene.instance_ids())
        union = scene.type_coverage(ALL_TYPES) > 0
        changed = _changed(full, twin)
        assert not changed[~union].any(), "twin differs outside the planted structures"
        assert changed[union].all(), "twin equals the image somewhere inside a planted structure"
        assert np.array_equal(full[:, ~union], twin[:, ~union])  # bit-identical outside


def test_per_instance_twins():
    recipe = load_recipe("conifer-upland")
    for seed in range(3):
        scene = sample_scene(recipe, 64, 100 + seed, presence=ALL_ON, cue={"kind": "haze-patch", "strength": 0.05})
        full = render(scene)
        total = np.zeros((64, 64), dtype=np.float32)
        for inst in scene.instances:
            cov = inst.coverage
            total += cov
            assert cov.dtype == np.float32 and cov.min() >= 0 and cov.max() <= 1 and cov.any()
            changed = _changed(full, render(scene, omit=[inst.instance_id]))
            assert np.array_equal(changed, cov > 0), (inst.kind, inst.instance_id)
        assert total.max() <= 1 + 1e-6  # visible coverages never add up beyond the pixel


@settings(max_examples=12, deadline=None)
@given(st.sampled_from(RECIPES), st.integers(0, 2**40), st.sampled_from([24, 40, 64]))
def test_twins_property_over_seeds(name, seed, size):
    scene = sample_scene(name, size, seed, presence={"road": 0.7, "clearing": 0.7, "building": 0.5, "river": 0.5})
    full = render(scene)
    assert full.shape == (6, size, size)
    union = scene.type_coverage(ALL_TYPES) > 0
    assert np.array_equal(_changed(full, render(scene, omit=scene.instance_ids())), union)
    if scene.instances:
        inst = scene.instances[seed % len(scene.instances)]
        assert np.array_equal(_changed(full, render(scene, omit=[inst.instance_id])), inst.coverage > 0)


def test_pack_twins_and_masks():
    pack, scenes = synthesize("conifer-upland", 12, seed=5, twins=True, presence={"road": 1, "clearing": 0.5})
    assert pack.twins is not None and pack.twins.shape == pack.images.shape
    for i, scene in enumerate(scenes):
        changed = _changed(pack.images[i], pack.twins[i])
        assert np.array_equal(changed, pack.masks[i].any(axis=0))
        assert np.array_equal(pack.masks[i], scene.type_masks(pack.mask_names))
        assert np.array_equal(pack.masks[i], pack.coverage[i] > 0)
        # scenes re-render to the pack after their caches were released
        assert np.array_equal(render(scene), pack.images[i])
    assert pack.masks[:, pack.mask_names.index("road")].any(axis=(1, 2)).all()  # presence 1 forces it


def test_scenes_rebuild_from_pack_meta_and_serialise():
    cue = {"kind": "haze-patch", "strength": 0.04, "radius": 10}
    pack, scenes = synthesize("wetland-mosaic", 6, seed=8, size=32, cue=cue, cue_rate=0.7)
    again = rebuild_scenes(pack.meta, pack.cue)
    for a, b, img in zip(scenes, again, pack.images, strict=True):
        assert a.seed == b.seed and a.cue_on == b.cue_on
        assert np.array_equal(render(b), img)
    doc = json.loads(json.dumps(scenes_to_json(scenes)))
    assert [len(t["instances"]) for t in doc] == [len(s.instances) for s in scenes]
    assert all(i["kind"] in ALL_TYPES for t in doc for i in t["instances"])


def test_cue_on_and_off():
    scene = sample_scene("conifer-upland", 64, 3, cue={"kind": "band-offset", "band": "blue", "strength": 0.03})
    assert scene.cue_on
    on, off = render(scene), render(scene, cue=False)
    diff = on - off
    assert np.allclose(diff[0][(off[0] > 0) & (on[0] < 1)], 0.03, atol=1e-6)
    assert not diff[1:].any()
    scene.cue_on = False
    assert np.array_equal(render(scene), off)
    assert np.array_equal(render(scene, cue=True), on)


# ------------------------------------------------------------------------------------------ determinism


def test_determinism():
    a, sa = synthesize("conifer-upland", 6, seed=11, twins=True, label_noise=0.3)
    b, sb = synthesize("conifer-upland", 6, seed=11, twins=True, label_noise=0.3)
    for name in ("images", "twins", "masks", "coverage", "labels", "clean_labels"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert scenes_to_json(sa) == scenes_to_json(sb)
    c, _ = synthesize("conifer-upland", 6, seed=12)
    assert not np.array_equal(a.images, c.images)
    # the first tiles of a longer run are the tiles of a shorter one
    d, _ = synthesize("conifer-upland", 9, seed=11, twins=True, label_noise=0.3)
    assert np.array_equal(d.images[:6], a.images)
    # presence of one type leaves the landscape (and the other types) as they were
    s1 = sample_scene("conifer-upland", 64, 7, presence={"road": 0.0})
    s2 = sample_scene("conifer-upland", 64, 7, presence={"road": 1.0})
    assert np.array_equal(s1.fields()["background"], s2.fields()["background"])
    assert [i.params for i in s1.instances if i.kind == "clearing"] == [
        i.params for i in s2.instances if i.kind == "clearing"
    ]


# ----------------------------------------------------------------------------------------------- labels


def test_label_rules_match_planted_statistics():
    rule = parse_label_rule(
        {
            "classes": ["intact", "road", "clearing", "building"],
            "default": "intact",
            "rule": [
                {"class": "building", "type": "building", "stat": "count", "above": 1},
                {"class": "road", "type": ["road", "corridor"], "stat": "coverage", "above": 0.02},
                {"class": "clearing", "type": "clearing", "stat": "count", "above": 0},
            ],
        },
        "test",
    )
    presence = {"road": 0.5, "corridor": 0.2, "clearing": 0.5, "building": 0.3}
    pack, scenes = synthesize("conifer-upland", 40, seed=2, presence=presence, label_rule=rule)
    assert pack.class_names == ["intact", "road", "clearing", "building"]
    names = pack.mask_names
    road_cov = np.clip(pack.coverage[:, names.index("road")] + pack.coverage[:, names.index("corridor")], 0, 1)
    seen = set()
    for i, scene in enumerate(scenes):
        n_build = sum(inst.kind == "building" for inst in scene.instances)
        n_clear = sum(inst.kind == "clearing" for inst in scene.instances)
        frac = float(road_cov[i].mean())
        want = 3 if n_build > 1 else 1 if frac > 0.02 else 2 if n_clear > 0 else 0
        assert pack.labels[i] == want == rule.apply(scene)
        seen.add(want)
    assert seen >= {0, 1, 2}
    assert rule.driving_types(1) == ["road", "corridor"]
    assert rule.driving_types(0) == []
    assert pack.meta["label_rule"].startswith("building if count(building) > 1")


def test_label_noise_flips_the_stated_fraction():
    n, rate = 300, 0.2
    pack, _ = synthesize("lowland-farmland", n, seed=4, size=24, label_noise=rate)
    flips = int((pack.labels != pack.clean_labels).sum())
    # binomial bounds (scipy.stats.binom), two-sided 99.9%
    assert binom.ppf(0.0005, n, rate) <= flips <= binom.ppf(0.9995, n, rate)
    none, _ = synthesize("lowland-farmland", 50, seed=4, size=24)
    assert np.array_equal(none.labels, none.clean_labels)


def test_cue_correlates_with_label_at_the_chosen_rate():
    n, rate = 300, 0.85
    pack, scenes = synthesize(
        "conifer-upland", n, seed=9, size=24, cue={"kind": "band-offset", "strength": 0.02}, cue_rate=rate
    )
    default = pack.class_names.index("intact")
    pos = pack.clean_labels != default
    assert pack.cue is not None and [s.cue_on for s in scenes] == pack.cue.tolist()
    k_pos, n_pos = int(pack.cue[pos].sum()), int(pos.sum())
    k_neg, n_neg = int(pack.cue[~pos].sum()), int((~pos).sum())
    # binomial bounds (scipy.stats.binom), two-sided 99.9%
    assert binom.ppf(0.0005, n_pos, rate) <= k_pos <= binom.ppf(0.9995, n_pos, rate)
    assert binom.ppf(0.0005, n_neg, 1 - rate) <= k_neg <= binom.ppf(0.9995, n_neg, 1 - rate)


def test_presence_overrides_catalogue():
    for seed in range(5):
        on = sample_scene("wetland-mosaic", 48, seed, presence={"building": 1.0, "river": 0.0})
        kinds = [i.kind for i in on.instances]
        assert "building" in kinds and "river" not in kinds


# -------------------------------------------------------------------------------------------- bad input


BASE = """
name = "bad"
[materials.moss]
reflectance = [0.04, 0.06, 0.06, 0.24, 0.18, 0.1]
kind = "wetland"
[[landcover]]
name = "forest"
material = "conifer"
share = 0.8
[[landcover]]
name = "bog"
material = "moss"
share = 0.2
[structures.road]
probability = 0.5
width = [0.5, 1.0]
"""


@pytest.mark.parametrize(
    "old, new, key, problem",
    [
        ('material = "moss"', 'material = "mud"', "landcover[1].material", "unknown material"),
        ("[structures.road]", "[structures.canal]", "structures.canal", "unknown structure type"),
        ("share = 0.2", "share = 0.3", "landcover", "more than 1"),
        ("width = [0.5, 1.0]", "width = [-0.5, 1.0]", "structures.road.width", "out of range"),
        (
            "width = [0.5, 1.0]",
            'paved_material = "tarmac"',
            "structures.road.paved_material",
            "unknown material",
        ),
        ("width = [0.5, 1.0]", "wdth = 1.0", "structures.road.wdth", "unknown key"),
        ('kind = "wetland"', 'kind = "swamp"', "materials.moss.kind", "not an allowed value"),
        ("reflectance = [0.04,", "reflectance = [1.04,", "materials.moss.reflectance", "out of range"),
        (
            "[structures.road]",
            '[labels]\nclasses = ["a", "b"]\n[[labels.rule]]\nclass = "b"\ntype = "road"\n'
            'stat = "mean"\n[structures.road]',
            "labels.rule[0].stat",
            "not an allowed value",
        ),
        (
            "[structures.road]",
            '[labels]\nclasses = ["a", "b"]\n[[labels.rule]]\nclass = "c"\ntype = "road"\n[structures.road]',
            "labels.rule[0].class",
            "not one of the classes",
        ),
    ],
)
def test_bad_recipe_names_file_and_key(tmp_path, old, new, key, problem):
    assert old in BASE
    path = tmp_path / "bad.toml"
    path.write_text(BASE.replace(old, new, 1))
    with pytest.raises(XbenchInputError) as err:
        load_recipe(path)
    msg = str(err.value)
    assert "\n" not in msg and str(path) in msg and key in msg and problem in msg, msg
    # The one error format names the line: it holds the changed text, or the key's table starts there.
    line = int(re.search(rf"{re.escape(str(path))} line (\d+), key ", msg).group(1))
    lines = BASE.replace(old, new, 1).splitlines()
    named = lines[line - 1]
    assert key.split(".")[-1].split("[")[0] in named or named.startswith("["), (msg, named)


def test_base_recipe_is_valid(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text(BASE)
    r = load_recipe(path)
    assert [c.share for c in r.landcover] == [0.8, 0.2]


def test_toml_syntax_error_names_line(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text(BASE.replace("share = 0.2", "share = = 0.2"))
    with pytest.raises(XbenchInputError, match=r"broken\.toml.*line 13"):
        load_recipe(path)


def test_unknown_recipe_lists_shipped():
    with pytest.raises(XbenchInputError) as err:
        load_recipe("vellardine-valley")
    assert "vellardine-valley" in str(err.value) and all(n in str(err.value) for n in RECIPES)


@pytest.mark.parametrize(
    "table, key",
    [
        ({"classes": ["a"]}, "classes"),
        ({"classes": ["a", "b"], "default": "z", "rule": []}, "default"),
        ({"classes": ["a", "b"], "rule": [{"class": "b", "type": "lake"}]}, "rule[0].type"),
        ({"classes": ["a", "b"], "rule": [{"class": "b", "type": "road", "above": -1}]}, "rule[0].above"),
        (
            {"classes": ["a", "b"], "rule": [{"class": "b", "type": "road", "expr": "__import__('os')"}]},
            "rule[0].expr",
        ),
        ({"classes": ["a", "b", "c"], "rule": [{"class": "b", "type": "road"}]}, "rule"),
    ],
)
def test_bad_label_rule(table, key):
    # One error format (xbench.schema): "SOURCE line L, key K: problem (expected E, found F)".
    where = Where("tasks/t.toml", "labels")
    with pytest.raises(XbenchInputError) as err:
        parse_label_rule(table, where)
    assert str(err.value).startswith(f"tasks/t.toml, key labels.{key}"), str(err.value)


def test_bad_cue_and_presence():
    with pytest.raises(XbenchInputError, match=r"^cue, key band: not an allowed value"):
        parse_cue({"kind": "band-offset", "band": "uv"}, "cue")
    with pytest.raises(XbenchInputError, match=r"^cue, key strength: out of range"):
        parse_cue({"strength": 2}, "cue")
    with pytest.raises(XbenchInputError, match=r"presence\.canal"):
        sample_scene("conifer-upland", 32, 0, presence={"canal": 1})


# -------------------------------------------------------------------------------------------------- CLI


def test_cli_synth_writes_three_files(tmp_path, capsys):
    out = tmp_path / "out"
    assert (
        cli_main(["synth", "--recipe", "conifer-upland", "--count", "5", "--seed", "3", "--twins", "--out", str(out)])
        == 0
    )
    for f in ("tiles.npz", "scenes.json", "preview.png"):
        assert (out / f).is_file() and (out / f).stat().st_size > 0, f
    pack = load_pack(out / "tiles.npz")
    assert pack.images.shape == (5, 6, 64, 64) and pack.twins is not None and pack.coverage is not None
    assert pack.meta["recipe"] == "conifer-upland" and pack.meta["seed"] == 3
    scenes = json.loads((out / "scenes.json").read_text())
    assert len(scenes["tiles"]) == 5 and all("instances" in t for t in scenes["tiles"])
    assert (out / "preview.png").read_bytes()[:4] == b"\x89PNG"
    assert cli_main(["synth", "--list"]) == 0
    assert "conifer-upland" in capsys.readouterr().out


def test_cli_synth_bad_recipe_one_line(tmp_path, capsys):
    assert cli_main(["synth", "--recipe", "nowhere", "--count", "2", "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "unknown recipe" in err and "conifer-upland" in err
