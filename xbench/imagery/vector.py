"""Vector annotations (GeoJSON, GeoPackage, shapefile; read with pyogrio) -> sub-pixel coverage per type.

Each feature's class attribute names a structure type (or is mapped to one by the task). Geometries are
reprojected to the raster's CRS (rasterio.warp.transform_geom, GDAL's PROJ), lines are buffered by half the
declared width with flat ends and round joins, points are not accepted. Coverage is exact up to floating
point: for every pixel that a type's geometry touches, the area of the intersection of the pixel square
with the union of that type's geometries (shapely, GEOS), divided by the pixel area. The union first means
overlapping features never count a pixel twice, so coverage stays in [0, 1].
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.names import STRUCTURE_TYPES as ALL_TYPES


@dataclass
class Annotations:
    """Geometries per structure type, in the raster's CRS, with a spatial index for tile queries."""

    source: str
    crs: str
    by_type: dict[str, list[Any]]  # type -> shapely geometries (lines already buffered)
    bounds: tuple[float, float, float, float]
    _trees: dict[str, Any] = field(default_factory=dict, repr=False)

    @property
    def types(self) -> list[str]:
        return [t for t in ALL_TYPES if t in self.by_type]

    def tree(self, kind: str):
        import shapely

        if kind not in self._trees:
            self._trees[kind] = shapely.STRtree(self.by_type[kind])
        return self._trees[kind]


def read_annotations(
    path: str | Path,
    raster_crs: str,
    raster_bounds: tuple[float, float, float, float],
    class_attribute: str,
    line_width: float | None = None,
    classes: dict[str, str] | None = None,
    layer: str | int | None = None,
) -> Annotations:
    """Read, map, reproject and buffer a vector file's features; errors name the file.

    raster_bounds: (left, bottom, right, top) in the raster's CRS; a file whose features all miss it is an
    error (usually a wrong CRS). line_width: width of line features in the raster's CRS units (metres for a
    projected CRS); required when the file holds lines. classes: attribute value -> structure type (default:
    the value itself must be a structure type).
    """
    import pyogrio
    import shapely
    from rasterio.crs import CRS
    from rasterio.warp import transform_geom

    where = str(path)
    if not Path(path).is_file():
        raise XbenchInputError(where, "annotation file not found")
    try:
        meta, _fids, wkb, field_data = pyogrio.raw.read(path, layer=layer)
    except Exception as exc:  # pyogrio.errors.DataSourceError and friends
        raise XbenchInputError(where, f"not a readable vector file ({str(exc).splitlines()[0]})") from None
    fields = [str(f) for f in meta["fields"]]
    if class_attribute not in fields:
        raise XbenchInputError(where, "class attribute not found", expected=class_attribute, found=fields)
    values = field_data[fields.index(class_attribute)]
    if not meta.get("crs"):
        raise XbenchInputError(where, "the file declares no CRS", expected=f"features in a CRS (raster: {raster_crs})")
    try:
        src_crs, dst_crs = CRS.from_user_input(meta["crs"]), CRS.from_user_input(raster_crs)
    except Exception as exc:
        raise XbenchInputError(where, f"unreadable CRS ({exc})", found=meta["crs"]) from None
    geoms = shapely.from_wkb(wkb)
    by_type: dict[str, list[Any]] = {}
    for i, (geom, value) in enumerate(zip(geoms, values, strict=True)):
        if geom is None or geom.is_empty:
            continue
        kind = (classes or {}).get(str(value), str(value))
        if kind not in ALL_TYPES:
            raise XbenchInputError(
                f"{where}: feature {i}",
                f"class '{value}' is not a structure type",
                expected=", ".join(ALL_TYPES) + " (or map it in [data] annotation_classes)",
                found=value,
            )
        if src_crs != dst_crs:
            try:
                geom = shapely.geometry.shape(transform_geom(src_crs, dst_crs, shapely.geometry.mapping(geom)))
            except Exception as exc:
                raise XbenchInputError(
                    f"{where}: feature {i}",
                    f"coordinates do not fit the file's CRS, cannot reproject to the raster's ({exc})",
                    found=meta["crs"],
                ) from None
        gtype = geom.geom_type
        if "Point" in gtype:
            raise XbenchInputError(
                f"{where}: feature {i}", "point features have no area", expected="polygons or lines", found=gtype
            )
        if "LineString" in gtype:
            if line_width is None or line_width <= 0:
                raise XbenchInputError(
                    where, "the file holds lines but no line width is declared", expected="[data] line_width > 0"
                )
            geom = shapely.buffer(geom, line_width / 2, cap_style="flat", join_style="round")
        if not np.all(np.isfinite(geom.bounds)):
            raise XbenchInputError(f"{where}: feature {i}", "coordinates not finite after reprojection (wrong CRS?)")
        by_type.setdefault(kind, []).append(geom)
    if not by_type:
        raise XbenchInputError(where, "no features")
    all_bounds = np.array([g.bounds for gs in by_type.values() for g in gs])
    bounds = (
        float(all_bounds[:, 0].min()),
        float(all_bounds[:, 1].min()),
        float(all_bounds[:, 2].max()),
        float(all_bounds[:, 3].max()),
    )
    left, bottom, right, top = raster_bounds
    if bounds[2] < left or bounds[0] > right or bounds[3] < bottom or bounds[1] > top:
        raise XbenchInputError(
            where,
            "the features' extent misses the raster (check the file's CRS)",
            expected=f"overlap with ({left:.6g}, {bottom:.6g}, {right:.6g}, {top:.6g}) in the raster's CRS",
            found=f"({bounds[0]:.6g}, {bounds[1]:.6g}, {bounds[2]:.6g}, {bounds[3]:.6g}) declared as {meta['crs']}",
        )
    return Annotations(source=where, crs=raster_crs, by_type=by_type, bounds=bounds)


