"""`xbench demo`: the whole pipeline on the small demo task (Vellardine), report included."""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from xbench.commands.run import print_summary
from xbench.runs import run_task


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--out", type=Path, default=Path("xbench-demo"), help="demo folder (default: ./xbench-demo)")
    parser.add_argument("--jobs", type=int, default=1, help="cells run at once")
    parser.add_argument("--quiet", action="store_true", help="no progress bars")


def run(args: argparse.Namespace) -> int:
    from xbench.report import write_report

    started = time.perf_counter()
    run_dir = args.out / "run"
    report_dir = args.out / "report"
    print("xbench demo: Vellardine forest district (synthetic), task 'demo'")
    summary = run_task("demo", run_dir, jobs=args.jobs, progress=not args.quiet)
    print_summary(summary)
    report = write_report([run_dir], report_dir)
    print(f"report: {report_dir}/ ({len(report.paths)} files written)")
    for warning in report.warnings[:3]:
        print(f"  note: {warning}")
    if len(report.warnings) > 3:
        print(f"  ... {len(report.warnings) - 3} more notes in {report_dir / 'report.log'}")
    print("look at:")
    print(f"  {report_dir / 'report.html'}   tables and figures in one page")
    print(f"  {report_dir / 'methods.md'}    methods text (with {report_dir / 'refs.bib'})")
    print(f"  {run_dir / 'records.csv'}     every value, one row each")
    print(f"demo finished in {time.perf_counter() - started:.0f} s")
    return 0 if summary.ok else 1
