"""`run_task`: a task file to a run folder (grid -> models -> truth -> cells -> store)."""

from __future__ import annotations

import importlib.metadata
import platform
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xbench import __version__
from xbench.runs.execute import prepare, task_and_data
from xbench.runs.executors import executor_for
from xbench.runs.grid import Grid, content_hash, expand_grid, validate_task_keys
from xbench.runs.store import (
    CONCEPT_COLUMNS,
    CURVE_COLUMNS,
    RECORD_COLUMNS,
    RECORD_SORT,
    RELIANCE_COLUMNS,
    CellStore,
    write_json,
    write_npz,
    write_table,
)


@dataclass
class RunSummary:
    out_dir: Path
    cells_total: int = 0
    cells_done: int = 0
    cells_cached: int = 0
    cells_failed: int = 0
    cells_skipped: int = 0
    seconds: float = 0.0
    failures: list[dict[str, str]] = field(default_factory=list)
    variants: dict[str, RunSummary] = field(default_factory=dict)  # protocol variants, in OUT/variants/NAME

    @property
    def ok(self) -> bool:
        return self.cells_failed == 0


def _versions() -> dict[str, str]:
    out = {"python": platform.python_version(), "xbench": __version__}
    for name in ("numpy", "scipy", "scikit-learn", "scikit-image", "pandas", "torch", "captum"):
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _git_commit() -> str | None:
    try:
        res = subprocess.run(
            ["git", "rev-parse", "HEAD"], cwd=Path(__file__).parent, capture_output=True, text=True, timeout=5
        )
        return res.stdout.strip() or None if res.returncode == 0 else None
    except (OSError, subprocess.SubprocessError):
        return None


def run_task(
    task: str | Path,
    out_dir: str | Path,
    *,
    jobs: int = 1,
    executor: str = "local",
    scheduler: str | None = None,
    progress: bool = False,
    explainers: list[str] | None = None,
    models: list[str] | None = None,
    seeds: list[int] | None = None,
    metrics: list[str] | None = None,
    variant: str | None = None,
) -> RunSummary:
    """Run a task's grid into ``out_dir``; finished cells are reused, so a killed run resumes.

    The task's protocol variants (``[[variants]]``) run afterwards, each into ``out_dir/variants/NAME``;
    ``variant`` runs one variant alone (its settings over the task's, its subsets as filters)."""
    from xbench.tasks import apply_variant, load_task

    started = time.perf_counter()
    task_obj = load_task(task)  # validates the file before any work
    if variant is not None:
        task_obj = apply_variant(task_obj, variant)
        spec = next(v for v in task_obj.variants if v.name == variant)
        explainers = _narrow(explainers, spec.explainers)
        models = _narrow(models, spec.models)
        metrics = _narrow(metrics, spec.metrics)
    else:  # every variant's settings are checked against the registries before any work
        for v in task_obj.variants:
            validate_task_keys(apply_variant(task_obj, v.name))
    task_path = str(Path(task_obj.path).resolve())
    grid: Grid = expand_grid(task_obj, explainers=explainers, models=models, seeds=seeds, metrics=metrics)
    run_for = executor_for(executor, jobs, scheduler)  # validates the executor name before any work
    out = Path(out_dir)
    store = CellStore(out)
    run_id = content_hash(
        {"task": task_obj.file_hash, "xbench": __version__, "cells": [c.cell_id for c in grid.cells]}, 12
    )
    summary = RunSummary(out_dir=out, cells_total=len(grid.cells), cells_skipped=len(grid.skipped))

    # Models first (on this process), so that workers only load from the training cache.
    pairs = sorted(
        {(c.model, c.seed) for c in grid.cells}, key=lambda p: ([m.name for m in task_obj.models].index(p[0]), p[1])
    )
    task_and_data(task_path)
    model_rows, preps = [], {}
    for name, seed in tqdm(pairs, desc="models + truth", disable=not progress, unit="model"):
        preps[(name, seed)] = prep = prepare(task_path, name, seed)  # trains or loads the model once
        trained = prep.trained
        model_rows.append(
            {
                "name": name,
                "kind": next(m.kind for m in task_obj.models if m.name == name),
                "seed": seed,
                "accuracy": accuracy_summary(trained.accuracy),
                "seconds": trained.seconds,
                "cached": bool(trained.cached),
                "params": int(sum(p.numel() for p in trained.handle.module.parameters()))
                if trained.handle.module is not None
                else None,
            }
        )

    pending = [c for c in grid.cells if not store.is_done(c.cell_id)]
    summary.cells_cached = len(grid.cells) - len(pending)
    metric_settings = {k: dict(task_obj.metric_settings.get(k, {})) for k in grid.metrics}
    jobs_list = [(task_path, c, list(grid.metrics), metric_settings, run_id) for c in pending]
    bar = tqdm(total=len(pending), desc="cells", disable=not progress, unit="cell")
    for cell, result in run_for(jobs_list):
        store.commit(cell.cell_id, result)
        if result["status"] == "ok":
            summary.cells_done += 1
        else:
            summary.cells_failed += 1
            summary.failures.append({"cell": cell.describe(), "error": result["meta"]["error"]})
        bar.set_postfix_str(cell.explainer)
        bar.update(1)
    bar.close()
    # Failed cells of an earlier attempt that were not retried here cannot exist: every pending cell ran.
    assemble(out, task_obj, grid, store, preps, model_rows, run_id)
    if variant is None:
        summary.variants = run_variants(
            task, task_obj.variants, out, jobs=jobs, executor=executor, scheduler=scheduler, progress=progress,
            explainers=explainers, models=models, seeds=seeds, metrics=metrics,
        )  # fmt: skip
    summary.seconds = time.perf_counter() - started
    return summary


