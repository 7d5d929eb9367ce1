"""Vector annotations: exact sub-pixel coverage of buffered lines and polygons; CRS and extent errors."""

from __future__ import annotations

import json
import textwrap

import numpy as np
import pyogrio.raw
import pytest
import shapely
from rasterio.warp import transform_geom

from xbench.errors import XbenchInputError
from xbench.imagery.generate import write_vellardine_geotiff
from xbench.imagery.vector import pixel_coverage, read_annotations, tile_coverages
from xbench.scenes.geometry import polygons_coverage

UTM = "EPSG:32633"
PIXEL = 10.0
ORIGIN = (500000.0, 7000000.0)
TRANSFORM = (PIXEL, 0.0, ORIGIN[0], 0.0, -PIXEL, ORIGIN[1])  # north-up, 10 m pixels
SIZE = 64
BOUNDS = (ORIGIN[0], ORIGIN[1] - SIZE * PIXEL, ORIGIN[0] + SIZE * PIXEL, ORIGIN[1])


def geojson(path, features, crs_name=None):
    doc = {"type": "FeatureCollection", "features": features}
    if crs_name:  # the 2008 GeoJSON "crs" member, which GDAL honours
        doc["crs"] = {"type": "name", "properties": {"name": crs_name}}
    path.write_text(json.dumps(doc))
    return path


def feature(geom, kind):
    return {"type": "Feature", "properties": {"kind": kind}, "geometry": geom}


def test_road_of_known_width_covers_length_times_width(tmp_path):
    # a road with one bend, digitized in WGS 84 (GeoJSON's CRS), 12 m wide; reprojected to the raster's UTM
    pts = [
        (ORIGIN[0] + 40.3, ORIGIN[1] - 95.1),
        (ORIGIN[0] + 301.7, ORIGIN[1] - 250.2),
        (ORIGIN[0] + 590.0, ORIGIN[1] - 310.9),
    ]
    utm_line = {"type": "LineString", "coordinates": pts}
    path = geojson(
        tmp_path / "road.geojson", [feature(transform_geom(UTM, "EPSG:4326", utm_line, precision=10), "road")]
    )
    ann = read_annotations(path, UTM, BOUNDS, "kind", line_width=12.0)
    cov, counts = tile_coverages(ann, ["road"], TRANSFORM, SIZE)
    assert counts == {"road": 1}
    length = float(np.sum(np.hypot(*np.diff(np.array(pts), axis=0).T)))
    area = float(cov.sum(dtype=np.float64)) * PIXEL * PIXEL
    # length x width of the centre line (flat ends; the round join adds (w/2)^2 x bend angle / 2 at most,
    # under 0.3% here): within 2% as the issue asks (common practice for a buffered line's area)
    assert area == pytest.approx(length * 12.0, rel=0.02)
    assert cov.max() <= 1.0 and cov.min() >= 0.0


def shoelace(xy):
    # signed area of a polygon, Gauss's shoelace formula (published definition)
    x, y = np.asarray(xy).T
    return 0.5 * (np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))


def test_polygon_covers_its_shoelace_area_and_matches_the_scanline_rasterizer(tmp_path):
    px = np.array([[10.2, 8.7], [41.5, 5.3], [55.1, 30.9], [33.3, 50.6], [12.8, 44.4], [20.1, 27.0]])  # pixels
    world = [(ORIGIN[0] + x * PIXEL, ORIGIN[1] - y * PIXEL) for x, y in px]
    gpkg = tmp_path / "clear-cuts.gpkg"  # a GeoPackage in the raster's CRS
    poly = shapely.Polygon(world)
    pyogrio.raw.write(
        gpkg,
        geometry=np.array([shapely.to_wkb(poly)], dtype=object),
        field_data=[np.array(["clear-cut"], dtype=object)],
        fields=["class"],
        geometry_type="Polygon",
        crs=UTM,
        driver="GPKG",
    )
    ann = read_annotations(gpkg, UTM, BOUNDS, "class", classes={"clear-cut": "clearing"})
    cov, _ = tile_coverages(ann, ["clearing"], TRANSFORM, SIZE)
    area_px = float(cov.sum(dtype=np.float64))
    assert area_px == pytest.approx(abs(shoelace(px)), rel=0.02)
    assert area_px == pytest.approx(abs(shoelace(px)), rel=1e-6)  # exact intersection areas, in fact
    # the synthesizer's scanline rasterizer (8 sub-rows per pixel, 1/64 quanta) agrees pixel by pixel
    patch = polygons_coverage([px], SIZE, SIZE)
    assert np.abs(patch.full(SIZE, SIZE) - cov).max() < 0.1


