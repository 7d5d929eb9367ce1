"""`run_task`: a task file to a run folder (grid -> models -> truth -> cells -> store)."""

from __future__ import annotations

import functools
import platform
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xbench import __version__
from xbench.data import tiles_from_pack
from xbench.runs.execute import (
    Prepared,
    gallery_positions,
    keep_explanation,
    prefetch_concept_sets,
    prepare,
    task_and_data,
)
from xbench.runs.executors import CellJob, DaskCluster, LocalPool, executor_for, import_backends
from xbench.runs.grid import Grid, content_hash, expand_grid, package_versions, validate_task_keys
from xbench.runs.store import (
    CELL_IDENTITY,
    REASON_COLUMNS,
    RECORD_COLUMNS,
    RECORD_SORT,
    RELIANCE_COLUMNS,
    CellStore,
    read_manifest,
    read_table,
    write_json,
    write_npz,
    write_table,
)

if TYPE_CHECKING:
    from xbench.tasks import DataSpec, Task, Variant

# A model whose balanced test accuracy is within this margin of chance is flagged in the run summary.
CHANCE_MARGIN = 0.1
# An explainer whose maps are all zero on at least this share of the explained tiles is flagged.
ZERO_MAP_SHARE = 0.5


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
    records: int = 0  # values measured by this run's cells (reused cells included)
    repaired: list[str] = field(default_factory=list)  # damaged cells found and computed again
    skipped_metrics: list[str] = field(default_factory=list)  # "metric/truth: reason" (once each)
    undefined: list[str] = field(default_factory=list)  # "metric/truth: reason" of NaN values (once each)
    warnings: list[str] = field(default_factory=list)  # models at chance level, saturated maps...
    kept_earlier: int = 0  # cells of earlier runs (other explainers, metrics or tasks) kept in the folder
    variants: dict[str, RunSummary] = field(default_factory=dict)  # protocol variants, in OUT/variants/NAME

    @property
    def ok(self) -> bool:
        """True when every cell finished and something was measured."""
        return self.cells_failed == 0 and self.records > 0


def _versions() -> dict[str, str]:
    return {"python": platform.python_version(), "xbench": __version__} | package_versions()


def _git_commit() -> str | None:
    try:
        res = subprocess.run(
            ["git", "rev-parse", "HEAD"], cwd=Path(__file__).parent, capture_output=True, text=True, timeout=5
        )
        return res.stdout.strip() or None if res.returncode == 0 else None
    except (OSError, subprocess.SubprocessError):
        return None


@functools.lru_cache(maxsize=1)  # the source tree of a running process does not change
def _git_state() -> dict[str, Any]:
    """The commit of xbench's own source tree and whether it has uncommitted changes (None outside git).

    Only a repository whose top level holds this package counts, so an install inside another project's
    environment does not record that project's commit.
    """
    here = Path(__file__).resolve().parent.parent  # the xbench package folder
    try:
        top = subprocess.run(
            ["git", "rev-parse", "--show-toplevel"], cwd=here, capture_output=True, text=True, timeout=5
        )
        if top.returncode != 0 or Path(top.stdout.strip()).resolve() != here.parent:
            return {"commit": None, "modified": None}
        status = subprocess.run(
            ["git", "status", "--porcelain", "--", "xbench"],
            cwd=here.parent,
            capture_output=True,
            text=True,
            timeout=10,
        )
        modified = bool(status.stdout.strip()) if status.returncode == 0 else None
    except (OSError, subprocess.SubprocessError):
        return {"commit": None, "modified": None}
    return {"commit": _git_commit(), "modified": modified}


