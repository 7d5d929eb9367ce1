"""GeoTIFF reading: scale/offset and nodata from the file, out-of-range policies, tiling by windows, georeference."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from rasterio.windows import Window
from rasterio.windows import transform as window_transform

from xbench.data import load_pack, save_pack
from xbench.errors import XbenchInputError
from xbench.imagery.raster import RasterOptions, raster_info, read_raster_tiles
from xbench.imagery.taskdata import split_ranges

BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]


def write_tif(path, dn, nodata=0, scale=1e-4, offset=0.0, names=BANDS, crs="EPSG:32633"):
    c, h, w = dn.shape
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=w,
        height=h,
        count=c,
        dtype=dn.dtype,
        crs=crs,
        transform=from_origin(500000.0, 7000000.0, 10.0, 10.0),
        nodata=nodata,
    ) as dst:
        dst.write(dn)
        dst.scales = (scale,) * c
        dst.offsets = (offset,) * c
        if names:
            for i, n in enumerate(names, start=1):
                dst.set_band_description(i, n)
    return path


@pytest.fixture
def scene(tmp_path):
    """A 6-band uint16 scene, 40 x 56 pixels: DN = 1000 + 10 x band + row + col; nodata 0 in pixel (0, 0)."""
    rows, cols = np.mgrid[0:40, 0:56]
    dn = np.stack([1000 + 10 * b + rows + cols for b in range(6)]).astype(np.uint16)
    dn[:, 0, 0] = 0
    return write_tif(tmp_path / "scene.tif", dn), dn


def test_uint16_with_scale_reads_back_as_reflectance(scene):
    path, dn = scene
    info = raster_info(path)
    assert info.band_names == BANDS and info.dtype == "uint16" and info.nodata == [0.0] * 6
    tiles = read_raster_tiles(path, 16, RasterOptions(max_nodata=0.0))
    # 2 x 3 full tiles on the grid (the 8 leftover rows and columns are not a full tile); tile (0, 0)
    # holds the nodata pixel and is skipped
    assert tiles.report.grid_tiles == 6 and tiles.report.skipped_nodata == 1 and len(tiles.images) == 5
    first = tiles.images[0]  # tile at row 0, col 16
    assert tiles.georef[0, 1:3].tolist() == [0, 16]
    # reflectance = DN x 1e-4 (the file's scale), in float32
    np.testing.assert_allclose(first, dn[:, 0:16, 16:32].astype(np.float64) * 1e-4, rtol=1e-6)
    assert first.dtype == np.float32


@pytest.mark.filterwarnings("ignore::PendingDeprecationWarning")  # inside rasterio's window_transform
def test_georeference_survives_tiling(scene):
    path, _ = scene
    tiles = read_raster_tiles(path, 16, RasterOptions(max_nodata=0.5))
    assert len(tiles.images) == 6
    with rasterio.open(path) as src:
        for g in tiles.georef:
            row, col = int(g[1]), int(g[2])
            # rasterio's own window transform of the same window is the reference
            want = window_transform(Window(col, row, 16, 16), src.transform)
            assert tuple(g[3:]) == pytest.approx((want.a, want.b, want.c, want.d, want.e, want.f))
            # the tile's top-left map coordinate maps back to its pixel in the scene
            assert src.index(want.c + 5.0, want.f - 5.0) == (row, col)
    assert "32633" in tiles.crs[0] or "UTM" in tiles.crs[0]
    # kept through a saved pack
    from xbench.data import TilePack

    pack = TilePack(
        images=tiles.images,
        labels=np.array([0, 1, 0, 1, 0, 1]),
        class_names=["a", "b"],
        band_names=tiles.band_names,
        masks=np.zeros((6, 0, 16, 16), dtype=bool),
        mask_names=[],
        meta={"georef": tiles.georef_meta()},
        georef=tiles.georef,
    )
    back = load_pack(save_pack(pack, path.parent / "p.npz"))
    np.testing.assert_array_equal(back.georef, tiles.georef)
    assert back.subset(slice(2, 4)).georef.shape == (2, 9)


def test_nodata_fill_and_counts(scene):
    path, dn = scene
    tiles = read_raster_tiles(path, 16, RasterOptions(max_nodata=0.01))
    assert tiles.report.skipped_nodata == 0 and tiles.report.nodata_pixels_filled == 1
    valid = dn[:, 0:16, 0:16].astype(np.float64) * 1e-4
    mean = (valid.sum(axis=(1, 2)) - valid[:, 0, 0]) / 255  # the band's mean over the 255 valid pixels
    np.testing.assert_allclose(tiles.images[0][:, 0, 0], mean, rtol=1e-5)


@pytest.mark.parametrize("policy", ["clip", "drop-tile", "keep"])
def test_out_of_range_policies(tmp_path, policy):
    dn = np.full((6, 32, 32), 500, dtype=np.uint16)
    dn[:, 3, 3] = 11300  # a saturated cloud pixel: reflectance 1.13
    path = write_tif(tmp_path / "cloud.tif", dn)
    if policy == "drop-tile":
        tiles = read_raster_tiles(path, 16, RasterOptions(out_of_range=policy))
        assert tiles.report.dropped_out_of_range == 1 and len(tiles.images) == 3
        assert tiles.georef[0, 1:3].tolist() == [0, 16]  # the cloudy tile (0, 0) is the one left out
        return
    tiles = read_raster_tiles(path, 16, RasterOptions(out_of_range=policy))
    assert tiles.report.values_above_1 == 6 and tiles.report.kept == 4
    want = 1.0 if policy == "clip" else 1.13
    assert tiles.images[0][0, 3, 3] == pytest.approx(want, rel=1e-6)


def test_keep_policy_is_declared_in_the_pack():
    from xbench.data import TilePack, validate_pack

    img = np.full((2, 6, 8, 8), 0.5, dtype=np.float32)
    img[0, 0, 0, 0] = 1.13
    pack = TilePack(img, np.array([0, 1]), ["a", "b"], BANDS, np.zeros((2, 0, 8, 8), bool), [])
    with pytest.raises(XbenchInputError, match="out of range"):
        validate_pack(pack)
    pack.meta["out_of_range"] = "keep"
    validate_pack(pack)


def test_band_names_from_the_task_and_errors(tmp_path):
    dn = np.full((3, 16, 16), 100, dtype=np.uint16)
    path = write_tif(tmp_path / "three.tif", dn, names=None)
    with pytest.raises(XbenchInputError, match="no names"):
        raster_info(path)
    info = raster_info(path, RasterOptions(bands={"nir": 3, "red": 1}))
    assert info.band_names == ["nir", "red"] and info.band_index == [3, 1]
    with pytest.raises(XbenchInputError, match="do not match"):
        raster_info(path, RasterOptions(bands=["a", "b"]))
    tiles = read_raster_tiles(path, 16, RasterOptions(bands=["x", "y", "z"], scale=0.002, offset=-0.1))
    np.testing.assert_allclose(tiles.images[0], 100 * 0.002 - 0.1, rtol=1e-6)
    with pytest.raises(XbenchInputError, match="lacks bands"):
        read_raster_tiles(path, 16, RasterOptions(bands=["x", "y", "z"]), bands_as=BANDS)
    with pytest.raises(XbenchInputError, match="not found"):
        read_raster_tiles(tmp_path / "missing.tif", 16)


def test_background_split_ranges_are_disjoint_and_spatial():
    r = split_ranges(10, {"train": 600, "val": 150, "test": 150})
    assert r == {"train": (0, 7), "val": (7, 8), "test": (8, 10)}
    r = split_ranges(3, {"train": 100, "val": 1, "test": 1})
    assert r == {"train": (0, 1), "val": (1, 2), "test": (2, 3)}
