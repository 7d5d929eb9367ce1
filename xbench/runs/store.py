"""The result store: per-cell files while a run is going, then the tidy tables of a finished run.

While a run goes, every finished cell is committed as files under ``DIR/cells/``: its records, its extra
tables and gallery maps, and last a small JSON marker. Every file is written to a temporary name and
renamed (flushed to disk first), so a killed run leaves either a whole cell or none. The marker lists every
file's size and checksum; a cell is reused only when they check out. Assembling the run folder reads only
committed cells, so a resumed run gives the same rows, with no duplicate and no lost row.

This module is also the one reader of run folders (:func:`read_records`, :func:`read_table`,
:func:`read_manifest`) and holds their schema (the ``*_COLUMNS`` lists and ``RUN_TABLES``).
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xbench.data import REFLECTANCE_ARRAYS, TILE_COLUMNS, atomic_write, file_sha256, write_npz_archive
from xbench.errors import XbenchInputError

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
RECORD_SORT = ["task", "model", "seed", "explainer", "metric", "truth", "tile"]


REASON_COLUMNS = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "reason"]
CELL_TABLES = {
    "records": RECORD_COLUMNS,
    "curves": CURVE_COLUMNS,
    "concepts": CONCEPT_COLUMNS,
    "reasons": REASON_COLUMNS,
}
# Files of a finished run folder (besides `cells/` and `artifacts/`).
RUN_TABLES = {
    "records.parquet": RECORD_COLUMNS,
    "curves.parquet": CURVE_COLUMNS,
    "reliance.parquet": RELIANCE_COLUMNS,
    "concepts.parquet": CONCEPT_COLUMNS,
    "reasons.parquet": REASON_COLUMNS,
    "tiles.parquet": TILE_COLUMNS,  # per test tile: class, main planted type, its coverage (report breakdowns)
}
# What identifies a cell's place in a run folder, whatever its content key: a cell of the same identity with
# another key is an earlier version of it (before a change of settings, weights, pack or recipe).
CELL_IDENTITY = ("task", "model", "seed", "explainer")


def write_json(path: Path, data: Any) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, sort_keys=True, default=_json_default)
            fh.write("\n")

    atomic_write(Path(path), write)


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
        atomic_write(path, lambda tmp: frame.to_csv(tmp, index=False, float_format="%.10g"))
    else:
        atomic_write(path, lambda tmp: frame.to_parquet(tmp, index=False))


def write_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            write_npz_archive(fh, arrays, stored=REFLECTANCE_ARRAYS)

    atomic_write(Path(path), write)


def _file_entry(path: Path, rows: int | None = None) -> dict[str, Any]:
    entry: dict[str, Any] = {"bytes": path.stat().st_size, "sha256": file_sha256(path)}
    if rows is not None:
        entry["rows"] = int(rows)
    return entry


class CellStore:
    """Committed cells of one run folder.

    A cell is committed as its files and last a JSON marker that lists every file with its size, sha256
    and (for tables) row count. A cell counts as done only when its marker says ``ok`` and every listed
    file checks out; a damaged cell (truncated, emptied or deleted file, unreadable marker) is reported
    in :attr:`problems` and computed again.
    """

    def __init__(self, out_dir: str | Path):
        self.out_dir = Path(out_dir)
        self.cell_dir = self.out_dir / "cells"
        self._checked: dict[str, bool] = {}
        self.problems: dict[str, str] = {}  # cell id -> what was wrong with its files

    def _marker(self, cell_id: str) -> Path:
        return self.cell_dir / f"{cell_id}.json"

    def verify(self, cell_id: str) -> str | None:
        """None when the cell is committed ``ok`` and its files match the marker, else what is wrong
        (``"not committed"`` when there is no marker)."""
        marker = self._marker(cell_id)
        if not marker.is_file():
            return "not committed"
        try:
            meta = json.loads(marker.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            return f"unreadable marker {marker.name} ({type(exc).__name__})"
        if not isinstance(meta, dict) or meta.get("status") != "ok":
            return "not committed" if isinstance(meta, dict) and meta.get("status") == "failed" else "bad marker"
        files = meta.get("files")
        if not isinstance(files, dict):
            return "marker lists no file checksums (written by an older xbench)"
        for name, entry in sorted(files.items()):
            path = self.cell_dir / name
            if not path.is_file():
                return f"{name} is missing"
            size = path.stat().st_size
            if size != entry.get("bytes"):
                return f"{name} has {size} bytes, the marker says {entry.get('bytes')}"
            if file_sha256(path) != entry.get("sha256"):
                return f"{name} does not match its checksum"
        return None

    def is_done(self, cell_id: str) -> bool:
        """Committed ``ok`` and every file checks out (checked once per store object)."""
        if cell_id not in self._checked:
            problem = self.verify(cell_id)
            self._checked[cell_id] = problem is None
            if problem is not None and problem != "not committed":
                self.problems[cell_id] = problem
        return self._checked[cell_id]

    def commit(self, cell_id: str, result: dict[str, Any]) -> None:
        """Write a finished (or failed) cell; the marker, with every file's size and checksum, goes last."""
        status = result["status"]
        files: dict[str, dict[str, Any]] = {}
        if status == "ok":
            for name in CELL_TABLES:
                frame = result.get(name)
                if frame is None:
                    continue
                path = self.cell_dir / f"{cell_id}.{name}.parquet"
                write_table(path, frame)
                files[path.name] = _file_entry(path, len(frame))
            for name in ("gallery", "clusters"):
                if result.get(name):
                    path = self.cell_dir / f"{cell_id}.{name}.npz"
                    write_npz(path, result[name])
                    files[path.name] = _file_entry(path)
        marker = result["meta"] | {"status": status, "files": files, "committed_at": time.time()}
        write_json(self._marker(cell_id), marker)
        self._checked.pop(cell_id, None)
        self.problems.pop(cell_id, None)

    def meta(self, cell_id: str) -> dict[str, Any] | None:
        marker = self._marker(cell_id)
        try:
            return json.loads(marker.read_text(encoding="utf-8")) if marker.is_file() else None
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            return None

    def committed(self) -> dict[str, dict[str, Any]]:
        """Every cell of the folder whose marker says ``ok`` and whose files check out: id -> marker."""
        out: dict[str, dict[str, Any]] = {}
        if not self.cell_dir.is_dir():
            return out
        for marker in sorted(self.cell_dir.glob("*.json")):
            cell_id = marker.stem
            if "." in cell_id or not self.is_done(cell_id):
                continue
            meta = self.meta(cell_id)
            if meta is not None and isinstance(meta.get("cell"), dict):
                out[cell_id] = meta
        return out

    def remove(self, cell_id: str) -> None:
        """Delete a cell's files (marker first, so a kill in between leaves no half-listed cell)."""
        marker = self._marker(cell_id)
        if marker.is_file():
            marker.unlink()
        for path in self.cell_dir.glob(f"{cell_id}.*"):
            path.unlink(missing_ok=True)
        self._checked.pop(cell_id, None)

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