def run_task(
    task: str | Path | dict[str, Any] | Task,
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
        validate_task_keys(task_obj)  # the task's own settings first, then each variant's where it stands
        for v in task_obj.variants:
            validate_task_keys(apply_variant(task_obj, v.name))
    task_path = task_obj  # the parsed task itself travels to the cells: parsed once, also when given as a dict
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
    from xbench.explainers import get_explainer

    _, data = task_and_data(task_path)
    if isinstance(run_for, LocalPool | DaskCluster) and any(
        "concept-sets" in get_explainer(name).needs for name in dict.fromkeys(c.explainer for c in grid.cells)
    ):  # a worker makes TCAV's example sets while this process trains (the cell reads them from the cache)
        run_for.prefetch(prefetch_concept_sets, task_path, list(data.test.mask_names))
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
                "weights_hash": trained.weights_hash,
                "params": int(sum(p.numel() for p in trained.handle.module.parameters()))
                if trained.handle.module is not None
                else None,
            }
        )

    pending = [c for c in grid.cells if not store.is_done(c.cell_id)]
    summary.cells_cached = len(grid.cells) - len(pending)
    for cell in pending:
        if cell.cell_id in store.problems:
            summary.repaired.append(f"{cell.describe()}: {store.problems[cell.cell_id]}; computed again")
    metric_settings = {k: dict(task_obj.metric_settings.get(k, {})) for k in grid.metrics}
    jobs_list: list[CellJob] = [(task_path, c, list(grid.metrics), metric_settings, run_id) for c in pending]
    # models flagged before the cells: a model at chance level explains nothing worth ranking
    summary.warnings.extend(model_warnings(task_obj, model_rows))
    if pending and scheduler is None:  # this process computes cells (a remote scheduler's workers do it all)
        import_backends()  # once per process, as the workers do when they start: not in the first cell's time
    bar = tqdm(total=len(pending), desc="cells", disable=not progress, unit="cell")
    for cell, result in run_for(jobs_list):
        keep_explanation(preps[(cell.model, cell.seed)], cell, result)  # for the variants' cells
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
    assemble(out, task_obj, grid, store, preps, model_rows, run_id, summary)
    if variant is None:
        summary.variants = run_variants(
            task_obj, task_obj.variants, out, jobs=jobs, executor=executor, scheduler=scheduler, progress=progress,
            explainers=explainers, models=models, seeds=seeds, metrics=metrics,
        )  # fmt: skip
    summary.seconds = time.perf_counter() - started
    return summary


def _narrow(chosen: list[str] | None, subset: list[str] | None) -> list[str] | None:
    """The run's filter within a variant's subset (either may be None = everything)."""
    if subset is None:
        return chosen
    return list(subset) if chosen is None else [c for c in chosen if c in subset]


def run_variants(task: Task, variants: list[Variant], out: Path, **options: Any) -> dict[str, RunSummary]:
    """Run each protocol variant of a task into ``out/variants/NAME`` (same models, cached; new cells)."""
    return {v.name: run_task(task, out / "variants" / v.name, variant=v.name, **options) for v in variants}


def model_warnings(task: Task, model_rows: list[dict[str, Any]]) -> list[str]:
    """Models whose balanced test accuracy is near chance (1 / number of classes)."""
    chance = 1.0 / max(len(task.class_names), 1)
    out = []
    for row in model_rows:
        acc = row["accuracy"].get("balanced_test", row["accuracy"].get("test"))
        if acc is not None and acc <= chance + CHANCE_MARGIN:
            out.append(
                f"model {row['name']} seed {row['seed']} is near chance level (balanced test accuracy {acc:.3f}, "
                f"chance {chance:.3f}): its explanations say little about evidence"
            )
    return out


def _identity(cell_dict: dict[str, Any]) -> tuple:
    return tuple(cell_dict.get(k) for k in CELL_IDENTITY)