def _narrow(chosen: list[str] | None, subset: list[str] | None) -> list[str] | None:
    """The run's filter within a variant's subset (either may be None = everything)."""
    if subset is None:
        return chosen
    return list(subset) if chosen is None else [c for c in chosen if c in subset]


def run_variants(task: str | Path, variants: list, out: Path, **options: Any) -> dict[str, RunSummary]:
    """Run each protocol variant of a task into ``out/variants/NAME`` (same models, cached; new cells)."""
    return {v.name: run_task(task, out / "variants" / v.name, variant=v.name, **options) for v in variants}


def assemble(
    out: Path, task: Any, grid: Grid, store: CellStore, preps: dict, model_rows: list[dict], run_id: str
) -> None:
    """Write the run folder's tables, artifacts and manifest from committed cells (atomic writes)."""
    ids = [c.cell_id for c in grid.cells]
    records = store.table(ids, "records", RECORD_COLUMNS)
    if len(records):
        records = records.sort_values(RECORD_SORT, kind="stable").reset_index(drop=True)
        records["seed"] = records["seed"].astype("int64")
        records["tile"] = records["tile"].astype("int64")
        records["value"] = records["value"].astype("float64")
    write_table(out / "records.parquet", records)
    write_table(out / "records.csv", records)
    curves = store.table(ids, "curves", CURVE_COLUMNS)
    write_table(out / "curves.parquet", curves)
    concepts = store.table(ids, "concepts", CONCEPT_COLUMNS)
    write_table(out / "concepts.parquet", concepts.astype({c: "object" for c in ("matched_type",)}))
    reliance_rows = []
    for (name, seed), prep in preps.items():
        if prep.reliance is None:
            continue
        for row in prep.reliance.type_table.to_dict("records"):
            reliance_rows.append(
                {
                    "task": task.name,
                    "model": name,
                    "seed": seed,
                    "kind": row["kind"],
                    "mean_drop": row["mean_drop"],
                    "ci_low": row["ci_low"],
                    "ci_high": row["ci_high"],
                    "n": int(row["n"]),
                }
            )
    write_table(out / "reliance.parquet", pd.DataFrame(reliance_rows, columns=RELIANCE_COLUMNS))

    cells_meta = []
    for cell in grid.cells:
        meta = store.meta(cell.cell_id) or {}
        cells_meta.append(
            {
                "cell_id": cell.cell_id,
                "model": cell.model,
                "seed": cell.seed,
                "explainer": cell.explainer,
                "status": meta.get("status", "missing"),
                "seconds": meta.get("seconds"),
                "error": meta.get("error"),
                "notes": meta.get("notes", {}),
                "cost": meta.get("cost"),
            }
        )
    for (name, seed), prep in preps.items():
        g = min(int(task.run["gallery_tiles"]), len(prep.explain_index))
        arrays: dict[str, np.ndarray] = {
            "images": prep.images[:g],
            "band_names": np.array(prep.data.test.band_names),
            "planted": prep.planted[:g],
            "tiles": prep.explain_index[:g].astype(np.int64),
            "class_names": np.array(task.class_names),
            "targets": prep.targets[:g],
        }
        if prep.reliance is not None:
            arrays["evidence"] = prep.reliance.evidence[:g].astype(np.float32)
        for cell in grid.cells:
            if cell.model == name and cell.seed == seed:
                maps = store.arrays(cell.cell_id, "gallery")
                if maps is not None:
                    arrays[f"map__{cell.explainer}"] = maps["map"]
                clusters = store.arrays(cell.cell_id, "clusters")
                if clusters is not None:
                    write_npz(
                        out / "artifacts" / f"clusters__{task.name}__{name}__{seed}.npz",
                        clusters | {"images": prep.images[:g], "class_names": np.array(task.class_names)},
                    )
        write_npz(out / "artifacts" / f"gallery__{task.name}__{name}__{seed}.npz", arrays)

    data = task.data
    counts = {k: int(v) for k, v in data.counts.items()}
    manifest = {
        "run_id": run_id,
        "task": task.name,
        "task_file": str(task.path),
        "task_hash": task.file_hash,
        "description": task.description,
        "variant": getattr(task, "variant", None),
        "xbench_version": __version__,
        "versions": _versions(),
        "git_commit": _git_commit(),
        "machine": {
            "platform": platform.platform(),
            "processor": platform.machine(),
            "python": platform.python_version(),
        },
        "seeds": sorted({c.seed for c in grid.cells}),
        "data": {
            "recipe": data.recipe or None,
            "pack": data.pack,
            "size": int(data.size),
            "counts": counts,
            "label_rule": "labels of the tile pack" if data.pack else describe_label_rule(data.labels),
            "class_names": list(task.class_names),
            "label_noise": float(data.label_noise),
            "cue": describe_cue(data),
            "presence": data.presence,
            "driving_types": {task.class_names[k]: v for k, v in task.class_driving_types.items()},
            "lookalike_types": list(task.lookalike_types),
        },
        "models": model_rows,
        "explainers": {k: task.explainer_settings.get(k, {}) for k in dict.fromkeys(c.explainer for c in grid.cells)},
        "explainer_order": list(dict.fromkeys(c.explainer for c in grid.cells)),
        "metrics": {k: task.metric_settings.get(k, {}) for k in task.metrics},
        "metric_order": list(grid.metrics),
        "explain_tiles": int(len(next(iter(preps.values())).explain_index)) if preps else 0,
        "skipped": grid.skipped,
        "cells": cells_meta,
    }
    write_json(out / "manifest.json", manifest)


