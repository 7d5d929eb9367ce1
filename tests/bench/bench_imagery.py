"""Benchmark: tile a 10,000 x 10,000-pixel, 6-band uint16 GeoTIFF by windows and print peak memory.

Not a test. Run: ``python tests/bench/bench_imagery.py [--side 10000] [--tile 64] [--keep]``.
The scene is written strip by strip (tiled, deflate-compressed; DN x 1e-4 with nodata 0 in one corner and a
saturated row of pixels), then read through ``iter_raster_tiles`` by windows, in a fresh process. Prints the
scene's size in memory (as uint16 and as float32 reflectance), that process's peak resident memory after its
imports and at the end, and tiles per second.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def peak_rss_mib() -> float:
    """This process's peak resident memory: VmHWM of /proc/self/status (reset by exec, unlike ru_maxrss,
    which Linux carries over from the parent across fork and exec)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux


def write_scene(path: Path, side: int, bands: int = 6, strip: int = 512) -> None:
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    profile = {
        "driver": "GTiff",
        "width": side,
        "height": side,
        "count": bands,
        "dtype": "uint16",
        "crs": "EPSG:32633",
        "transform": from_origin(400000.0, 6900000.0, 10.0, 10.0),
        "nodata": 0,
        "tiled": True,
        "blockxsize": 512,
        "blockysize": 512,
        "compress": "deflate",
        "zlevel": 1,
        "BIGTIFF": "IF_SAFER",
    }
    cols = np.arange(side)
    with rasterio.open(path, "w", **profile) as dst:
        for r0 in range(0, side, strip):
            h = min(strip, side - r0)
            rows = np.arange(r0, r0 + h)[:, None]
            base = 300 + 200 * np.sin(rows / 97.0) * np.cos(cols[None, :] / 131.0)  # smooth reflectance x 1e4
            block = np.stack([base + 400 * b for b in range(bands)]).astype(np.uint16)
            block[:, (rows + cols[None, :]) < side // 10] = 0  # nodata corner
            if r0 <= side // 2 < r0 + h:
                block[:, side // 2 - r0, :] = 11500  # a saturated row (reflectance 1.15)
            dst.write(block, window=Window(0, r0, side, h))
        dst.scales = (1e-4,) * bands
        dst.offsets = (0.0,) * bands
        for i, name in enumerate(("blue", "green", "red", "nir", "swir1", "swir2")[:bands], start=1):
            dst.set_band_description(i, name)


def tile_only(path: Path, tile: int) -> int:
    """Tile ``path`` in this (fresh) process and print its figures; peak memory is this process's own."""
    import rasterio

    from xbench.imagery.raster import RasterOptions, TilingReport, iter_raster_tiles

    with rasterio.open(path) as src:
        side, bands = src.width, src.count
    before = peak_rss_mib()
    report = TilingReport()
    total = np.zeros(bands)
    t0 = time.perf_counter()
    for data, _where in iter_raster_tiles(path, tile, RasterOptions(), report, progress=True):
        total += data.sum(axis=(1, 2), dtype=np.float64)  # consume each tile, keep nothing
    t_tile = time.perf_counter() - t0
    after = peak_rss_mib()
    pixels = side * side * bands
    print(f"scene: {side} x {side} x {bands} bands, {path.stat().st_size / 2**20:.0f} MiB on disk (deflate)")
    print(f"scene in memory: {pixels * 2 / 2**20:.0f} MiB as uint16, {pixels * 4 / 2**20:.0f} MiB as float32")
    print(f"tiled ({tile} px) in {t_tile:.1f} s ({report.visited / t_tile:.0f} tiles/s)")
    print(f"tiling: {report.summary()}")
    print(f"peak resident memory of the tiling process: {before:.0f} MiB after imports, {after:.0f} MiB at the end")
    print(f"tiling's own peak (end - after imports): {after - before:.0f} MiB")
    print(f"peak of the whole process / scene as float32: {after / (pixels * 4 / 2**20):.3f}")
    return 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--side", type=int, default=10_000)
    parser.add_argument("--tile", type=int, default=64)
    parser.add_argument("--keep", action="store_true", help="keep the written scene")
    parser.add_argument("--tile-only", metavar="PATH", help="(internal) tile an existing scene in this process")
    args = parser.parse_args()
    if args.tile_only:
        return tile_only(Path(args.tile_only), args.tile)

    import subprocess

    folder = Path(tempfile.mkdtemp(prefix="xbench-bench-imagery-"))
    path = folder / "scene.tif"
    t0 = time.perf_counter()
    write_scene(path, args.side)
    print(f"written in {time.perf_counter() - t0:.1f} s", flush=True)
    # tile in a fresh process, so its peak memory is the tiling's alone
    subprocess.run([sys.executable, __file__, "--tile-only", str(path), "--tile", str(args.tile)], check=True)
    if not args.keep:
        path.unlink()
        folder.rmdir()
    return 0


if __name__ == "__main__":
    sys.exit(main())