def kept_cells(grid: Grid, store: CellStore) -> tuple[list[str], dict[str, set[str] | None], set[str]]:
    """The cells whose values the run folder shows, in priority order, and the metrics each contributes.

    This run's cells come first; then cells committed earlier (other explainers, metric subsets or tasks),
    newest first. A value (task, model, seed, explainer, metric) comes from the first cell that has it, so a
    rerun with fewer explainers or metrics keeps the rest, and a recomputed cell replaces its earlier version.
    A failed cell of this run hides earlier values of its metrics (they were computed under other settings).
    Returns the ids, per id the metric keys it contributes (None = all of its rows), and the ids that are
    the first of their identity (their curves, concept rows and gallery maps are shown).
    """
    committed = store.committed()
    ids = [c.cell_id for c in grid.cells]
    earlier = sorted(
        (cid for cid in committed if cid not in set(ids)),
        key=lambda cid: -float(committed[cid].get("committed_at", 0.0)),
    )
    covered: set[tuple] = set()
    seen: set[tuple] = set()
    order: list[str] = []
    first: set[str] = set()
    contributes: dict[str, set[str] | None] = {}
    for cell in grid.cells:
        ident = (cell.task, cell.model, cell.seed, cell.explainer)
        covered.update(ident + (m,) for m in grid.metrics)
        seen.add(ident)
        if cell.cell_id in committed:
            order.append(cell.cell_id)
            first.add(cell.cell_id)
            contributes[cell.cell_id] = None
    for cid in earlier:
        ident = _identity(committed[cid]["cell"])
        metrics = set(store.table([cid], "records", RECORD_COLUMNS)["metric"]) | set(
            store.table([cid], "reasons", REASON_COLUMNS)["metric"]
        )
        fresh = {m for m in metrics if ident + (m,) not in covered}
        if fresh:
            order.append(cid)
            contributes[cid] = fresh
            covered.update(ident + (m,) for m in fresh)
            if ident not in seen:
                first.add(cid)
                seen.add(ident)
        else:
            store.remove(cid)  # every value of it was recomputed: an earlier version, no longer shown
    return order, contributes, first


def _kept_table(store: CellStore, order: list[str], contributes: dict, first: set[str], name: str) -> pd.DataFrame:
    from xbench.runs.store import CELL_TABLES

    columns = CELL_TABLES[name]
    frames = []
    for cid in order:
        if "metric" not in columns and cid not in first:
            continue  # curves and concept rows: from the first cell of each identity only
        frame = store.table([cid], name, columns)
        if contributes[cid] is not None and "metric" in columns:
            frame = frame[frame["metric"].isin(contributes[cid])]
        if len(frame):
            frames.append(frame)
    if not frames:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return pd.concat(frames, ignore_index=True)[columns]


def portable_path(path: str | Path) -> str:
    """A task file's path as the manifest keeps it: relative to the xbench checkout for shipped tasks, else
    relative to the working folder, else the file name (a manifest does not reveal a user's folders)."""
    from xbench.errors import repo_root

    p = Path(path).resolve()
    for base in (repo_root(), Path.cwd().resolve()):
        if p.is_relative_to(base):
            return p.relative_to(base).as_posix()
    return p.name


# [run] settings that can move a verdict (concept example sets, the clusters' fitting set), for the methods text.
RECORDED_RUN_SETTINGS = ("concept_set_size", "random_sets", "fit_tiles")


def write_georeference(out: Path, task: Any) -> None:
    """``georef.csv`` in the run folder when the test tiles were read from georeferenced rasters: for each
    test tile (the ``tile`` of the records) its source raster, pixel row/col, transform and CRS, so a user
    can find it again."""
    from xbench.data import atomic_write
    from xbench.imagery.taskdata import write_georef_csv

    test = task_and_data(task)[1].test
    meta = test.meta.get("georef") if isinstance(test.meta, dict) else None
    georef = test.georef
    if georef is None or not meta:
        return
    atomic_write(out / "georef.csv", lambda tmp: write_georef_csv(georef, meta, Path(tmp), {"test": len(test)}))


