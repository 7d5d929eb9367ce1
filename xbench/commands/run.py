"""`xbench run TASK.toml`: run a task's benchmark grid and write the result store."""

from __future__ import annotations

import argparse
from pathlib import Path

from xbench.runs import RunSummary, run_task


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("task", help="task file (TOML) or the name of a shipped task")
    parser.add_argument("--out", type=Path, default=None, help="run folder (default: runs/<task name>)")
    parser.add_argument("--jobs", type=int, default=1, help="cells run at once (processes or dask workers)")
    parser.add_argument("--executor", choices=["local", "dask"], default="local")
    parser.add_argument("--scheduler", default=None, help="dask scheduler address (default: a local cluster)")
    parser.add_argument("--explainers", default=None, help="comma-separated subset of the task's explainers")
    parser.add_argument("--models", default=None, help="comma-separated subset of the task's models")
    parser.add_argument("--seeds", default=None, help="comma-separated subset of seeds")
    parser.add_argument("--metrics", default=None, help="comma-separated subset of the task's metrics")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def _split(text: str | None, cast: type = str) -> list | None:
    return None if text is None else [cast(t.strip()) for t in text.split(",") if t.strip()]


def print_summary(summary: RunSummary) -> None:
    print(
        f"cells: {summary.cells_done} run, {summary.cells_cached} reused from an earlier attempt, "
        f"{summary.cells_failed} failed, {summary.cells_skipped} not applicable (of {summary.cells_total})"
    )
    for failure in summary.failures:
        print(f"  failed: {failure['cell']}: {failure['error']}")
    print(f"time: {summary.seconds:.1f} s")
    print(f"results: {summary.out_dir}/records.parquet (and records.csv, manifest.json, curves, artifacts)")


def run(args: argparse.Namespace) -> int:
    from xbench.tasks import load_task

    task = load_task(args.task)
    out = args.out or Path("runs") / task.name
    summary = run_task(
        args.task,
        out,
        jobs=args.jobs,
        executor=args.executor,
        scheduler=args.scheduler,
        progress=not args.quiet,
        explainers=_split(args.explainers),
        models=_split(args.models),
        seeds=_split(args.seeds, int),
        metrics=_split(args.metrics),
    )
    print_summary(summary)
    return 0 if summary.ok else 1
