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
    from xbench.models.train import train_model
    from xbench.runs.grid import check_safe_name
    from xbench.tasks import build_task_data, load_task
    from xbench.truth import compute_reliance

    task = load_task(args.task)
    check_safe_name(task.name, f"{task.path}: name")  # it becomes part of the output file names
    specs = task.models
    if args.model:
        specs = [task.model_spec(m) for m in args.model]
    seeds = args.seed if args.seed is not None else task.seeds
    for s in seeds:
        if s < 0:
            raise XbenchInputError("--seed", "seeds are non-negative integers", found=s)
    t0 = time.perf_counter()
    print(f"task {task.name}: building tiles ...", file=sys.stderr, flush=True)
    data = build_task_data(task)
    print(
        f"task {task.name}: {len(data.train)}/{len(data.val)}/{len(data.test)} tiles "
        f"({time.perf_counter() - t0:.1f} s)",
        file=sys.stderr,
        flush=True,
    )
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    if not data.test_scenes and not args.no_reliance:
        # a user's tile pack has masks but no scenes: nothing to remove instance by instance
        print(
            f"task {task.name} uses a tile pack ({task.data.pack}): models are trained or loaded and their "
            "accuracy reported; the reliance table needs synthetic scenes and is left out",
            flush=True,
        )
        args.no_reliance = True
    n_rel = len(data.test_scenes) if args.reliance_tiles is None else min(args.reliance_tiles, len(data.test_scenes))
    targets = (data.test.clean_labels if data.test.clean_labels is not None else data.test.labels)[:n_rel]
    # the cue is switched on in tiles of the classes with driving types (the non-default classes)
    cue_classes = [c for c, types in task.class_driving_types.items() if types]
    rows, rel_rows = [], []
    for spec in specs:
        for seed in seeds:
            tm = train_model(task, data, spec, seed, use_cache=not args.no_cache, batch_size=task.run["batch_size"] * 2)
            acc = tm.accuracy
            rows.append(
                {
                    "model": spec.name,
                    "kind": spec.kind,
                    "seed": seed,
                    "train_acc": acc["train_accuracy"],
                    "val_acc": acc["val_accuracy"],
                    "test_acc": acc["test_accuracy"],
                    "train_bacc": acc["train_balanced_accuracy"],
                    "val_bacc": acc["val_balanced_accuracy"],
                    "test_bacc": acc["test_balanced_accuracy"],
                    "seconds": round(tm.seconds, 1),
                    "status": "cached" if tm.cached else "trained",
                }
            )
            print(_fmt(pd.DataFrame([rows[-1]])), flush=True)
            if args.no_reliance:
                continue
            rel = compute_reliance(
                tm.handle,
                data.test_scenes[:n_rel],
                targets,
                seed=seed,
                batch_size=task.run["batch_size"] * 2,
                cue_classes=cue_classes,
            )
            table = rel.type_table.copy()
            table["role"] = [_role(task, k) for k in table["kind"]]
            print(
                f"\nreliance of {spec.name} (seed {seed}) on {n_rel} test tiles: mean drop of the "
                "target-class probability when the type is removed (95% bootstrap CI)"
            )
            print(_fmt(table[["kind", "role", "mean_drop", "ci_low", "ci_high", "n"]]))
            print("relied on:", ", ".join(rel.relied_types()) or "(nothing)", "\n", flush=True)
            for rec in table.to_dict("records"):
                rel_rows.append({"task": task.name, "model": spec.name, "seed": seed, **rec})
    acc_df = pd.DataFrame(rows)
    print(f"\naccuracy of the models of task {task.name}")
    print(_fmt(acc_df))
    acc_df.to_csv(out / f"{task.name}__train.csv", index=False)
    (out / f"{task.name}__train.md").write_text(
        acc_df.to_markdown(index=False, floatfmt=".3f") if _has_tabulate() else _fmt(acc_df)
    )
    if rel_rows:
        pd.DataFrame(rel_rows).to_csv(out / f"{task.name}__reliance.csv", index=False)
    print(f"\nwrote {out}/{task.name}__train.csv" + (f" and {task.name}__reliance.csv" if rel_rows else ""))
    return 0


def _role(task, kind: str) -> str:
    if kind == "cue":
        return "spurious cue"
    if any(kind in types for types in task.class_driving_types.values()):
        return "label-driving"
    if kind in task.lookalike_types:
        return "look-alike"
    from xbench.names import LOOKALIKE_TYPES

    return "look-alike" if kind in LOOKALIKE_TYPES else "human, not driving"


def _has_tabulate() -> bool:
    try:
        import tabulate  # noqa: F401
    except ImportError:
        return False
    return True
