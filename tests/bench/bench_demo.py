"""``xbench demo`` from a cold cache: wall time, peak memory, and the harness overhead beside model calls.

    python tests/bench/bench_demo.py [--repeat 1] [--jobs N]   (default: the demo's own default, 2 on 2 cores)

Runs ``xbench demo --quiet`` in a fresh temporary folder with a fresh ``XBENCH_CACHE`` (synthesis,
training, every explainer and metric, the report), as a child process, and prints its wall seconds, user
and system CPU seconds and peak resident memory (``getrusage`` of the children: ru_maxrss), median of
``--repeat`` runs, with the load average before and after. Then the run folder's manifest gives the
cells' seconds and the model's share at its limit (see bench_models.py for the full table).
Targets: <= 60 s cold, <= 1 GiB peak.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def one_run(jobs: int | None) -> tuple[float, float, float, float, Path]:
    root = Path(tempfile.mkdtemp(prefix="xbench-bench-demo-"))
    env = dict(os.environ, XBENCH_CACHE=str(root / "cache"), MPLBACKEND="Agg")
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    command = [sys.executable, "-m", "xbench.cli", "demo", "--quiet", "--out", str(root / "demo")]
    subprocess.run(
        command + ([] if jobs is None else ["--jobs", str(jobs)]),
        check=True,
        env=env,
        stdout=subprocess.DEVNULL,
    )
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    rss_gib = after.ru_maxrss / 2**20  # KiB -> GiB; the largest child so far
    return wall, after.ru_utime - before.ru_utime, after.ru_stime - before.ru_stime, rss_gib, root / "demo"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--jobs", type=int, default=None, help="default: what `xbench demo` uses by itself")
    args = parser.parse_args()
    runs = []
    for i in range(args.repeat):
        load = os.getloadavg()[0]
        runs.append(one_run(args.jobs))
        wall, user, system, rss, _ = runs[-1]
        print(
            f"run {i + 1}: {wall:.1f} s wall, {user:.1f} s user, {system:.1f} s sys, peak RSS {rss:.2f} GiB; "
            f"load {load:.1f} -> {os.getloadavg()[0]:.1f}",
            flush=True,
        )
    walls = [r[0] for r in runs]
    print(f"xbench demo cold: median {np.median(walls):.1f} s wall, peak RSS {max(r[3] for r in runs):.2f} GiB")
    folder = runs[-1][4]
    run_dir = next((p.parent for p in folder.rglob("manifest.json")), None)
    if run_dir is not None:
        subprocess.run(
            [sys.executable, str(Path(__file__).with_name("bench_models.py")), "--run", str(run_dir), "--repeat", "3"],
            check=False,
        )


if __name__ == "__main__":
    main()
