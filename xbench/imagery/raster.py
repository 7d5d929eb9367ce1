"""Reading georeferenced rasters (GeoTIFF, Cloud-Optimized GeoTIFF; anything rasterio/GDAL opens) into tiles.

A scene is cut into tiles of ``size`` x ``size`` pixels on a regular grid anchored at the top-left pixel;
partial tiles at the right and bottom edges are left out. The scene is read by windows of whole tile rows
(as many as fit the file's block height, at most ``STRIP_BYTES``), with GDAL's block cache held to
``GDAL_CACHE_MB``, so memory holds one strip, never the whole scene.

Per tile: digital numbers become reflectance ``DN * scale + offset`` (scale and offset per band from the
file's metadata, or the task); a pixel is nodata where any band equals that band's nodata value (or is NaN);
tiles whose nodata fraction exceeds ``max_nodata`` are skipped, and in kept tiles the nodata pixels are filled
with the band's mean over the tile's valid pixels. Values outside [0, 1] (saturated clouds, negative dark
pixels) follow the declared policy: ``clip`` to [0, 1], ``drop-tile`` (skip any tile holding one), or
``keep``. Every count is reported (:class:`TilingReport`).
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError

RASTER_SUFFIXES = (".tif", ".tiff", ".vrt", ".jp2", ".img")
OUT_OF_RANGE_POLICIES = ("clip", "drop-tile", "keep")
STRIP_BYTES = 64 << 20  # at most this many bytes of digital numbers per read
PROGRESS_PIXELS = 4096 * 4096  # scenes larger than this show a progress bar by default
GDAL_CACHE_MB = 64  # GDAL's block cache while tiling (its default is 5% of the machine's memory)
GEOREF_COLUMNS = ("source", "row", "col", "a", "b", "c", "d", "e", "f")


@dataclass(frozen=True)
class RasterOptions:
    """How to read a raster: band names, scale/offset and nodata overrides, out-of-range and nodata policy.

    bands: None (the file's band descriptions), a list of names (one per file band, in file order), or a
    mapping name -> 1-based band index (selects and orders bands). scale/offset/nodata: None (the file's
    metadata) or one value for every band.
    """

    bands: list[str] | dict[str, int] | None = None
    scale: float | None = None
    offset: float | None = None
    nodata: float | None = None
    out_of_range: str = "clip"
    max_nodata: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class TilingReport:
    """Counts of one tiling pass (summed over files)."""

    files: list[str] = field(default_factory=list)
    grid_tiles: int = 0  # full tiles on the grid (visited or not)
    visited: int = 0
    kept: int = 0
    skipped_nodata: int = 0
    dropped_out_of_range: int = 0
    nodata_pixels_filled: int = 0
    values_below_0: int = 0
    values_above_1: int = 0
    policy: str = "clip"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def summary(self) -> str:
        return (
            f"{self.kept} tiles kept of {self.visited} read ({self.grid_tiles} on the grid); "
            f"{self.skipped_nodata} skipped for nodata, {self.dropped_out_of_range} dropped out of range; "
            f"{self.values_above_1} values above 1 and {self.values_below_0} below 0 ({self.policy}); "
            f"{self.nodata_pixels_filled} nodata pixels filled"
        )


@dataclass
class RasterInfo:
    """What a raster file declares, resolved against the options."""

    path: str
    width: int
    height: int
    crs: str  # "EPSG:nnnn" or WKT ('' when the file has none)
    transform: tuple[float, ...]  # affine a, b, c, d, e, f
    band_names: list[str]
    band_index: list[int]  # 1-based file bands, in the order of band_names
    scales: np.ndarray  # float64 (C,)
    offsets: np.ndarray
    nodata: list[float | None]
    dtype: str


def raster_files(ref: str | Path | Sequence[str | Path], base: Path | None = None) -> list[Path]:
    """Raster files named by a path, a folder (its raster files, sorted) or a list of them."""
    refs = [ref] if isinstance(ref, (str, Path)) else list(ref)
    out: list[Path] = []
    for r in refs:
        p = Path(r)
        if not p.is_absolute() and base is not None:
            p = base / p
        if p.is_dir():
            found = sorted(q for q in p.iterdir() if q.suffix.lower() in RASTER_SUFFIXES)
            if not found:
                raise XbenchInputError(str(p), "folder holds no raster files", expected=", ".join(RASTER_SUFFIXES))
            out.extend(found)
        elif p.is_file():
            out.append(p)
        else:
            raise XbenchInputError(str(p), "raster not found")
    return out


def _open(path: str | Path):
    import rasterio

    try:
        return rasterio.open(path)
    except Exception as exc:  # rasterio.errors.RasterioIOError and GDAL errors
        raise XbenchInputError(str(path), f"not a readable raster ({str(exc).splitlines()[0]})") from None


def raster_info(path: str | Path, options: RasterOptions | None = None) -> RasterInfo:
    """Open a raster's header and resolve band names, scale, offset and nodata (errors name the file)."""
    options = options or RasterOptions()
    with _open(path) as src:
        return _info(src, str(path), options)


def _info(src: Any, where: str, options: RasterOptions) -> RasterInfo:
    n = src.count
    if isinstance(options.bands, dict):
        names = list(options.bands)
        index = [int(i) for i in options.bands.values()]
        bad = [i for i in index if not 1 <= i <= n]
        if bad:
            raise XbenchInputError(where, "band index outside the file", expected=f"1..{n}", found=bad[0])
    elif isinstance(options.bands, list):
        if len(options.bands) != n:
            raise XbenchInputError(
                where, "band names do not match the file's bands", expected=f"{n} names", found=len(options.bands)
            )
        names, index = list(options.bands), list(range(1, n + 1))
    else:
        desc = list(src.descriptions)
        if any(not d for d in desc):
            raise XbenchInputError(
                where,
                "bands have no names (no band descriptions in the file)",
                expected="band descriptions, or [data] bands = [...] in the task",
                found=desc,
            )
        names, index = [str(d) for d in desc], list(range(1, n + 1))
    if len(set(names)) != len(names):
        raise XbenchInputError(where, "band names repeat", found=names)
    file_scales = np.asarray(src.scales, dtype=np.float64)
    file_offsets = np.asarray(src.offsets, dtype=np.float64)
    sel = np.asarray(index) - 1
    scales = np.full(len(index), options.scale) if options.scale is not None else file_scales[sel]
    offsets = np.full(len(index), options.offset) if options.offset is not None else file_offsets[sel]
    if options.nodata is not None:
        nodata: list[float | None] = [float(options.nodata)] * len(index)
    else:
        nodata = [None if src.nodatavals[i] is None else float(src.nodatavals[i]) for i in sel]
    t = src.transform
    return RasterInfo(
        path=where,
        width=int(src.width),
        height=int(src.height),
        crs=src.crs.to_string() if src.crs else "",  # "EPSG:nnnn" when it has a code, else WKT
        transform=(t.a, t.b, t.c, t.d, t.e, t.f),
        band_names=names,
        band_index=index,
        scales=scales,
        offsets=offsets,
        nodata=nodata,
        dtype=str(src.dtypes[0]),
    )


def tile_transform(transform: tuple[float, ...], row: int, col: int) -> tuple[float, ...]:
    """The affine transform of a tile whose top-left pixel is (row, col) of a raster with ``transform``."""
    a, b, c, d, e, f = transform
    return (a, b, c + a * col + b * row, d, e, f + d * col + e * row)


def to_reflectance(
    block: np.ndarray, info: RasterInfo, options: RasterOptions
) -> tuple[np.ndarray | None, dict[str, int], str]:
    """One tile of digital numbers (C, H, W) -> float32 reflectance, or None with the reason it was skipped.

    Returns (tile or None, counts, reason) with counts ``nodata``, ``filled``, ``below``, ``above``.
    """
    valid = np.ones(block.shape[1:], dtype=bool)
    for k, nd in enumerate(info.nodata):
        band = block[k]
        if nd is not None and not math.isnan(nd):
            valid &= band != nd
        if np.issubdtype(block.dtype, np.floating):
            valid &= np.isfinite(band)
    n_bad = int(valid.size - valid.sum())
    counts = {"nodata": n_bad, "filled": 0, "below": 0, "above": 0}
    if n_bad > options.max_nodata * valid.size or n_bad == valid.size:
        return None, counts, "nodata"
    x = block.astype(np.float64) * info.scales[:, None, None] + info.offsets[:, None, None]
    if n_bad:
        for k in range(x.shape[0]):
            x[k][~valid] = x[k][valid].mean()
        counts["filled"] = n_bad
    below, above = int((x < 0).sum()), int((x > 1).sum())
    counts["below"], counts["above"] = below, above
    if (below or above) and options.out_of_range == "drop-tile":
        return None, counts, "range"
    out = x.astype(np.float32)
    if options.out_of_range == "clip":
        np.clip(out, 0.0, 1.0, out=out)
    return out, counts, ""


def iter_raster_tiles(
    path: str | Path,
    size: int,
    options: RasterOptions | None = None,
    report: TilingReport | None = None,
    progress: bool | None = None,
) -> Iterator[tuple[np.ndarray, tuple[int, int, tuple[float, ...]]]]:
    """Yield the kept tiles of one raster in grid order (row strips, left to right) with (row, col, transform).

    Reads one strip of ``size`` rows by a window per grid row, so memory stays at one strip whatever the
    scene's size. ``report`` (updated in place) counts kept, skipped and clipped tiles and values.
    ``progress``: a progress bar on stderr (None: only for scenes above ``PROGRESS_PIXELS``).
    """
    import rasterio
    from rasterio.windows import Window

    options = options or RasterOptions()
    if options.out_of_range not in OUT_OF_RANGE_POLICIES:
        raise XbenchInputError(
            "out_of_range", "unknown policy", expected=" | ".join(OUT_OF_RANGE_POLICIES), found=options.out_of_range
        )
    report = report if report is not None else TilingReport()
    report.policy = options.out_of_range
    with _open(path) as src:
        info = _info(src, str(path), options)
        if info.transform[1] != 0 or info.transform[3] != 0:
            raise XbenchInputError(str(path), "rotated rasters are not supported", expected="a north-up transform")
        rows, cols = info.height // size, info.width // size
        if rows == 0 or cols == 0:
            raise XbenchInputError(
                str(path),
                "raster smaller than one tile",
                expected=f">= {size} x {size}",
                found=(info.height, info.width),
            )
        report.files.append(str(path))
        report.grid_tiles += rows * cols
        # one read covers the file's block height (a compressed block is decoded once), within a memory cap
        block_rows = max(1, int(src.block_shapes[0][0]) // size)
        row_bytes = size * cols * size * len(info.band_index) * np.dtype(info.dtype).itemsize
        per_read = max(1, min(block_rows, STRIP_BYTES // max(row_bytes, 1)))
        bar = None
        if progress or (progress is None and info.width * info.height > PROGRESS_PIXELS):
            from tqdm import tqdm

            bar = tqdm(total=rows, unit="tile row", desc=f"tiling {Path(path).name}", leave=False)
        try:
            for i0 in range(0, rows, per_read):
                n_read = min(per_read, rows - i0)
                window = Window(0, i0 * size, cols * size, n_read * size)
                with rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_MB):
                    strips = src.read(info.band_index, window=window)
                for di in range(n_read):
                    i = i0 + di
                    yield from _strip_tiles(
                        strips[:, di * size : (di + 1) * size], i, cols, size, info, options, report
                    )
                    if bar is not None:
                        bar.update(1)
        finally:
            if bar is not None:
                bar.close()


def _strip_tiles(
    strip: np.ndarray, i: int, cols: int, size: int, info: RasterInfo, options: RasterOptions, report: TilingReport
) -> Iterator[tuple[np.ndarray, tuple[int, int, tuple[float, ...]]]]:
    """The kept tiles of one tile row (counts go to ``report``)."""
    for j in range(cols):
        report.visited += 1
        tile, counts, reason = to_reflectance(strip[:, :, j * size : (j + 1) * size], info, options)
        report.values_below_0 += counts["below"]
        report.values_above_1 += counts["above"]
        if tile is None:
            if reason == "nodata":
                report.skipped_nodata += 1
            else:
                report.dropped_out_of_range += 1
            continue
        report.nodata_pixels_filled += counts["filled"]
        report.kept += 1
        yield tile, (i * size, j * size, tile_transform(info.transform, i * size, j * size))


@dataclass
class RasterTiles:
    """Tiles read from one or more rasters: images (N, C, S, S), georef (N, 9), sources and their CRS."""

    images: np.ndarray
    georef: np.ndarray
    band_names: list[str]
    sources: list[str]
    crs: list[str]
    report: TilingReport

    def georef_meta(self) -> dict[str, Any]:
        return {"sources": self.sources, "crs": self.crs, "columns": list(GEOREF_COLUMNS)}


def read_raster_tiles(
    paths: Sequence[str | Path] | str | Path,
    size: int,
    options: RasterOptions | None = None,
    limit: int | None = None,
    progress: bool | None = None,
    bands_as: tuple[str, ...] | list[str] | None = None,
) -> RasterTiles:
    """The kept tiles of several rasters, file after file, stopping after ``limit`` tiles.

    ``bands_as``: reorder bands to these names (an error names the file when one is missing). Every file
    must give the same band names.
    """
    options = options or RasterOptions()
    files = raster_files(paths)
    report = TilingReport()
    images: list[np.ndarray] = []
    geo: list[list[float]] = []
    crs: list[str] = []
    names: list[str] | None = None
    for s, path in enumerate(files):
        info = raster_info(path, options)
        order = list(range(len(info.band_names)))
        if bands_as is not None:
            missing = [b for b in bands_as if b not in info.band_names]
            if missing:
                raise XbenchInputError(
                    str(path), "raster lacks bands", expected=", ".join(bands_as), found=", ".join(info.band_names)
                )
            order = [info.band_names.index(b) for b in bands_as]
        these = [info.band_names[k] for k in order]
        if names is not None and these != names:
            raise XbenchInputError(
                str(path), "band names differ from the first raster", expected=", ".join(names), found=these
            )
        names = these
        crs.append(info.crs)
        for tile, (row, col, t) in iter_raster_tiles(path, size, options, report, progress):
            images.append(tile[order])
            geo.append([float(s), float(row), float(col), *t])
            if limit is not None and len(images) >= limit:
                break
        if limit is not None and len(images) >= limit:
            break
    if not images:
        raise XbenchInputError(", ".join(map(str, files)), "no usable tiles", found=report.summary())
    return RasterTiles(
        images=np.stack(images),
        georef=np.asarray(geo, dtype=np.float64),
        band_names=list(names or []),
        sources=[str(Path(f).resolve()) for f in files[: len(crs)]],
        crs=crs,
        report=report,
    )


def georef_rows(georef: np.ndarray, sources: list[str], crs: list[str]) -> list[dict[str, Any]]:
    """One dict per tile: source file, CRS, pixel row/col and the tile's affine transform."""
    out = []
    for i, g in enumerate(np.asarray(georef)):
        s = int(g[0])
        out.append(
            {
                "tile": i,
                "source": sources[s],
                "row": int(g[1]),
                "col": int(g[2]),
                "transform": [float(v) for v in g[3:]],
                "crs": crs[s],
            }
        )
    return out
