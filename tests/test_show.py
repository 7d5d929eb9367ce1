"""`xbench show`: one tile's panels from a run folder's gallery artifact (a small fabricated run)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xbench.cli import main
from xbench.report import figures as F

EXPLAINERS = ["gradient", "grad-cam", "random"]
TILES = [3, 5, 8]  # test-tile indices kept in the gallery


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("show-run")
    rng = np.random.default_rng(0)
    g, size = len(TILES), 16
    planted = np.zeros((g, size, size), bool)
    planted[:, 4:9, 5:11] = True
    arrays = {
        "images": rng.random((g, 6, size, size)).astype(np.float32),
        "band_names": np.array(["blue", "green", "red", "nir", "swir1", "swir2"]),
        "planted": planted,
        "evidence": planted.astype(np.float32) * 0.8,
        "tiles": np.array(TILES),
        "class_names": np.array(["intact", "road"]),
        "targets": np.array([1, 1, 0]),
    }
    for e in EXPLAINERS:
        arrays[f"map__{e}"] = rng.random((g, size, size)).astype(np.float32)
    (folder / "artifacts").mkdir()
    np.savez(folder / "artifacts" / "gallery__upland__cnn__0.npz", **arrays)
    # mass-accuracy per tile: grad-cam is worst on tile 5 (0.1), gradient worst on tile 8 (0.2)
    values = {"gradient": [0.7, 0.6, 0.2], "grad-cam": [0.8, 0.1, 0.9], "random": [0.3, 0.3, 0.3]}
    rows = [
        ("r", "upland", "cnn", 0, e, "mass-accuracy", "planted", t, v)
        for e, vs in values.items()
        for t, v in zip(TILES, vs, strict=True)
    ]
    cols = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
    pd.DataFrame(rows, columns=cols).to_parquet(folder / "records.parquet", index=False)
    (folder / "manifest.json").write_text(json.dumps({"task": "upland", "explainer_order": EXPLAINERS}))
    return folder


def test_show_tile_writes_a_png(run_dir, tmp_path, capsys):
    out = tmp_path / "tile.png"
    assert main(["show", str(run_dir), "--tile", "5", "--out", str(out)]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "tile 5, 3 explainer maps" in capsys.readouterr().out


def test_worst_picks_the_tile_where_the_method_scores_lowest(run_dir, tmp_path, capsys):
    assert main(["show", str(run_dir), "--worst", "grad-cam", "mass-accuracy", "--out", str(tmp_path / "w.png")]) == 0
    assert "tile 5" in capsys.readouterr().out
    assert main(["show", str(run_dir), "--worst", "gradient", "mass-accuracy", "--out", str(tmp_path / "g.png")]) == 0
    out = capsys.readouterr().out
    assert "tile 8" in out and "worst gradient mass-accuracy (planted) = 0.200" in out


def test_one_panel_per_explainer_with_its_values(run_dir):
    with np.load(run_dir / "artifacts" / "gallery__upland__cnn__0.npz") as d:
        data = {k: d[k] for k in d.files}
    values = {"grad-cam": ["mass-accuracy (plan.) 0.100"]}
    fig = F.tile_figure(data, 1, EXPLAINERS, values, "t")
    titles = [ax.get_title() for ax in fig.axes]
    assert [t for t in titles if t in EXPLAINERS] == EXPLAINERS
    grad_cam = next(ax for ax in fig.axes if ax.get_title() == "grad-cam")
    assert grad_cam.get_xlabel() == "mass-accuracy (plan.) 0.100"


def test_a_tile_outside_the_gallery_is_one_clear_error(run_dir, capsys):
    assert main(["show", str(run_dir), "--tile", "4"]) == 2
    err = capsys.readouterr().err
    assert "tile not in the gallery" in err and "one of 3, 5, 8" in err and len(err.strip().splitlines()) == 1
