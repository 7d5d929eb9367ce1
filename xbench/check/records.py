"""Run records for the gates: read a run folder's records and check their columns."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from xbench.errors import XbenchInputError
from xbench.runs.store import read_records, type_records


def load_records(run_dir: str | Path, role: str = "run") -> pd.DataFrame:
    """A run folder's records through the one run-folder reader (:func:`xbench.runs.store.read_records`);
    errors name the folder or file and whether it is the current or the baseline run."""
    try:
        return read_records(run_dir)
    except XbenchInputError as exc:
        problem = f"{role} {exc.problem}" if exc.problem.startswith("run folder") else f"{role} run: {exc.problem}"
        raise XbenchInputError(exc.where, problem, expected=exc.expected, found=exc.found) from None


def validate_records(frame: pd.DataFrame, where: str = "records") -> pd.DataFrame:
    """Check the record columns and normalise their types (a copy; the store's schema)."""
    return type_records(frame, where)


def _as_records(run: str | Path | pd.DataFrame | None, role: str) -> pd.DataFrame | None:
    if run is None:
        return None
    if isinstance(run, pd.DataFrame):
        return validate_records(run, f"{role} records")
    return load_records(run, role)
