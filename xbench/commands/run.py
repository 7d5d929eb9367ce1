"""`xbench run TASK.toml`: run a task's benchmark grid and write the result store."""

from __future__ import annotations

import argparse
from pathlib import Path

from xbench.errors import XbenchInputError
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


MAX_JOBS = 256  # a stated maximum for --jobs


def _split(text: str | None, cast: type = str, option: str = "") -> list | None:
    if text is None:
        return None
    out = []
    for item in (t.strip() for t in text.split(",")):
        if not item:
            continue
        try:
            value = cast(item)
        except ValueError:
            raise XbenchInputError(option, "not a comma-separated list of integers", found=text) from None
        if cast is int and value < 0:
            raise XbenchInputError(option, "negative value", expected="integers >= 0", found=text)
        out.append(value)
    return out


def print_summary(summary: RunSummary) -> None:
    print(
        f"cells: {summary.cells_done} run, {summary.cells_cached} reused from an earlier attempt, "
        f"{summary.cells_failed} failed, {summary.cells_skipped} not applicable (of {summary.cells_total})"
    )
    for failure in summary.failures:
        print(f"  failed: {failure['cell']}: {failure['error']}")
    for line in summary.repaired:
        print(f"  repaired: {line}")
    if summary.kept_earlier:
        print(f"  kept: {summary.kept_earlier} cell(s) of earlier runs (other explainers, metrics or tasks)")
    for line in summary.skipped_metrics:
        print(f"  skipped: {line}")
    for line in summary.undefined:
        print(f"  some values undefined (NaN, reason in reasons.parquet): {line}")
    for line in summary.warnings:
        print(f"  warning: {line}")
    print(f"time: {summary.seconds:.1f} s")
    print(f"results: {summary.out_dir}/records.parquet (and records.csv, manifest.json, curves, artifacts)")


def run(args: argparse.Namespace) -> int:
    from xbench.runs.grid import check_safe_name
    from xbench.tasks import load_task

    if not 1 <= args.jobs <= MAX_JOBS:
        raise XbenchInputError("--jobs", "out of range", expected=f"1 to {MAX_JOBS}", found=args.jobs)
    task = load_task(args.task)
    check_safe_name(task.name, f"{task.path}: name")
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
        seeds=_split(args.seeds, int, "--seeds"),
        metrics=_split(args.metrics),
    )
    print_summary(summary)
    if summary.records == 0:
        print(f"xbench run: error: no value was measured in {out} (every cell failed or produced no records)")
        return 1
    return 0 if summary.ok else 1
