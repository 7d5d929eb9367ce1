"""Annotated real tiles: raster tiles plus vector annotations -> a tile pack with planted masks and coverage.

Labels come from the task's label rule, evaluated on the annotation coverage exactly as on a synthetic
scene (``coverage`` statistics on the union of a rule's types; ``count`` on the features touching the tile).
Such a pack has no twins and no scenes: metrics that need them are skipped with a reason by the runner.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from xbench.data import TilePack
from xbench.errors import XbenchInputError
from xbench.imagery.raster import RasterOptions, raster_files, raster_info, read_raster_tiles
from xbench.imagery.vector import read_annotations, tile_coverages
from xbench.names import STRUCTURE_TYPES
from xbench.scenes.labels import LabelRule


@dataclass
class _Feature:
    kind: str


class CoverageTile:
    """What a label rule reads from a scene (``instances`` kinds, ``type_coverage``), for an annotated tile."""

    def __init__(self, names: list[str], coverage: np.ndarray, counts: dict[str, int]):
        self.names, self.coverage = names, coverage
        self.instances = [_Feature(k) for k, n in counts.items() for _ in range(n)]

    def type_coverage(self, kinds: Any) -> np.ndarray:
        kinds = {kinds} if isinstance(kinds, str) else set(kinds)
        out = np.zeros(self.coverage.shape[1:], dtype=np.float32)
        for k, name in enumerate(self.names):
            if name in kinds:
                out += self.coverage[k]
        return np.minimum(out, 1.0)


def raster_bounds(info: Any) -> tuple[float, float, float, float]:
    """(left, bottom, right, top) of a north-up raster."""
    a, _b, c, _d, e, f = info.transform
    xs = sorted((c, c + a * info.width))
    ys = sorted((f, f + e * info.height))
    return xs[0], ys[0], xs[1], ys[1]


def annotated_pack(
    rasters: Sequence[str | Path] | str | Path,
    annotations: str | Path,
    size: int,
    rule: LabelRule,
    *,
    class_attribute: str,
    line_width: float | None = None,
    classes: dict[str, str] | None = None,
    options: RasterOptions | None = None,
    limit: int | None = None,
    progress: bool | None = None,
) -> TilePack:
    """Tiles of the rasters (grid order) with the annotations' coverage per type, labels from ``rule``."""
    options = options or RasterOptions()
    files = raster_files(rasters)
    infos = [raster_info(f, options) for f in files]
    crs = infos[0].crs
    if not crs:
        raise XbenchInputError(str(files[0]), "the raster declares no CRS", expected="a georeferenced raster")
    for f, info in zip(files, infos, strict=True):
        if info.crs != crs:
            raise XbenchInputError(str(f), "CRS differs from the first raster's", expected=crs, found=info.crs)
    bounds = np.array([raster_bounds(i) for i in infos])
    total = (bounds[:, 0].min(), bounds[:, 1].min(), bounds[:, 2].max(), bounds[:, 3].max())
    ann = read_annotations(annotations, crs, total, class_attribute, line_width, classes)
    tiles = read_raster_tiles(files, size, options, limit=limit, progress=progress)
    names = [t for t in STRUCTURE_TYPES if t in set(ann.types) | set(rule.types_used())]
    n = len(tiles.images)
    coverage = np.zeros((n, len(names), size, size), dtype=np.float32)
    labels = np.empty(n, dtype=np.int64)
    for i in range(n):
        transform = tuple(float(v) for v in tiles.georef[i, 3:])
        coverage[i], counts = tile_coverages(ann, names, transform, size)
        labels[i] = rule.apply(CoverageTile(names, coverage[i], counts))  # type: ignore[arg-type]
    meta = {
        "source": "xbench.imagery.annotate",
        "rasters": tiles.sources,
        "annotations": str(Path(annotations).resolve()),
        "class_attribute": class_attribute,
        "line_width": line_width,
        "label_rule": rule.text,
        "label_rule_table": rule.to_dict(),
        "raster_options": options.to_dict(),
        "tiling": tiles.report.to_dict(),
        "out_of_range": options.out_of_range,
        "georef": tiles.georef_meta(),
    }
    return TilePack(
        images=tiles.images,
        labels=labels,
        class_names=list(rule.classes),
        band_names=tiles.band_names,
        masks=coverage > 0,
        mask_names=names,
        coverage=coverage,
        meta=meta,
        georef=tiles.georef,
    )