def describe_label_rule(labels: dict[str, Any]) -> str:
    """One sentence for the methods text, from the task's declarative label rule."""
    rules = labels.get("rule", []) or []
    parts = []
    for rule in rules:
        stat = rule.get("stat", "coverage")
        above = rule.get("above", 0)
        what = (
            f"{rule.get('type')} {stat} above {above:g}"
            if stat == "coverage"
            else f"more than {above:g} {rule.get('type')} instance(s)"
        )
        parts.append(f"'{rule.get('class')}' when {what}")
    default = labels.get("default", (labels.get("classes") or ["?"])[0])
    return (
        ("first matching rule: " + "; ".join(parts) + f"; otherwise '{default}'") if parts else f"all tiles '{default}'"
    )


def describe_cue(data: Any) -> str | None:
    if not data.cue:
        return None
    cue = ", ".join(f"{k}={v}" for k, v in sorted(data.cue.items()))
    rates = ", ".join(f"{k} {v:g}" for k, v in sorted(data.cue_rates.items()))
    return f"spurious cue ({cue}) with the label-correlated rate per split: {rates}"


def accuracy_summary(accuracy: dict[str, float]) -> dict[str, float]:
    """The trainer's accuracy table plus the short names the report reads (train, val, test, balanced_test)."""
    out = {k: float(v) for k, v in accuracy.items()}
    for split in ("train", "val", "test"):
        if f"{split}_accuracy" in out:
            out.setdefault(split, out[f"{split}_accuracy"])
        if f"{split}_balanced_accuracy" in out:
            out.setdefault(f"balanced_{split}", out[f"{split}_balanced_accuracy"])
    return out