def assemble(
    out: Path,
    task: Task,
    grid: Grid,
    store: CellStore,
    preps: dict[tuple[str, int], Prepared],
    model_rows: list[dict],
    run_id: str,
    summary: RunSummary | None = None,
) -> None:
    """Write the run folder's tables, artifacts and manifest from committed cells (atomic writes).

    The folder keeps what earlier runs put there (other explainers, metrics or tasks; see
    :func:`kept_cells`): a rerun adds to it and never shrinks it.
    """
    summary = summary if summary is not None else RunSummary(out_dir=out)
    order, contributes, first = kept_cells(grid, store)
    grid_ids = {c.cell_id for c in grid.cells}
    records = _kept_table(store, order, contributes, first, "records")
    if len(records):
        records = records.sort_values(RECORD_SORT, kind="stable").reset_index(drop=True)
        records["seed"] = records["seed"].astype("int64")
        records["tile"] = records["tile"].astype("int64")
        records["value"] = records["value"].astype("float64")
    summary.records = sum(int(contributes[c] is None) * len(store.table([c], "records", RECORD_COLUMNS)) for c in order)
    summary.kept_earlier = sum(1 for cid in order if cid not in grid_ids)
    write_table(out / "records.parquet", records)
    write_table(out / "records.csv", records)
    write_table(out / "curves.parquet", _kept_table(store, order, contributes, first, "curves"))
    concepts = _kept_table(store, order, contributes, first, "concepts")
    write_table(out / "concepts.parquet", concepts.astype({c: "object" for c in ("matched_type",)}))
    reasons = _kept_table(store, order, contributes, first, "reasons")
    if len(reasons):
        reasons = reasons.sort_values(["task", "model", "seed", "explainer", "metric", "truth"], kind="stable")
        reasons = reasons.reset_index(drop=True)
        reasons["seed"] = reasons["seed"].astype("int64")
    write_table(out / "reasons.parquet", reasons)
    for row in reasons[reasons["task"] == task.name].to_dict("records"):
        reason = str(row["reason"])
        skipped = reason.startswith("skipped: ")
        line = f"{row['metric']}/{row['truth']}: {reason.removeprefix('skipped: ')}"
        target = summary.skipped_metrics if skipped else summary.undefined
        if line not in target:
            target.append(line)

    write_georeference(out, task)

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
    reliance = pd.DataFrame(reliance_rows, columns=RELIANCE_COLUMNS)
    earlier_reliance = read_table(out, "reliance.parquet", [])
    if earlier_reliance is not None and len(earlier_reliance):  # other tasks' and models' rows stay
        mine = {(task.name, name, int(seed)) for name, seed in preps}
        keep = [
            (t, m, int(sd)) not in mine
            for t, m, sd in zip(
                earlier_reliance["task"], earlier_reliance["model"], earlier_reliance["seed"], strict=True
            )
        ]
        reliance = pd.concat([earlier_reliance[keep], reliance], ignore_index=True) if any(keep) else reliance
    write_table(out / "reliance.parquet", reliance)

    # per test tile: class, main planted structure type and its coverage, for the report's breakdowns (which
    # otherwise rebuild the test split from the task file)
    if preps:
        test = next(iter(preps.values())).data.test
        tiles = tiles_from_pack(task.name, test, [t for t in test.mask_names if t not in task.lookalike_types])
        earlier_tiles = read_table(out, "tiles.parquet", [])
        if earlier_tiles is not None and (earlier_tiles["task"] != task.name).any():  # other tasks' rows stay
            tiles = pd.concat([earlier_tiles[earlier_tiles["task"] != task.name], tiles], ignore_index=True)
        write_table(out / "tiles.parquet", tiles)

    cells_meta = []
    for cid in [c.cell_id for c in grid.cells] + [c for c in order if c not in grid_ids]:
        meta = store.meta(cid) or {}
        cell = meta.get("cell") or next(c.to_dict() for c in grid.cells if c.cell_id == cid)
        ok = cid in contributes
        status = meta.get("status", "missing") if cid in grid_ids else "ok"
        if cid in grid_ids and status == "ok" and not ok:
            status = "damaged"
        share = meta.get("zero_map_share")
        if cid in grid_ids and status == "ok" and share is not None and share >= ZERO_MAP_SHARE:
            summary.warnings.append(
                f"{cell['explainer']} on {cell['model']} seed {cell['seed']}: {share:.0%} of the maps are all zero "
                "(a saturated model, or settings too coarse for the tiles)"
            )
        cells_meta.append(
            {
                "cell_id": cid,
                "task": cell.get("task"),
                "model": cell.get("model"),
                "seed": cell.get("seed"),
                "explainer": cell.get("explainer"),
                "status": status,
                "this_run": cid in grid_ids,
                "seconds": meta.get("seconds"),
                "error": meta.get("error"),
                "notes": meta.get("notes", {}),
                "cost": meta.get("cost"),
                "zero_map_share": share,
            }
        )
    for (name, seed), prep in preps.items():
        g = gallery_positions(prep.targets, int(task.run["gallery_tiles"]))  # every class among the first
        arrays: dict[str, np.ndarray] = {
            "images": prep.images[g],
            "band_names": np.array(prep.data.test.band_names),
            "planted": prep.planted[g],
            "tiles": prep.explain_index[g].astype(np.int64),
            "class_names": np.array(task.class_names),
            "targets": prep.targets[g],
        }
        if prep.planted_coverage is not None:
            arrays["coverage"] = prep.planted_coverage[g].astype(np.float32)  # core and fringe in the figures
        if prep.reliance is not None:
            arrays["evidence"] = prep.reliance.evidence[g].astype(np.float32)
        for cid in order:
            cell = (store.meta(cid) or {}).get("cell") or {}
            if cid not in first or (cell.get("task"), cell.get("model"), cell.get("seed")) != (task.name, name, seed):
                continue
            maps = store.arrays(cid, "gallery")
            if maps is not None:
                arrays[f"map__{cell['explainer']}"] = maps["map"]
            clusters = store.arrays(cid, "clusters")
            if clusters is not None:
                write_npz(
                    out / "artifacts" / f"clusters__{task.name}__{name}__{seed}.npz",
                    clusters | {"images": prep.images[g], "class_names": np.array(task.class_names)},
                )
        write_npz(out / "artifacts" / f"gallery__{task.name}__{name}__{seed}.npz", arrays)

    data = task.data
    git = _git_state()
    counts = {k: int(v) for k, v in data.counts.items()}
    manifest = {
        "run_id": run_id,
        "task": task.name,
        "task_file": portable_path(task.path),
        "task_hash": task.file_hash,
        "description": task.description,
        "variant": getattr(task, "variant", None),
        "xbench_version": __version__,
        "versions": _versions(),
        "git_commit": git["commit"],
        "git_modified": git["modified"],
        "machine": {
            "platform": platform.platform(),
            "processor": platform.machine(),
            "python": platform.python_version(),
        },
        "seeds": sorted({c.seed for c in grid.cells}),
        "data": {
            "seed": int(data.seed),
            "hash": data.hash,
            "recipe_sha256": data.raw.get("recipe_sha256"),
            "pack_sha256": data.raw.get("pack_sha256"),
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
        "run_settings": {k: task.run[k] for k in RECORDED_RUN_SETTINGS if k in task.run},
        "skipped": grid.skipped,
        "skipped_metrics": list(summary.skipped_metrics),
        "undefined_values": list(summary.undefined),
        "warnings": list(summary.warnings),
        "repaired": list(summary.repaired),
        "cells": cells_meta,
    }
    earlier = read_manifest(out, [])
    others = dict(earlier.get("earlier_tasks") or {})
    if earlier.get("task") and earlier.get("task") != task.name:
        others[earlier["task"]] = {k: v for k, v in earlier.items() if k != "earlier_tasks"}
    others.pop(task.name, None)
    kept_tasks = {str(m.get("task")) for m in cells_meta}
    if others := {k: v for k, v in others.items() if k in kept_tasks}:
        manifest["earlier_tasks"] = others  # other tasks whose records this folder keeps
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


def describe_cue(data: DataSpec) -> str | None:
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