# --------------------------------------------------------------------------------------- reading a run folder
def type_records(frame: pd.DataFrame, where: str) -> pd.DataFrame:
    """The record columns in schema order, typed (seed, tile int64; value float64; truth never empty). A
    frame built by hand may leave out ``run_id`` (it becomes empty)."""
    if "run_id" not in frame.columns:
        frame = frame.assign(run_id="")
    missing = [c for c in RECORD_COLUMNS if c not in frame.columns]
    if missing:
        raise XbenchInputError(
            where, "records lack columns", expected=", ".join(RECORD_COLUMNS), found=", ".join(map(str, frame.columns))
        )
    frame = frame[RECORD_COLUMNS].copy()
    for col in ("run_id", "task", "model", "explainer", "metric"):
        frame[col] = frame[col].astype(str)
    frame["truth"] = frame["truth"].fillna("none").astype(str)
    try:
        frame["seed"] = pd.to_numeric(frame["seed"]).astype("int64")
        frame["tile"] = pd.to_numeric(frame["tile"]).astype("int64")
        frame["value"] = pd.to_numeric(frame["value"], errors="raise").astype("float64")
    except (ValueError, TypeError) as exc:
        raise XbenchInputError(where, f"records: seed, tile and value must be numeric ({exc})") from None
    return frame


