"""A synthetic Vellardine background scene written as a GeoTIFF, for the transplant demo and the tests.

The scene is the synthesizer's own conifer-upland landscape (one large scene with a few farm fields, whose
bare soil gives the scene's own low-NDVI pixels), stored the way real products store reflectance:
unsigned 16-bit digital numbers with scale 1e-4, nodata 0 over a corner outside the sensor's swath, band
descriptions naming the bands, and a small cloud whose values saturate above 1.0. Nothing is downloaded.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

SCALE = 1e-4
NODATA = 0
CRS = "EPSG:32633"  # a projected CRS in metres (UTM); the scene itself is invented
ORIGIN = (412000.0, 6_871_000.0)  # x, y of the top-left corner
PIXEL = 10.0  # metres


def vellardine_reflectance(size: int = 640, seed: int = 12) -> np.ndarray:
    """float32 (6, size, size) reflectance of one synthetic conifer-upland scene (fields forced present)."""
    from xbench.scenes import sample_scene

    presence = {t: 0.0 for t in ("road", "clearing", "building", "corridor", "river", "natural-gap", "outcrop")}
    presence["field"] = 1.0
    scene = sample_scene("conifer-upland", size, seed, presence=presence)
    return scene.render()


def write_vellardine_geotiff(
    path: str | Path, size: int = 640, seed: int = 12, cloud: bool = True, nodata_corner: float = 0.2
) -> Path:
    """Write the synthetic Vellardine scene as a tiled, compressed uint16 GeoTIFF (DN x 1e-4, nodata 0).

    ``nodata_corner``: the fraction of the side cut off diagonally at the top-left corner as nodata.
    ``cloud``: a small bright cloud whose reflectance rises to about 1.15 at its centre.
    """
    import rasterio
    from rasterio.transform import from_origin

    from xbench.scenes import BANDS

    refl = vellardine_reflectance(size, seed).astype(np.float64)
    yy, xx = np.mgrid[0:size, 0:size]
    if cloud:
        cy, cx, r = 0.62 * size, 0.71 * size, max(3.0, size / 90)
        refl += 1.15 * np.exp(-0.5 * ((yy - cy) ** 2 + (xx - cx) ** 2) / r**2)[None]
    dn = np.clip(np.rint(refl / SCALE), 1, 65535).astype(np.uint16)  # 0 is reserved for nodata
    dn[:, (yy + xx) < nodata_corner * size] = NODATA
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    profile = {
        "driver": "GTiff",
        "width": size,
        "height": size,
        "count": len(BANDS),
        "dtype": "uint16",
        "crs": CRS,
        "transform": from_origin(ORIGIN[0], ORIGIN[1], PIXEL, PIXEL),
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 128,
        "blockysize": 128,
        "compress": "deflate",
    }
    tmp = path.with_name(path.name + ".tmp.tif")
    with rasterio.open(tmp, "w", **profile) as dst:
        dst.write(dn)
        dst.scales = (SCALE,) * len(BANDS)
        dst.offsets = (0.0,) * len(BANDS)
        for i, name in enumerate(BANDS, start=1):
            dst.set_band_description(i, name)
    tmp.replace(path)
    return path


def vellardine_background_path(cache: str | Path, size: int = 640, seed: int = 12) -> Path:
    """The generated Vellardine background under a cache folder, written on first use."""
    path = Path(cache) / "imagery" / f"vellardine-background-{size}-{seed}.tif"
    if not path.is_file():
        write_vellardine_geotiff(path, size=size, seed=seed)
    return path
