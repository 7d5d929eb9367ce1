"""`xbench train TASK [--model M] [--seed S]`: train (or load from the cache) a task's models.

Prints and writes the accuracy table (model, seed, train/val/test accuracy and balanced accuracy,
seconds, cached|trained) and, per model, the reliance table: the mean drop of the target-class
probability when all instances of a structure type (or the spurious cue) are removed from the test tiles,
with a 95% bootstrap interval (see ``xbench.truth``).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import pandas as pd

from xbench.errors import XbenchInputError


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("task", help="a shipped task name (see tasks/) or a task file path")
    parser.add_argument(
        "--model",
        action="append",
        default=None,
        help="train only this model (repeatable; default: all of the task's models)",
    )
    parser.add_argument(
        "--seed",
        type=int,
        action="append",
        default=None,
        help="train only this seed (repeatable; default: the task's seeds)",
    )
    parser.add_argument("--out", default="xbench-train", help="folder for the tables (default: ./xbench-train)")
    parser.add_argument(
        "--reliance-tiles",
        type=int,
        default=None,
        help="test tiles used for the reliance table (default: all test tiles)",
    )
    parser.add_argument("--no-reliance", action="store_true", help="skip the reliance table")
    parser.add_argument("--no-cache", action="store_true", help="retrain even if a cached model exists")


def _fmt(df: pd.DataFrame) -> str:
    return df.to_string(index=False, float_format=lambda v: f"{v:.3f}")


def run(args: argparse.Namespace) -> int:
    from xbench.api import train
    from xbench.runs.grid import check_safe_name
    from xbench.tasks import load_task

    task = load_task(args.task)
    check_safe_name(task.name, f"{task.path}: name")  # it becomes part of the output file names
    for name in args.model or []:
        task.model_spec(name)  # an unknown model is one error line before any work
    for s in args.seed or []:
        if s < 0:
            raise XbenchInputError("--seed", "seeds are non-negative integers", found=s)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    print(f"task {task.name}: building tiles and training ...", file=sys.stderr, flush=True)
    rel_rows: list[dict] = []

    def show_model(row: dict) -> None:
        print(_fmt(pd.DataFrame([row])), flush=True)

    def show_reliance(model: str, seed: int, table: pd.DataFrame, relied: list[str]) -> None:
        print(
            f"\nreliance of {model} (seed {seed}): mean drop of the target-class probability when the type is "
            "removed, over the test tiles that hold it (n; 95% bootstrap CI)"
        )
        print(_fmt(table[["kind", "role", "mean_drop", "ci_low", "ci_high", "n"]]))
        print("relied on:", ", ".join(relied) or "(nothing)", "\n", flush=True)
        for rec in table.to_dict("records"):
            rel_rows.append({"task": task.name, "model": model, "seed": seed, **rec})

    result = train(
        task,
        models=args.model,
        seeds=args.seed,
        use_cache=not args.no_cache,
        reliance=not args.no_reliance,
        reliance_tiles=args.reliance_tiles,
        on_model=show_model,
        on_reliance=show_reliance,
    )
    if result.note:
        print(result.note, flush=True)
    acc_df = result.accuracy
    print(f"\naccuracy of the models of task {task.name} ({time.perf_counter() - t0:.1f} s)")
    print(_fmt(acc_df))
    acc_df.to_csv(out / f"{task.name}__train.csv", index=False)
    (out / f"{task.name}__train.md").write_text(
        acc_df.to_markdown(index=False, floatfmt=".3f") if _has_tabulate() else _fmt(acc_df)
    )
    if rel_rows:
        pd.DataFrame(rel_rows).to_csv(out / f"{task.name}__reliance.csv", index=False)
    print(f"\nwrote {out}/{task.name}__train.csv" + (f" and {task.name}__reliance.csv" if rel_rows else ""))
    return 0


def _has_tabulate() -> bool:
    try:
        import tabulate  # noqa: F401
    except ImportError:
        return False
    return True
