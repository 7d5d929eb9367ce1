"""`xbench check`: compare a run with a baseline under faithfulness gates.

Exit codes: 0 every gate passes, 1 at least one gate fails (a regression), 2 usage or input errors
(unknown option, malformed or empty gate file, a gate naming an unknown metric, missing run folder or
records, or no gate applied at all). Before the gate table it prints what changed between the two runs'
manifests (models and their accuracy, task, explainer and metric settings, package versions).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--baseline", metavar="BASE_DIR", help="baseline run folder (default with --task: results/<task name>/)"
    )
    what = parser.add_mutually_exclusive_group(required=True)
    what.add_argument("--current", metavar="CUR_DIR", help="run folder to check")
    what.add_argument("--task", metavar="TASK.toml", help="run this task first (into --out) and check that run")
    parser.add_argument(
        "--gates",
        metavar="GATES.toml",
        help="gate file (default: built-in gates: at most 5%% worse than the baseline and no "
        "significant per-tile drop, seconds not gated)",
    )
    parser.add_argument("--json", metavar="OUT", help="write a JSON summary here")
    parser.add_argument("--junit", metavar="OUT", help="write JUnit XML here (one testcase per gate)")
    parser.add_argument(
        "--out", metavar="DIR", help="with --task: run folder to write (default: a new temporary folder)"
    )
    parser.add_argument("--jobs", type=int, default=1, metavar="N", help="with --task: worker processes")
    parser.add_argument("--failures-only", action="store_true", help="print only the failing gates in the table")
    parser.add_argument(
        "--explainers", metavar="LIST", help="check only these explainers (comma-separated keys)", default=None
    )
    parser.add_argument(
        "--metrics", metavar="LIST", help="check only these metrics (comma-separated keys)", default=None
    )
    parser.add_argument(
        "--allow-missing",
        action="store_true",
        help="groups of the baseline absent from the current run are skipped (and listed), not failed",
    )


def _run_task(args: argparse.Namespace, task) -> Path:
    """Run ``--task`` into ``--out`` (or a new temporary folder) and return the run folder."""
    from xbench.errors import XbenchInputError
    from xbench.runs import run_task

    if args.jobs < 1:
        raise XbenchInputError("--jobs", "must be at least 1", found=args.jobs)
    out = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix=f"xbench-check-{task.name}-"))
    print(f"xbench check: running task {task.name} into {out}", file=sys.stderr)
    summary = run_task(args.task, out, jobs=args.jobs)
    if summary.cells_failed:
        print(
            f"xbench check: warning: {summary.cells_failed} cell(s) failed in the run "
            f"(see {out}/manifest.json); their values will be missing",
            file=sys.stderr,
        )
    return Path(summary.out_dir)


def run(args: argparse.Namespace) -> int:
    from xbench.check import compare, load_gates, load_records, write_outputs
    from xbench.errors import XbenchInputError, repo_root

    if args.task:
        from xbench.tasks import load_task

        task = load_task(args.task)  # a bad task file, gate file or baseline fails before any work
        baseline = Path(args.baseline) if args.baseline else repo_root() / "results" / task.name
        load_gates(args.gates)
        load_records(baseline, "baseline")
        current = _run_task(args, task)
    else:
        if not args.baseline:
            raise XbenchInputError("xbench check", "--baseline BASE_DIR is required with --current")
        current, baseline = Path(args.current), Path(args.baseline)

    result = compare(
        current,
        baseline=baseline,
        gates=args.gates,
        explainers=_keys(args.explainers),
        metrics=_keys(args.metrics),
        allow_missing=args.allow_missing,
    )
    if not result.outcomes:
        raise XbenchInputError(
            str(args.gates or "<built-in gates>"),
            "no gate applied to the run (the selectors, --explainers or --metrics match nothing)",
            expected="gates that match the run's records",
        )
    print(result.table(only_failures=args.failures_only))
    write_outputs(result, json_path=args.json, junit_path=args.junit)
    return 0 if result.passed else 1


def _keys(text: str | None) -> list[str] | None:
    if text is None:
        return None
    keys = [k.strip() for k in text.split(",") if k.strip()]
    return keys or None
