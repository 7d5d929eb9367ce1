"""Executors: where cells run. Local (in process, or a pool of processes) or a dask.distributed cluster.

Whatever the executor, the client (this process) receives each finished cell and commits it to the store;
workers never write the store.
"""

from __future__ import annotations

import multiprocessing
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from xbench.errors import XbenchInputError
from xbench.runs.execute import CELL_THREADS, compute_cell, failed_result
from xbench.runs.grid import Cell

CellJob = tuple[str, Cell, list[str], dict[str, dict], str]  # task path, cell, metric keys, settings, run id


def _init_worker() -> None:
    import torch

    torch.set_num_threads(CELL_THREADS)


def run_local(jobs: list[CellJob], n_jobs: int = 1) -> Iterator[tuple[Cell, dict[str, Any]]]:
    """Run cells here (n_jobs == 1) or in a pool of fresh processes (spawned: safe with torch)."""
    if n_jobs <= 1:
        for job in jobs:
            yield job[1], compute_cell(*job)
        return
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=n_jobs, mp_context=ctx, initializer=_init_worker) as pool:
        futures = {pool.submit(compute_cell, *job): job[1] for job in jobs}
        for future in as_completed(futures):
            try:
                result = future.result()
            except BrokenProcessPool as exc:  # a worker died (segfault, os._exit): its cells fail, the run goes on
                result = failed_result(futures[future], f"worker process died ({exc})", time.perf_counter())
            yield futures[future], result


def run_dask(jobs: list[CellJob], scheduler: str | None = None, n_workers: int = 2) -> Iterator[tuple[Cell, dict]]:
    """Run cells on a dask.distributed cluster (an address, or a local cluster when none is given)."""
    try:
        from dask.distributed import Client, LocalCluster
        from dask.distributed import as_completed as dask_completed
    except ImportError:
        raise XbenchInputError(
            "--executor dask", "dask.distributed is not installed", expected="pip install 'xbench[cluster]'"
        ) from None
    cluster = None
    if scheduler:
        client = Client(scheduler)
    else:
        cluster = LocalCluster(
            n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None
        )
        client = Client(cluster)
    try:
        client.run(_init_worker)
        futures = [client.submit(compute_cell, *job, key=f"xbench-cell-{job[1].cell_id}", pure=False) for job in jobs]
        by_key = {f.key: job[1] for f, job in zip(futures, jobs, strict=True)}
        for future in dask_completed(futures):
            yield by_key[future.key], future.result()
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def executor_for(name: str, n_jobs: int, scheduler: str | None) -> Callable[[list[CellJob]], Iterator]:
    if name == "local":
        return lambda jobs: run_local(jobs, n_jobs)
    if name == "dask":
        return lambda jobs: run_dask(jobs, scheduler, max(n_jobs, 1))
    raise XbenchInputError("--executor", "unknown executor", expected="local or dask", found=name)
