"""Reading run folders for the report (the result-store contract in DEVELOPERS.md).

``records`` are required (parquet, or the CSV copy when the parquet is missing or unreadable). Everything
else is optional: a missing or malformed optional file is logged and that part of the report is left out.
"""

from __future__ import annotations

import re
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


@dataclass
class RunSet:
    """One or more run folders read together."""

    dirs: list[Path]
    records: pd.DataFrame
    manifests: list[dict[str, Any]]
    curves: pd.DataFrame | None = None
    reliance: pd.DataFrame | None = None
    concepts: pd.DataFrame | None = None
    reasons: pd.DataFrame | None = None  # why values are missing or NaN (reasons.parquet), keyed like the records
    artifacts: list[Artifact] = field(default_factory=list)
    log: list[str] = field(default_factory=list)

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


def _concat(frames: list[pd.DataFrame | None]) -> pd.DataFrame | None:
    frames = [f for f in frames if f is not None and len(f)]
    return pd.concat(frames, ignore_index=True) if frames else None


def load_runs(run_dirs: Any) -> RunSet:
    """Read one or more run folders. Later folders win where two hold the same value (logged)."""
    if isinstance(run_dirs, (str, Path)):
        run_dirs = [run_dirs]
    dirs = [Path(d) for d in run_dirs]
    if not dirs:
        raise XbenchInputError("run folders", "none given", expected="at least one run folder")
    log: list[str] = []
    records, manifests, curves, reliance, concepts, reasons, artifacts = [], [], [], [], [], [], []
    for d in dirs:
        if not d.is_dir():
            raise XbenchInputError(str(d), "run folder not found")
        records.append(read_records(d, log))
        manifests.append(read_manifest(d, log))
        curves.append(read_table(d, "curves.parquet", log))
        reliance.append(read_table(d, "reliance.parquet", log))
        concepts.append(read_table(d, "concepts.parquet", log))
        reasons.append(read_table(d, "reasons.parquet", log))
        artifacts.extend(find_artifacts(d, log))
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
        reasons=_concat(reasons),
        artifacts=list(seen.values()),
        log=log,
    )
