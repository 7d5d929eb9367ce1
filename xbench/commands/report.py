"""`xbench report DIR [DIR ...]`: statistics, tables, figures, methods text and BibTeX from run folders."""

from __future__ import annotations

import argparse


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("run_dirs", nargs="+", metavar="DIR", help="run folders written by `xbench run`")
    parser.add_argument(
        "--out",
        metavar="OUT",
        default=None,
        help="folder for the report (default: DIR/report of the first run folder)",
    )
    parser.add_argument(
        "--format",
        default="md,tex,html",
        metavar="LIST",
        help="table formats, comma-separated from md, tex, html (default: all three)",
    )
    parser.add_argument(
        "--metric",
        default="mass-accuracy",
        help="quality metric of the cost-vs-quality figure (default: mass-accuracy)",
    )
    parser.add_argument(
        "--truth", default="planted", choices=["planted", "verified", "none"], help="its truth (default: planted)"
    )
    parser.add_argument("--resamples", type=int, default=2000, help="bootstrap resamples (default: 2000)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default: 0)")
    parser.add_argument("--alpha", type=float, default=0.05, help="level of the Nemenyi CD (default: 0.05)")
    parser.add_argument(
        "--against",
        metavar="KEY",
        default=None,
        help="a real method declared before the run as the comparator of every paired test, Holm over its "
        "comparisons (default: all pairs of real methods, Holm over all pairs)",
    )
    parser.add_argument(
        "--models",
        metavar="LIST",
        default=None,
        help="comma-separated models whose task x model blocks enter the report (default: all)",
    )
    parser.add_argument("--no-figures", action="store_true", help="tables and text only")
    parser.add_argument(
        "--jobs", type=int, default=None, help="processes drawing the figures (default: 2 on two or more cores)"
    )


def run(args: argparse.Namespace) -> int:
    from xbench.errors import XbenchInputError
    from xbench.report import write_report

    if args.resamples < 100:
        raise XbenchInputError("--resamples", "too few bootstrap resamples", expected=">= 100", found=args.resamples)
    if not 0 < args.alpha < 1:
        raise XbenchInputError("--alpha", "must lie strictly between 0 and 1", found=args.alpha)
    if args.jobs is not None and args.jobs < 1:
        raise XbenchInputError("--jobs", "must be at least 1", found=args.jobs)
    summary = write_report(
        args.run_dirs,
        args.out,
        args.format,
        headline_metric=args.metric,
        headline_truth=args.truth,
        n_resamples=args.resamples,
        seed=args.seed,
        alpha=args.alpha,
        figures=not args.no_figures,
        against=args.against,
        models=[m.strip() for m in args.models.split(",") if m.strip()] if args.models else None,
        jobs=args.jobs,
    )
    print(summary)
    for path in summary.paths:
        if path.parent == summary.out_dir:
            print(f"  {path}")
    if summary.n_figures:
        print(f"  {summary.out_dir / 'figures'}/ ({summary.n_figures} figures, PNG and PDF)")
    _print_recommendations(summary)
    if summary.warnings:
        print(f"notes ({len(summary.warnings)}, also in report.log):")
        for w in summary.warnings:
            print(f"  - {w}")
    return 0


def _print_recommendations(summary) -> None:
    """The recommendation page in a few lines: per block and question, the methods tied with the best."""
    from xbench.report.recommend import console_lines

    lines = console_lines(summary.recommendations)
    if lines:
        print("which explainer to use (cannot be told apart from the best; cost per tile; recommendations.md):")
        for line in lines:
            print(f"  {line}")
