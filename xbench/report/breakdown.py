"""Breakdowns users ask for: per class, per structure type, per structure coverage, and models side by side.

Per-tile attributes (class, the structure type that covers most of the tile, its coverage share) come from a
run folder's ``tiles.parquet`` (columns ``task, tile, class_name, main_type, coverage``, written by the run),
else (folders written before it was) from the task's test split rebuilt from its task file (deterministic;
used only when the file's hash equals the manifest's ``task_hash``, so the tiles are the ones the run
explained). Without either, the breakdowns by tile are left out with a note; the side-by-side tables need
only the summary table.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xbench.data import TILE_COLUMNS, tiles_from_pack
from xbench.report import tables as T
from xbench.report.recommend import ASPECTS, CONTROLS, _choose_column
from xbench.runs.store import read_table

COVERAGE_BINS = (0.0, 0.01, 0.05, 1.0)  # share of the tile covered by its main planted structure type
COVERAGE_LABELS = ("< 1 %", "1-5 %", ">= 5 %")


def tile_attributes(dirs: list[Path], manifests: list[dict[str, Any]], log: list[str]) -> pd.DataFrame | None:
    """Per-tile attributes of every run folder (see the module docstring); notes go to ``log``."""
    frames = []
    for d, m in zip(dirs, manifests, strict=True):
        if (Path(d) / "tiles.parquet").is_file():  # written by the run (older run folders lack it)
            frame = read_table(d, "tiles.parquet", log)
            if frame is not None:
                frames.append(frame[TILE_COLUMNS])
                continue
        frame = _rebuild(m, log)
        if frame is not None:
            frames.append(frame)
    return pd.concat(frames, ignore_index=True) if frames else None


def _rebuild(manifest: dict[str, Any], log: list[str]) -> pd.DataFrame | None:
    task_name = str(manifest.get("task", ""))
    want = manifest.get("task_hash")
    if not want or not (manifest.get("data") or {}).get("recipe"):
        log.append(f"breakdowns by class, structure type and coverage for {task_name or 'a run'}: no tiles.parquet")
        return None
    from xbench.tasks import build_task_data, load_task

    for candidate in (manifest.get("task_file"), task_name):
        if not candidate:
            continue
        try:
            task = load_task(candidate)
        except Exception:  # noqa: BLE001 - a moved or edited task file: try the next, then give up with a note
            continue
        if task.file_hash == want:
            data = build_task_data(task)
            human = [t for t in data.test.mask_names if t not in (manifest["data"].get("lookalike_types") or [])]
            return tiles_from_pack(task_name, data.test, human)
    log.append(
        f"breakdowns by class, structure type and coverage for {task_name}: no tiles.parquet and no task file "
        "with the run's task hash to rebuild the test tiles from"
    )
    return None


def _cells(values: list[float], hib: bool | None) -> list[T.TCell]:
    finite = [v for v in values if np.isfinite(v)]
    best = (max(finite) if hib else min(finite)) if finite and hib is not None else None
    return [T.TCell(main="" if not np.isfinite(v) else f"{v:.3f}", bold=best is not None and v == best) for v in values]


def breakdown_tables(table: pd.DataFrame, records: pd.DataFrame, tiles: pd.DataFrame | None) -> list[T.TableSpec]:
    """Per block and primary localization/faithfulness metric: explainer means by class, by main structure
    type and by coverage bin (tiles averaged over seeds first, as in the result tables); then per task, the
    models side by side on each aspect's primary metric."""
    out: list[T.TableSpec] = []
    blocks = list(dict.fromkeys(zip(table["task"], table["model"], strict=True)))
    if tiles is not None and len(tiles):
        t = tiles.copy()
        t["coverage bin"] = pd.cut(t["coverage"], COVERAGE_BINS, labels=COVERAGE_LABELS, include_lowest=True)
        for task, model in blocks:
            block = table[(table["task"] == task) & (table["model"] == model)]
            tt = t[t["task"] == task]
            if tt.empty:
                continue
            for aspect in ("localization", "faithfulness"):
                family, preferred = ASPECTS[aspect]
                col = _choose_column(block, family, preferred)
                if col is None:
                    continue
                metric, truth = col
                hib = block[(block["metric"] == metric) & (block["truth"] == truth)]["higher_is_better"].iloc[0]
                r = records[
                    (records["task"] == task)
                    & (records["model"] == model)
                    & (records["metric"] == metric)
                    & (records["truth"] == truth)
                    & (records["tile"] >= 0)
                ]
                per_tile = r.groupby(["explainer", "tile"], as_index=False)["value"].mean().merge(tt, on="tile")
                label = metric if truth == "none" else f"{metric} ({truth})"
                for by, what in (
                    ("class_name", "class"),
                    ("main_type", "structure type"),
                    ("coverage bin", "coverage"),
                ):
                    groups = [g for g in dict.fromkeys(per_tile[by].astype(str)) if g != "nan"]
                    if by == "coverage bin":
                        groups = [g for g in COVERAGE_LABELS if g in groups]
                    if len(groups) < 2:
                        continue
                    wide = per_tile.assign(**{by: per_tile[by].astype(str)}).pivot_table(
                        index="explainer", columns=by, values="value", aggfunc="mean", observed=True
                    )
                    counts = per_tile.drop_duplicates("tile")[by].astype(str).value_counts()
                    explainers = [e for e in dict.fromkeys(block["explainer"]) if e in wide.index]
                    rows = [
                        (e, _cells([float(wide.loc[e].get(g, np.nan)) for g in groups], None if e in CONTROLS else hib))
                        for e in explainers
                    ]
                    out.append(
                        T.TableSpec(
                            ident=T.slug("breakdown", task, model, metric, truth, by),
                            title=f"{task}, model {model}: {label} by {what}",
                            caption=(
                                f"Mean {label} per explainer over the tiles of each {what} (tiles averaged over "
                                "seeds first; coverage = share of the tile covered by its main planted type). "
                                "Tiles per column: " + ", ".join(f"{g} {int(counts.get(g, 0))}" for g in groups) + "."
                            ),
                            header=[(what, g) for g in groups],
                            rows=rows,
                        )
                    )
    for task in dict.fromkeys(table["task"]):
        models = list(dict.fromkeys(table[table["task"] == task]["model"]))
        if len(models) < 2:
            continue
        sub = table[table["task"] == task]
        header, columns = [], []
        for aspect, (family, preferred) in ASPECTS.items():
            col = _choose_column(sub, family, preferred)
            if col is None:
                continue
            label = col[0] if col[1] == "none" else f"{col[0]} ({col[1]})"
            for m in models:
                header.append((f"{aspect}: {label}", m))
                columns.append((col, m))
        if not columns:
            continue
        explainers = list(dict.fromkeys(sub["explainer"]))
        rows = []
        for e in explainers:
            cells = []
            for (metric, truth), m in columns:
                v = sub[
                    (sub["explainer"] == e) & (sub["model"] == m) & (sub["metric"] == metric) & (sub["truth"] == truth)
                ]
                cells.append(
                    T.TCell(main=f"{float(v['mean'].iloc[0]):.3f}" if len(v) and np.isfinite(v["mean"].iloc[0]) else "")
                )
            rows.append((e, cells))
        out.append(
            T.TableSpec(
                ident=T.slug("side-by-side", task),
                title=f"{task}: models side by side",
                caption="Mean of each question's primary metric per explainer, one column per model (same tiles).",
                header=header,
                rows=rows,
            )
        )
    return out