def pixel_coverage(geom: Any, transform: tuple[float, ...], height: int, width: int) -> np.ndarray:
    """float32 (height, width): area of each pixel inside ``geom`` / pixel area (exact, shapely).

    transform: the north-up affine (a, 0, c, 0, e, f) of the grid (a > 0, e < 0 usually).
    """
    import shapely

    a, _b, c, _d, e, f = transform
    out = np.zeros((height, width), dtype=np.float32)
    if geom is None or geom.is_empty:
        return out
    minx, miny, maxx, maxy = geom.bounds
    # pixel index ranges touched by the bounding box
    cols = sorted(((minx - c) / a, (maxx - c) / a))
    rows = sorted(((miny - f) / e, (maxy - f) / e))
    c0, c1 = max(0, int(np.floor(cols[0]))), min(width, int(np.ceil(cols[1])))
    r0, r1 = max(0, int(np.floor(rows[0]))), min(height, int(np.ceil(rows[1])))
    if c0 >= c1 or r0 >= r1:
        return out
    rr, cc = np.mgrid[r0:r1, c0:c1]
    x0, x1 = c + a * cc, c + a * (cc + 1)
    y0, y1 = f + e * rr, f + e * (rr + 1)
    boxes = shapely.box(np.minimum(x0, x1), np.minimum(y0, y1), np.maximum(x0, x1), np.maximum(y0, y1))
    shapely.prepare(geom)
    hit = shapely.intersects(geom, boxes)
    area = np.zeros(boxes.shape, dtype=np.float64)
    area[hit] = shapely.area(shapely.intersection(boxes[hit], geom))
    out[r0:r1, c0:c1] = np.clip(area / abs(a * e), 0.0, 1.0)
    return out


def tile_coverages(
    ann: Annotations, names: list[str], transform: tuple[float, ...], size: int
) -> tuple[np.ndarray, dict[str, int]]:
    """float32 (K, size, size) coverage of each named type over one tile, and the feature count per type."""
    import shapely

    a, _b, c, _d, e, f = transform
    x = sorted((c, c + a * size))
    y = sorted((f, f + e * size))
    tile_box = shapely.box(x[0], y[0], x[1], y[1])
    out = np.zeros((len(names), size, size), dtype=np.float32)
    counts: dict[str, int] = {}
    for k, kind in enumerate(names):
        if kind not in ann.by_type:
            continue
        idx = ann.tree(kind).query(tile_box, predicate="intersects")
        counts[kind] = int(len(idx))
        if len(idx) == 0:
            continue
        geoms = [ann.by_type[kind][i] for i in idx]
        union = shapely.intersection(shapely.union_all(geoms), tile_box)
        out[k] = pixel_coverage(union, transform, size, size)
    return out, counts
