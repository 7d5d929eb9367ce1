"""The result store: per-cell files while a run is going, then the tidy tables of a finished run.

While a run goes, every finished cell is committed as files under ``DIR/cells/``: its records, its extra
tables and gallery maps, and last a small JSON marker. Every file is written to a temporary name and
renamed, so a killed run leaves either a whole cell or none. Assembling the run folder reads only
committed cells, so a resumed run gives the same rows, with no duplicate and no lost row.
"""

from __future__ import annotations

import json
import os
import tempfile
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

RECORD_COLUMNS = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
CURVE_COLUMNS = ["task", "model", "seed", "explainer", "curve", "baseline", "step", "x", "label", "mean", "sd", "n"]
RELIANCE_COLUMNS = ["task", "model", "seed", "kind", "mean_drop", "ci_low", "ci_high", "n"]
CONCEPT_COLUMNS = [
    "task",
    "model",
    "seed",
    "explainer",
    "concept",
    "class_name",
    "score",
    "spread",
    "p_value",
    "matched_type",
    "iou",
    "purity",
]
RECORD_SORT = ["model", "seed", "explainer", "metric", "truth", "tile"]


def _atomic(path: Path, write: Any) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix="." + path.name, suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)  # mkstemp makes owner-only files; results are meant to be shared
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_json(path: Path, data: Any) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, sort_keys=True, default=_json_default)
            fh.write("\n")

    _atomic(Path(path), write)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def write_table(path: Path, frame: pd.DataFrame) -> None:
    """Parquet (or CSV by suffix), atomically."""
    path = Path(path)
    if path.suffix == ".csv":
        _atomic(path, lambda tmp: frame.to_csv(tmp, index=False, float_format="%.10g"))
    else:
        _atomic(path, lambda tmp: frame.to_parquet(tmp, index=False))


def write_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **arrays)

    _atomic(Path(path), write)


class CellStore:
    """Committed cells of one run folder."""

    def __init__(self, out_dir: str | Path):
        self.out_dir = Path(out_dir)
        self.cell_dir = self.out_dir / "cells"

    def _marker(self, cell_id: str) -> Path:
        return self.cell_dir / f"{cell_id}.json"

    def is_done(self, cell_id: str) -> bool:
        marker = self._marker(cell_id)
        if not marker.is_file():
            return False
        try:
            return json.loads(marker.read_text()).get("status") == "ok"
        except (OSError, json.JSONDecodeError):
            return False

    def commit(self, cell_id: str, result: dict[str, Any]) -> None:
        """Write a finished (or failed) cell; the marker goes last."""
        status = result["status"]
        if status == "ok":
            for name in ("records", "curves", "concepts"):
                write_table(self.cell_dir / f"{cell_id}.{name}.parquet", result[name])
            if result.get("gallery"):
                write_npz(self.cell_dir / f"{cell_id}.gallery.npz", result["gallery"])
            if result.get("clusters"):
                write_npz(self.cell_dir / f"{cell_id}.clusters.npz", result["clusters"])
        write_json(self._marker(cell_id), result["meta"] | {"status": status})

    def meta(self, cell_id: str) -> dict[str, Any] | None:
        marker = self._marker(cell_id)
        return json.loads(marker.read_text()) if marker.is_file() else None

    def table(self, cell_ids: Iterable[str], name: str, columns: list[str]) -> pd.DataFrame:
        frames = []
        for cid in cell_ids:
            path = self.cell_dir / f"{cid}.{name}.parquet"
            if self.is_done(cid) and path.is_file():
                frames.append(pd.read_parquet(path))
        frames = [f for f in frames if len(f)]
        if not frames:
            return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
        return pd.concat(frames, ignore_index=True)[columns]

    def arrays(self, cell_id: str, name: str) -> dict[str, np.ndarray] | None:
        path = self.cell_dir / f"{cell_id}.{name}.npz"
        if not (self.is_done(cell_id) and path.is_file()):
            return None
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}


def load_records(run_dir: str | Path) -> pd.DataFrame:
    """Read a finished run's records (parquet)."""
    return pd.read_parquet(Path(run_dir) / "records.parquet")
