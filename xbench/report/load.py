"""Reading run folders for the report (the result-store contract in DEVELOPERS.md).

``records`` are required (parquet, or the CSV copy when the parquet is missing or unreadable). Everything
else is optional: a missing or malformed optional file is logged and that part of the report is left out.
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xbench.errors import XbenchInputError
from xbench.runs.store import (  # the one reader of run folders and their schema
    read_manifest,
    read_records,
    read_table,
    task_manifests,
)

RECORD_KEY = ["task", "model", "seed", "explainer", "metric", "truth", "tile"]

_ARTIFACT = re.compile(r"^(gallery|clusters)__(.+)__(.+)__(-?\d+)\.npz$")


@dataclass
class Artifact:
    """One ``artifacts/{kind}__{task}__{model}__{seed}.npz`` file (read on demand)."""

    kind: str
    task: str
    model: str
    seed: int
    path: Path

    def load(self) -> dict[str, np.ndarray]:
        with np.load(self.path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}

    def keys(self) -> list[str]:
        """The arrays' names, read from the archive's index without reading the arrays."""
        with np.load(self.path, allow_pickle=False) as data:
            return list(data.files)


@dataclass
class RunSet:
    """One or more run folders read together."""

    dirs: list[Path]
    records: pd.DataFrame
    manifests: list[dict[str, Any]]
    curves: pd.DataFrame | None = None
    reliance: pd.DataFrame | None = None
    concepts: pd.DataFrame | None = None
    artifacts: list[Artifact] = field(default_factory=list)
    log: list[str] = field(default_factory=list)
    reasons: pd.DataFrame | None = None  # task, model, seed, explainer, metric, truth, reason (skips, NaN causes)

    def manifest_for(self, task: str) -> dict[str, Any]:
        """The (first) manifest of a task, or an empty dict."""
        for m in self.manifests:
            for one in task_manifests(m):  # a folder may keep several tasks' records
                if one.get("task") == task:
                    return one
        return {}

    def galleries(self) -> list[Artifact]:
        return [a for a in self.artifacts if a.kind == "gallery"]

    def clusters(self) -> list[Artifact]:
        return [a for a in self.artifacts if a.kind == "clusters"]


def find_artifacts(run_dir: Path, log: list[str]) -> list[Artifact]:
    folder = run_dir / "artifacts"
    if not folder.is_dir():
        log.append(f"{folder}: not found; no heatmap gallery or activation-cluster figures")
        return []
    out = []
    for path in sorted(folder.glob("*.npz")):
        m = _ARTIFACT.match(path.name)
        if m:
            out.append(Artifact(m.group(1), m.group(2), m.group(3), int(m.group(4)), path))
    return out


REASON_COLUMNS = ["task", "model", "seed", "explainer", "metric", "truth", "reason"]


def read_reasons(run_dir: Path, manifest: dict[str, Any], log: list[str]) -> pd.DataFrame | None:
    """Why values are missing or NaN: ``reasons.parquet`` when the run wrote one, else the manifest's notes.

    The manifest fallback takes each cell's ``notes`` (``metric/truth -> reason``), each failed cell's error
    and the run's ``skipped`` list. One row per (task, model, seed, explainer, metric, truth, reason).
    """
    path = run_dir / "reasons.parquet"
    if path.is_file():
        try:
            frame = pd.read_parquet(path)
        except Exception as exc:  # noqa: BLE001 - an unreadable optional table is logged, not fatal
            log.append(f"{path}: not read ({type(exc).__name__}: {exc}); reasons taken from the manifest")
        else:
            if "reason" in frame.columns:
                for c in REASON_COLUMNS:
                    if c not in frame.columns:
                        frame[c] = "" if c != "seed" else -1
                return frame[REASON_COLUMNS].drop_duplicates().reset_index(drop=True)
            log.append(f"{path}: no 'reason' column; reasons taken from the manifest")
    task = str(manifest.get("task", ""))
    rows = []
    for c in manifest.get("cells") or []:
        base = {
            "task": task,
            "model": c.get("model", ""),
            "seed": c.get("seed", -1),
            "explainer": c.get("explainer", ""),
        }
        for key, reason in (c.get("notes") or {}).items():
            metric, _, truth = str(key).partition("/")
            rows.append({**base, "metric": metric, "truth": truth or "none", "reason": str(reason)})
        if c.get("status") not in ("ok", None) and c.get("error"):
            rows.append({**base, "metric": "", "truth": "", "reason": f"cell {c.get('status')}: {c.get('error')}"})
    for item in manifest.get("skipped") or []:
        if isinstance(item, dict):
            rows.append(
                {
                    "task": task,
                    "model": item.get("model", ""),
                    "seed": item.get("seed", -1),
                    "explainer": item.get("explainer", ""),
                    "metric": item.get("metric", ""),
                    "truth": item.get("truth", ""),
                    "reason": str(item.get("reason", item)),
                }
            )
        else:
            rows.append(
                {"task": task, "model": "", "seed": -1, "explainer": "", "metric": "", "truth": "", "reason": str(item)}
            )
    if not rows:
        return None
    return pd.DataFrame(rows, columns=REASON_COLUMNS).drop_duplicates().reset_index(drop=True)


def _concat(frames: list[pd.DataFrame | None]) -> pd.DataFrame | None:
    frames = [f for f in frames if f is not None and len(f)]
    return pd.concat(frames, ignore_index=True) if frames else None


def load_runs(run_dirs: str | Path | Iterable[str | Path]) -> RunSet:
    """Read one or more run folders. Later folders win where two hold the same value (logged)."""
    if isinstance(run_dirs, (str, Path)):
        run_dirs = [run_dirs]
    dirs = [Path(d) for d in run_dirs]
    if not dirs:
        raise XbenchInputError("run folders", "none given", expected="at least one run folder")
    log: list[str] = []
    records, manifests, curves, reliance, concepts, artifacts, reasons = [], [], [], [], [], [], []
    for d in dirs:
        if not d.is_dir():
            raise XbenchInputError(str(d), "run folder not found")
        records.append(read_records(d, log))
        manifests.append(read_manifest(d, log))
        curves.append(read_table(d, "curves.parquet", log))
        reliance.append(read_table(d, "reliance.parquet", log))
        concepts.append(read_table(d, "concepts.parquet", log))
        artifacts.extend(find_artifacts(d, log))
        reasons.append(read_reasons(d, manifests[-1], log))
    rec = pd.concat(records, ignore_index=True)
    dup = rec.duplicated(RECORD_KEY, keep="last")
    if dup.any():
        log.append(f"{int(dup.sum())} record(s) given by more than one run folder; the last folder's kept")
        rec = rec[~dup].reset_index(drop=True)
    if rec.empty:
        raise XbenchInputError(", ".join(map(str, dirs)), "the run folders hold no records")
    # The same artifact in several folders: keep the last.
    seen: dict[tuple, Artifact] = {}
    for a in artifacts:
        seen[(a.kind, a.task, a.model, a.seed)] = a
    return RunSet(
        dirs=dirs,
        records=rec,
        manifests=manifests,
        curves=_concat(curves),
        reliance=_concat(reliance),
        concepts=_concat(concepts),
        artifacts=list(seen.values()),
        log=log,
        reasons=_concat(reasons),
    )