def test_pixel_coverage_of_a_unit_square_is_exact():
    # the square of pixel (row 3, col 5) and half of pixel (3, 6)
    x0, y0 = ORIGIN[0] + 5 * PIXEL, ORIGIN[1] - 3 * PIXEL
    g = shapely.box(x0, y0 - PIXEL, x0 + 1.5 * PIXEL, y0)
    cov = pixel_coverage(g, TRANSFORM, 8, 8)
    want = np.zeros((8, 8), dtype=np.float32)
    want[3, 5], want[3, 6] = 1.0, 0.5
    np.testing.assert_array_equal(cov, want)


def test_overlapping_features_never_exceed_full_coverage(tmp_path):
    sq = [[ORIGIN[0] + 50, ORIGIN[1] - 50], [ORIGIN[0] + 150, ORIGIN[1] - 50], [ORIGIN[0] + 150, ORIGIN[1] - 150]]
    ring = sq + [[ORIGIN[0] + 50, ORIGIN[1] - 150], sq[0]]
    geom = {"type": "Polygon", "coordinates": [ring]}
    path = geojson(tmp_path / "two.geojson", [feature(geom, "clearing"), feature(geom, "clearing")], UTM)
    cov, counts = tile_coverages(read_annotations(path, UTM, BOUNDS, "kind"), ["clearing"], TRANSFORM, SIZE)
    assert counts == {"clearing": 2} and cov.max() == 1.0 and cov.sum() == pytest.approx(100.0)


def test_bad_annotations_are_clear_errors(tmp_path):
    line = {"type": "LineString", "coordinates": [[ORIGIN[0] + 10, ORIGIN[1] - 10], [ORIGIN[0] + 200, ORIGIN[1] - 300]]}
    path = geojson(tmp_path / "lines.geojson", [feature(line, "road")], UTM)
    with pytest.raises(XbenchInputError, match="no line width"):
        read_annotations(path, UTM, BOUNDS, "kind")
    with pytest.raises(XbenchInputError, match="class attribute not found"):
        read_annotations(path, UTM, BOUNDS, "type", line_width=5.0)
    odd = geojson(tmp_path / "odd.geojson", [feature(line, "lane")], UTM)
    with pytest.raises(XbenchInputError, match="not a structure type"):
        read_annotations(odd, UTM, BOUNDS, "kind", line_width=5.0)


TASK = """
name = "mine"
[data]
rasters = ["scene.tif"]
annotations = "{annotations}"
class_attribute = "kind"
line_width = 12.0
size = 32
train = 4
val = 2
test = 2
[data.labels]
classes = ["intact", "road"]
default = "intact"
[[data.labels.rule]]
class = "road"
type = "road"
stat = "coverage"
above = 0.0
[[models]]
name = "forest"
kind = "forest"
"""


@pytest.mark.parametrize("case", ["wrong-crs", "extent-misses"])
def test_wrong_crs_or_missed_extent_exit_2_with_one_line(tmp_path, capsys, case):
    from xbench.cli import main

    write_vellardine_geotiff(tmp_path / "scene.tif", size=128, seed=1)
    from xbench.imagery.generate import ORIGIN as SCENE_ORIGIN

    x, y = SCENE_ORIGIN
    utm_line = {"type": "LineString", "coordinates": [[x + 100, y - 100], [x + 900, y - 700]]}
    if case == "wrong-crs":
        # UTM metres written into a file without a "crs" member: GeoJSON then means WGS 84 degrees
        path = geojson(tmp_path / "roads.geojson", [feature(utm_line, "road")])
    else:
        # correct WGS 84 coordinates of a road 50 km east of the scene
        far = {"type": "LineString", "coordinates": [[x + 50100, y - 100], [x + 50900, y - 700]]}
        path = geojson(tmp_path / "roads.geojson", [feature(transform_geom(UTM, "EPSG:4326", far), "road")])
    task = tmp_path / "mine.toml"
    task.write_text(textwrap.dedent(TASK.format(annotations=path.name)))
    assert main(["run", str(task), "--out", str(tmp_path / "run"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "roads.geojson" in err[0]
    assert ("CRS" in err[0] or "reproject" in err[0]) if case == "wrong-crs" else "misses the raster" in err[0]
    assert not (tmp_path / "run").exists()
