"""Run records for the gates: read a run folder's records and check their columns."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from xbench.check.gates import GROUP_KEYS, RECORD_COLUMNS
from xbench.errors import XbenchInputError


def load_records(run_dir: str | Path, role: str = "run") -> pd.DataFrame:
    """Read a run folder's ``records.parquet`` (or ``records.csv``); errors name the folder and file."""
    run_dir = Path(run_dir)
    if not run_dir.exists():
        raise XbenchInputError(str(run_dir), f"{role} run folder not found")
    if not run_dir.is_dir():
        raise XbenchInputError(str(run_dir), f"{role} run folder is not a folder")
    parquet, csv = run_dir / "records.parquet", run_dir / "records.csv"
    if parquet.is_file():
        try:
            frame = pd.read_parquet(parquet)
        except Exception as exc:  # noqa: BLE001 - any reader failure is bad input here
            problem = f"cannot read records ({type(exc).__name__}: {exc})"
            raise XbenchInputError(str(parquet), problem) from None
        source = parquet
    elif csv.is_file():
        try:
            frame = pd.read_csv(csv, keep_default_na=True, dtype={"truth": str, "run_id": str})
        except Exception as exc:  # noqa: BLE001
            raise XbenchInputError(str(csv), f"cannot read records ({type(exc).__name__}: {exc})") from None
        source = csv
    else:
        raise XbenchInputError(str(run_dir), f"no records.parquet (or records.csv) in the {role} run folder")
    return validate_records(frame, str(source))


def validate_records(frame: pd.DataFrame, where: str = "records") -> pd.DataFrame:
    """Check the record columns and normalise their types (a copy)."""
    missing = [c for c in RECORD_COLUMNS if c not in frame.columns and c != "run_id"]
    if missing:
        raise XbenchInputError(
            where, "missing record columns", expected=", ".join(RECORD_COLUMNS), found=sorted(frame.columns)
        )
    out = frame.loc[:, [c for c in RECORD_COLUMNS if c in frame.columns]].copy()
    for c in GROUP_KEYS:
        out[c] = out[c].fillna("none").astype(str)
    try:
        out["seed"] = pd.to_numeric(out["seed"]).astype("int64")
        out["tile"] = pd.to_numeric(out["tile"]).astype("int64")
        out["value"] = pd.to_numeric(out["value"]).astype("float64")
    except (ValueError, TypeError) as exc:
        raise XbenchInputError(where, f"seed, tile and value must be numeric ({exc})") from None
    return out


def _as_records(run: str | Path | pd.DataFrame | None, role: str) -> pd.DataFrame | None:
    if run is None:
        return None
    if isinstance(run, pd.DataFrame):
        return validate_records(run, f"{role} records")
    return load_records(run, role)
