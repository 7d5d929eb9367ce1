"""Cost against explained tiles: the demo task with 16, 32, 64 and 128 explained tiles.

    python tests/bench/bench_scaling.py [--tiles 16,32,64,128] [--explainers gradient,occlusion,rise,edges]

Each size runs the demo task (its metrics and settings; the listed explainers) into a fresh folder with the
model already trained, in one local process, and prints wall seconds, seconds per explained tile, and a
least-squares line ``fixed + per_tile * tiles`` over the sizes (cost is linear when the per-tile slope
explains the growth: the residuals are printed). The demo's test split holds 150 tiles, of which the
positive (road / clear-cut) ones can be explained, so the copies hold 300 test tiles (the same data and
model for every size up to 128). The load
average is printed beside each size.
"""

from __future__ import annotations

import argparse
import os
import re
import tempfile
import time
from pathlib import Path

import numpy as np

from xbench.errors import repo_root
from xbench.runs import load_records, run_task


def task_with_tiles(base: str, tiles: int, folder: Path) -> Path:
    """A copy of the task file with ``[run] explain_tiles = tiles`` (and enough test tiles to explain)."""
    text = (repo_root() / "tasks" / f"{base}.toml").read_text()
    text = re.sub(r"(?m)^explain_tiles = \d+", f"explain_tiles = {tiles}", text)
    test = max(300, int(tiles * 2.3))  # about 45% of the test tiles are positive; one model for 16..128
    text = re.sub(r"(?m)^test = \d+", f"test = {test}", text)
    path = folder / f"{base}-{tiles}.toml"
    path.write_text(text)
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--task", default="demo")
    parser.add_argument("--tiles", default="16,32,64,128")
    parser.add_argument("--explainers", default="gradient,occlusion,rise,edges")
    args = parser.parse_args()
    sizes = [int(s) for s in args.tiles.split(",")]
    explainers = args.explainers.split(",")
    root = Path(tempfile.mkdtemp(prefix="xbench-bench-scale-"))
    rows = []
    for tiles in sizes:
        path = task_with_tiles(args.task, tiles, root)
        run_task(path, root / f"warm-{tiles}", explainers=["random"])  # data + model, not timed
        t = time.perf_counter()
        summary = run_task(path, root / f"run-{tiles}", explainers=explainers)
        wall = time.perf_counter() - t
        assert summary.ok, summary.failures
        records = load_records(root / f"run-{tiles}")
        explained = int(records.loc[records["tile"] >= 0, "tile"].nunique())
        rows.append((tiles, explained, wall, os.getloadavg()[0]))
        print(
            f"{tiles:>4} tiles asked, {explained:>4} explained: {wall:7.1f} s, {wall / explained:.3f} s/tile, "
            f"load {rows[-1][3]:.1f}",
            flush=True,
        )
    n = np.array([r[1] for r in rows], dtype=float)
    wall = np.array([r[2] for r in rows])
    per_tile, fixed = np.polyfit(n, wall, 1)
    residual = wall - (fixed + per_tile * n)
    print(
        f"fit: {fixed:.1f} s fixed + {per_tile:.3f} s per explained tile; residuals "
        + ", ".join(f"{r:+.1f}" for r in residual)
        + " s"
    )


if __name__ == "__main__":
    main()
