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


def write_annotated_example(
    folder: str | Path, tiles_per_side: int = 12, tile: int = 64, seed: int = 5, presence: dict | None = None
) -> tuple[Path, Path]:
    """A Vellardine scene with roads and clear-cuts, and their digitized outlines, as a user would hold them.

    The raster is a mosaic of ``tiles_per_side``**2 synthetic tiles (``tile`` pixels each) written like
    :func:`write_vellardine_geotiff` (uint16, scale 1e-4, nodata 0 in a corner). ``annotations.geojson``
    (WGS 84, as GeoJSON requires) holds each planted road as a line (``kind = "road"``; its width is left to
    the task's ``line_width``, as digitized centre lines are) and each clear-cut as a polygon
    (``kind = "clearing"``). Returns (raster path, annotation path).
    """
    import json

    import rasterio
    from rasterio.transform import from_origin
    from rasterio.warp import transform_geom

    from xbench.scenes import BANDS, synthesize

    presence = presence or {
        "road": 0.35,
        "clearing": 0.35,
        "river": 0.2,
        "building": 0.0,
        "corridor": 0.0,
        "natural-gap": 0.0,
        "outcrop": 0.0,
    }
    n = tiles_per_side
    pack, scenes = synthesize("conifer-upland", n * n, seed, size=tile, presence=presence)
    side = n * tile
    refl = pack.images.reshape(n, n, len(BANDS), tile, tile).transpose(2, 0, 3, 1, 4).reshape(len(BANDS), side, side)
    dn = np.clip(np.rint(refl.astype(np.float64) / SCALE), 1, 65535).astype(np.uint16)
    yy, xx = np.mgrid[0:side, 0:side]
    dn[:, (yy + xx) < 0.1 * side] = NODATA
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    raster = folder / "scene.tif"
    transform = from_origin(ORIGIN[0], ORIGIN[1], PIXEL, PIXEL)
    profile = {
        "driver": "GTiff",
        "width": side,
        "height": side,
        "count": len(BANDS),
        "dtype": "uint16",
        "crs": CRS,
        "transform": transform,
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 128,
        "blockysize": 128,
        "compress": "deflate",
    }
    with rasterio.open(raster, "w", **profile) as dst:
        dst.write(dn)
        dst.scales = (SCALE,) * len(BANDS)
        dst.offsets = (0.0,) * len(BANDS)
        for i, name in enumerate(BANDS, start=1):
            dst.set_band_description(i, name)

    def world(points: list, r0: int, c0: int) -> list[list[float]]:
        # pixel coordinates (x right, y down) of a tile at (r0, c0) -> map coordinates of the mosaic
        return [[ORIGIN[0] + (c0 + x) * PIXEL, ORIGIN[1] - (r0 + y) * PIXEL] for x, y in points]

    features = []
    for t, scene in enumerate(scenes):
        r0, c0 = (t // n) * tile, (t % n) * tile
        for inst in scene.instances:
            p = inst.params
            if inst.kind == "road":
                lines = [p["path"]] + [b["path"] for b in p["branches"]]
                geom = {"type": "MultiLineString", "coordinates": [world(line, r0, c0) for line in lines]}
            elif inst.kind == "clearing":
                ring = world(p["vertices"], r0, c0)
                geom = {"type": "Polygon", "coordinates": [ring + ring[:1]]}
            else:
                continue
            geom = transform_geom(CRS, "EPSG:4326", geom, precision=9)
            features.append({"type": "Feature", "properties": {"kind": inst.kind}, "geometry": geom})
    annotations = folder / "annotations.geojson"
    tmp = folder / "annotations.geojson.tmp"
    tmp.write_text(json.dumps({"type": "FeatureCollection", "features": features}))
    tmp.replace(annotations)
    return raster, annotations


EXAMPLE_TASK = """# Real-style data in: a GeoTIFF scene and the roads and clear-cuts digitized in a GeoJSON file.
name = "my-geotiff"
seeds = [0]

[data]
rasters = ["scene.tif"]
annotations = "annotations.geojson"
class_attribute = "kind"
line_width = 12.0   # metres: digitized road centre lines are buffered by 6 m on each side
size = 32
train = 380
val = 90
test = 90

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
name = "cnn"
kind = "cnn"
width = 16
epochs = 10

[explainers]
keys = ["gradient", "integrated-gradients", "grad-cam", "occlusion", "random", "edges", "oracle"]

[metrics]
keys = ["mass-accuracy", "pointing-game", "mask-auroc", "deletion-auc", "insertion-auc", "gini", "seconds"]

# real tiles have no twins: removal curves blur the removed pixels instead
[metrics.settings.deletion-auc]
baseline = "blur"

[metrics.settings.insertion-auc]
baseline = "blur"

[run]
explain_tiles = 32
gallery_tiles = 4
"""


def main(argv: list[str] | None = None) -> int:
    """``python -m xbench.imagery.generate FOLDER``: write the annotated example and a task file using it."""
    import argparse

    parser = argparse.ArgumentParser(description="write a GeoTIFF scene, its GeoJSON annotations and a task file")
    parser.add_argument("folder")
    parser.add_argument("--background-only", action="store_true", help="only the transplant background scene")
    args = parser.parse_args(argv)
    folder = Path(args.folder)
    if args.background_only:
        print(write_vellardine_geotiff(folder / "background.tif"))
        return 0
    raster, annotations = write_annotated_example(folder)
    task = folder / "task.toml"
    task.write_text(EXAMPLE_TASK)
    print(f"wrote {raster}, {annotations} and {task}; try: xbench run {task}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
