"""A task made from a generated GeoTIFF plus a GeoJSON runs end to end through the CLI."""

from __future__ import annotations

import json
import textwrap

import numpy as np
import pandas as pd
import pytest

from xbench.imagery.generate import ORIGIN, PIXEL, write_annotated_example

TASK = """
name = "my-geotiff"
seeds = [0]

[data]
rasters = ["scene.tif"]
annotations = "annotations.geojson"
class_attribute = "kind"
line_width = 12.0
size = 32
train = 40
val = 10
test = 12

[data.labels]
classes = ["intact", "road", "clearing"]
default = "intact"

[[data.labels.rule]]
class = "clearing"
type = "clearing"
stat = "coverage"
above = 0.01

[[data.labels.rule]]
class = "road"
type = "road"
stat = "coverage"
above = 0.008

[[models]]
name = "forest"
kind = "forest"
n_trees = 20

[explainers]
keys = ["occlusion", "random", "oracle"]

[metrics]
keys = ["mass-accuracy", "deletion-auc", "gini"]

[metrics.settings.deletion-auc]
baseline = "blur"

[run]
explain_tiles = 6
gallery_tiles = 2
"""


@pytest.mark.slow
def test_geotiff_plus_geojson_task_runs_from_the_cli(tmp_path, capsys, one_torch_thread):
    from xbench.cli import main
    from xbench.tasks import build_task_data, load_task

    write_annotated_example(tmp_path, tiles_per_side=4, tile=64, seed=5)
    task_file = tmp_path / "task.toml"
    task_file.write_text(textwrap.dedent(TASK))

    task = load_task(task_file)
    data = build_task_data(task)
    # 4 x 4 synthetic tiles of 64 px = a 256 px scene = 64 tiles of 32 px, 1 skipped for the nodata corner
    assert len(data.train) == 40 and data.test.twins is None and data.test.georef.shape == (12, 9)
    assert data.test.mask_names == ["road", "clearing"] and data.test.coverage is not None
    # tile georeference: the transform's origin is the map position of the tile's pixel row/col
    g = data.train.georef[0]
    assert (g[5], g[8]) == (ORIGIN[0] + g[2] * PIXEL, ORIGIN[1] - g[1] * PIXEL)
    # labels follow the rule on the annotation coverage
    road = data.train.coverage[:, 0].mean(axis=(1, 2))
    clearing = data.train.coverage[:, 1].mean(axis=(1, 2))
    want = np.where(clearing > 0.01, 2, np.where(road > 0.008, 1, 0))
    np.testing.assert_array_equal(data.train.labels, want)
    georef = pd.read_csv(task.data.pack.replace("tiles.npz", "georef.csv"))
    test_rows = georef[georef.split == "test"]
    assert len(test_rows) == 12 and test_rows.tile.tolist() == list(range(12))

    out = tmp_path / "run"
    assert main(["run", str(task_file), "--out", str(out), "--quiet"]) == 0
    records = pd.read_parquet(out / "records.parquet")
    assert set(records.metric) == {"mass-accuracy", "deletion-auc", "gini"}
    planted = records[(records.metric == "mass-accuracy") & (records.truth == "planted")]
    means = planted.groupby("explainer").value.mean()
    assert means["oracle"] == pytest.approx(1.0) and means["oracle"] > means["random"]
    manifest = json.loads((out / "manifest.json").read_text())
    notes = [n for c in manifest["cells"] for n in c["notes"].values()]
    assert any("verified" in n or "twins" in n for n in notes)  # no twins: skipped, with the reason
    assert manifest["data"]["pack"] == task.data.pack
    # the run folder says where each explained test tile lies: the records' tile -> raster, row/col, CRS
    run_georef = pd.read_csv(out / "georef.csv")
    assert run_georef.tile.tolist() == list(range(12)) and set(run_georef.split) == {"test"}
    pd.testing.assert_frame_equal(
        run_georef[["tile", "row", "col", "a", "c", "f"]].reset_index(drop=True),
        test_rows[["tile", "row", "col", "a", "c", "f"]].reset_index(drop=True),
        check_dtype=False,
    )