def read_records(run_dir: str | Path, log: list[str] | None = None) -> pd.DataFrame:
    """The records of one run folder, typed: ``records.parquet``, or the CSV copy when the parquet is
    missing or unreadable (said in ``log``). Raises XbenchInputError naming the folder or file."""
    run_dir = Path(run_dir)
    log = [] if log is None else log
    if not run_dir.is_dir():
        raise XbenchInputError(str(run_dir), "run folder not found")
    parquet, csv = run_dir / "records.parquet", run_dir / "records.csv"
    frame, source = None, parquet
    if parquet.is_file():
        try:
            frame = pd.read_parquet(parquet)
        except Exception as exc:  # unreadable parquet: try the CSV copy
            log.append(f"{parquet}: unreadable ({type(exc).__name__}: {exc}); trying records.csv")
    if frame is None and csv.is_file():
        source = csv
        try:
            frame = pd.read_csv(csv, dtype={"truth": str, "run_id": str})
        except Exception as exc:
            raise XbenchInputError(str(csv), f"unreadable CSV ({type(exc).__name__}: {exc})") from None
    if frame is None:
        raise XbenchInputError(str(run_dir), "no records.parquet or records.csv: not a run folder")
    return type_records(frame, str(source))


def read_table(run_dir: str | Path, name: str, log: list[str] | None = None) -> pd.DataFrame | None:
    """An optional table of a run folder (``RUN_TABLES``) with its schema's columns, or None (said in ``log``)."""
    path = Path(run_dir) / name
    columns = RUN_TABLES[name]
    log = [] if log is None else log
    if not path.is_file():
        log.append(f"{path}: not found; the parts of the report that need it are left out")
        return None
    try:
        frame = pd.read_csv(path) if path.suffix == ".csv" else pd.read_parquet(path)
    except Exception as exc:
        log.append(f"{path}: unreadable ({type(exc).__name__}: {exc}); left out")
        return None
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        log.append(f"{path}: missing columns {', '.join(missing)}; left out")
        return None
    return frame[columns].copy()


def read_manifest(run_dir: str | Path, log: list[str] | None = None) -> dict[str, Any]:
    """``manifest.json`` of a run folder ({} when missing, said in ``log``); invalid JSON is an input error."""
    path = Path(run_dir) / "manifest.json"
    log = [] if log is None else log
    if not path.is_file():
        log.append(f"{path}: not found; the methods text will lack data, model and timing details")
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise XbenchInputError(str(path), "not UTF-8 text") from None
    except json.JSONDecodeError as exc:
        raise XbenchInputError(str(path), f"invalid JSON at line {exc.lineno}: {exc.msg}") from None
    if not isinstance(data, dict):
        raise XbenchInputError(str(path), "manifest must be a JSON object", found=type(data).__name__)
    return data


def task_manifests(manifest: dict[str, Any]) -> list[dict[str, Any]]:
    """The manifests a run folder holds: its latest run's, then those of other tasks kept in the folder."""
    if not manifest:
        return []
    kept = manifest.get("earlier_tasks") or {}
    latest = {k: v for k, v in manifest.items() if k != "earlier_tasks"}
    return [latest] + [m for m in kept.values() if isinstance(m, dict)]


def load_records(run_dir: str | Path) -> pd.DataFrame:
    """Read a finished run's records (parquet, or its CSV copy), typed."""
    return read_records(run_dir)
