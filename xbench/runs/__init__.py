"""Benchmark runs: grid expansion, cell cache, executors (local, dask.distributed), result store."""

from xbench.runs.grid import Cell, Grid, expand_grid
from xbench.runs.runner import RunSummary, run_task
from xbench.runs.store import RECORD_COLUMNS, load_records

__all__ = ["Cell", "Grid", "RECORD_COLUMNS", "RunSummary", "expand_grid", "load_records", "run_task"]
