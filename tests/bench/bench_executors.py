"""Parallel efficiency of the executors on the demo grid: one local process, ``--jobs 2`` (a local process
pool) and ``--executor dask`` on a 2-worker local cluster.

    python tests/bench/bench_executors.py [--task demo] [--explainers a,b,...] [--repeat 1]

Rounds run each executor once, in turn (a drift of the machine touches each alike); each run is a fresh
``xbench run`` process (as a user runs it: the tile packs, the model from the training cache and the truth
are prepared in every run) into a fresh temporary folder; a first, untimed run trains the model if the
cache lacks it. Prints every round's wall seconds, then the median of ``--repeat``, the speedup over one
local process, the efficiency (speedup / workers) and whether the records equal those of the local
run (every value but wall-clock ``seconds``). Targets: dask >= 1.6x one process and >= ``--jobs 2``.
The machine's load average is printed beside each figure.
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

from xbench.runs import load_records, run_task

KEY = ["model", "seed", "explainer", "metric", "truth", "tile"]


def comparable(out: Path):
    r = load_records(out)
    return r[r["metric"] != "seconds"].drop(columns=["run_id"]).sort_values(KEY).reset_index(drop=True)


def cpu_seconds() -> float:
    own = resource.getrusage(resource.RUSAGE_SELF)
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--task", default="demo")
    parser.add_argument("--explainers", default=None, help="comma-separated subset (default: the task's)")
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    explainers = args.explainers.split(",") if args.explainers else None
    root = Path(tempfile.mkdtemp(prefix="xbench-bench-exec-"))
    run_task(args.task, root / "warm", explainers=explainers or ["random"])  # trains / loads the model once
    setups = [("local, 1 process", "local", 1), ("local, --jobs 2", "local", 2), ("dask, 2 local workers", "dask", 2)]
    runs: dict[str, list[tuple[float, float, float, Path]]] = {label: [] for label, _, _ in setups}
    # rounds interleave the executors, so a drift of the machine's load or clock touches each alike
    for i in range(args.repeat):
        for label, executor, jobs in setups:
            out = root / f"{executor}-{jobs}-{i}"
            c0 = cpu_seconds()
            t = time.perf_counter()
            cmd = [sys.executable, "-m", "xbench.cli", "run", args.task, "--out", str(out), "--jobs", str(jobs)]
            cmd += ["--executor", executor] + (["--explainers", ",".join(explainers)] if explainers else [])
            subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            runs[label].append((time.perf_counter() - t, cpu_seconds() - c0, os.getloadavg()[0], out))
        print(f"round {i + 1}: " + ", ".join(f"{label} {r[-1][0]:.1f} s" for label, r in runs.items()), flush=True)
    results = {}
    for label, _, jobs in setups:
        walls, cpus, loads, outs = zip(*runs[label], strict=True)
        results[label] = (float(np.median(walls)), jobs, outs[-1], float(np.mean(loads)), float(np.median(cpus)))
    base_wall, _, base_out, _, base_cpu = results["local, 1 process"]
    reference = comparable(base_out)
    print(
        f"{'executor':<24}{'wall s':>8}{'speedup':>9}{'efficiency':>12}{'CPU s':>8}{'CPU vs 1':>10}"
        f"{'records equal':>15}{'load':>7}"
    )
    for label, (wall, workers, out, load, cpu) in results.items():
        speedup = base_wall / wall
        same = comparable(out).equals(reference)
        print(
            f"{label:<24}{wall:>8.1f}{speedup:>9.2f}{speedup / workers:>12.2f}{cpu:>8.1f}{cpu / base_cpu:>10.2f}"
            f"{str(same):>15}{load:>7.1f}"
        )
    print(
        "CPU s: user + system seconds of the run's process and its (waited-for) child processes; on a loaded "
        "machine the CPU ratio is the load-independent cost of parallelism"
    )


if __name__ == "__main__":
    main()
