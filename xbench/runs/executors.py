"""Executors: where cells run. Local (in process, or a pool of processes) or a dask.distributed cluster.

Whatever the executor, the client (this process) receives each finished cell and commits it to the store;
workers never write the store.

What makes parallel runs pay off (measured by ``tests/bench/bench_executors.py``):
- **Setup ships once per worker.** The client has already built the task's tile packs, loaded the models
  and computed the model-verified truth (``runs.execute.prepare``). That state goes to each worker once
  (a temporary file each worker on this machine reads once, its path broadcast by ``scatter`` on a local dask
  cluster; the bytes themselves to a remote dask scheduler's workers; keyed by content), so workers neither
  synthesize the tiles again nor recompute the truth, and no cell carries it. Sending the ~150 MB of the demo's
  state through a socket to each worker cost about 3 s; reading the file costs a fraction of that.
- **Workers boot while the client prepares.** Local workers and dask workers are started when the executor
  is made, before the client builds the data, so their imports (torch, captum, scikit-learn: seconds of
  CPU) overlap the client's preparation.
- **The client works too.** ``--jobs N`` and a local dask cluster of N workers run N - 1 worker processes
  and compute cells in the client itself, in its main thread (:func:`share_cells`): no process sits idle
  waiting, and one worker start-up fewer.
- **Longest cells first.** Cells are dispatched in decreasing expected cost (model calls per tile of the
  explainer, :data:`EXPECTED_COST`), so the costliest cell (``rise``) does not start last and leave the other
  workers idle at the end (longest-processing-time-first scheduling). Records do not depend on the order.
- **glibc's allocator left alone on dask workers.** dask's nanny sets ``MALLOC_TRIM_THRESHOLD_=65536`` in
  each worker by default, which makes every freed activation buffer go back to the kernel and be
  page-faulted in again (tens of millions of page faults and ~1.6x the wall time on these small models);
  the local cluster's workers run without it.
- **No nannies, no busy event loops on a local cluster.** Its worker processes are plain ``dask worker
  --no-nanny`` processes started before the scheduler (they import while it comes up): one process per
  worker, not two. Every dask server checks its event loop every 20 ms by default; the check runs every
  second here, since the scheduler shares the client's process with a computing cell.
"""

from __future__ import annotations

import hashlib
import logging
import multiprocessing
import os
import pickle
import socket
import subprocess
import sys
import tempfile
import threading
import time
import warnings
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import TYPE_CHECKING, Any

from xbench.errors import XbenchInputError
from xbench.runs import execute
from xbench.runs.execute import CELL_THREADS, compute_cell, failed_result
from xbench.runs.grid import Cell

if TYPE_CHECKING:
    from xbench.tasks import Task

CellJob = tuple["str | Task", Cell, list[str], dict[str, dict], str]  # task, cell, metric keys, settings, run id

# Expected model calls per explained tile of each built-in explainer at its demo settings (README cost
# table); only the order matters. Unknown (plugin) explainers are assumed to be mid-range.
EXPECTED_COST = {
    "rise": 300,
    "occlusion": 122,
    "kernel-shap": 120,
    "integrated-gradients": 64,
    "smoothgrad": 32,
    "tcav": 18,
    "activation-clusters": 13,
    "deeplift": 4,
    "gradient": 2,
    "input-x-gradient": 2,
    "guided-backprop": 2,
    "grad-cam": 2,
    "grad-cam-pp": 2,
    "random": 0,
    "edges": 0,
    "oracle": 0,
}
UNKNOWN_COST = 30


def longest_first(jobs: list[CellJob]) -> list[CellJob]:
    """The jobs in decreasing expected cost (stable: equal costs keep the grid's order)."""
    return sorted(jobs, key=lambda job: -EXPECTED_COST.get(job[1].explainer, UNKNOWN_COST))


# -- the shared state that ships once per worker ----------------------------------------------------------
def shared_state(jobs: list[CellJob]) -> dict[str, Any]:
    """What this process has already prepared for the jobs' tasks, models and seeds (task data, models,
    truth, concept sets), to install in a worker before it runs cells."""
    # a job's task is the parsed task (or, from older callers, a task file's path)
    paths = {str(Path(job[0] if isinstance(job[0], str) else job[0].path).resolve()) for job in jobs}
    task_keys = {key for key, (task, _) in execute._TASK_CACHE.items() if str(Path(task.path).resolve()) in paths}
    return {
        "tasks": {k: execute._TASK_CACHE[k] for k in task_keys},
        # a prepared model's key starts with its task's key (then the model's fingerprint)
        "preps": {k: v for k, v in execute._PREP_CACHE.items() if k[0].rsplit(":", 1)[0] in task_keys},
        "concepts": {k: v for k, v in execute._CONCEPT_CACHE.items() if k in task_keys},
    }


def packed_state(jobs: list[CellJob]) -> tuple[str, bytes]:
    """The shared state as (content hash, plain pickle bytes). Plain bytes: multiprocessing would otherwise
    send torch tensors as shared-memory file descriptors, and a worker unpickles the bytes once (keyed by
    the hash), not once per cell."""
    blob = pickle.dumps(shared_state(jobs), protocol=pickle.HIGHEST_PROTOCOL)
    return hashlib.blake2b(blob, digest_size=16).hexdigest(), blob


_INSTALLED: set[str] = set()


def install_state(state: dict[str, Any] | tuple[str, bytes | str] | None) -> None:
    """Put shipped state into this process's caches (entries already present are kept); packed state (the
    pickle bytes, or the path of a file holding them on this machine) is unpickled once per process."""
    if not state:
        return
    if isinstance(state, tuple):
        key, blob = state
        if key in _INSTALLED:
            return
        _INSTALLED.add(key)
        if isinstance(blob, str):  # unpickled straight from the file: the bytes (~150 MB) are never held whole
            with open(blob, "rb") as f:
                state = pickle.load(f)
        else:
            state = pickle.loads(blob)
    assert isinstance(state, dict)  # unpacked state: {cache name: entries}
    for name, cache in (("tasks", execute._TASK_CACHE), ("preps", execute._PREP_CACHE)):
        for key, value in state.get(name, {}).items():
            cache.setdefault(key, value)
    for key, value in state.get("concepts", {}).items():
        execute._CONCEPT_CACHE.setdefault(key, execute.frozen_sets(value))


def _init_worker(state: tuple[str, bytes] | None = None) -> None:
    import torch

    from xbench.models.base import single_thread_pools

    torch.set_num_threads(CELL_THREADS)
    single_thread_pools()
    install_state(state)


def compute_cell_with(state: Any, *job: Any) -> dict[str, Any]:
    """A dask task: install the (scattered, once per worker) shared state, then compute the cell."""
    install_state(state)
    return compute_cell(*job)


def run_local(jobs: list[CellJob], n_jobs: int = 1) -> Iterator[tuple[Cell, dict[str, Any]]]:
    """Run cells here (n_jobs == 1), or here and in n_jobs - 1 fresh processes (spawned: safe with torch)."""
    pool = LocalPool(n_jobs)
    try:
        yield from pool(jobs)
    finally:
        pool.close()


def _noop() -> None:
    return None


def compute_cell_from(state_file: str, state_key: str, *job: Any) -> dict[str, Any]:
    """A pool task: install the shared state from the client's file (once per process), compute the cell."""
    install_state((state_key, state_file))
    return compute_cell(*job)


def state_file(blob: bytes) -> Path:
    """The packed state in a temporary file, for workers on this machine to read once each (sending ~150 MB
    through a pipe or a socket to every worker costs seconds)."""
    import tempfile

    handle, name = tempfile.mkstemp(prefix="xbench-state-", suffix=".pickle")
    with open(handle, "wb") as f:
        f.write(blob)
    return Path(name)


class LocalPool:
    """``--jobs N`` on this machine: this process computes cells itself and N - 1 spawned worker processes
    compute the others. The workers start (and import torch, captum, ...) as soon as the pool is made, while
    this process prepares the data, models and truth; the prepared state then goes to them once, through a
    temporary file (read once per worker). Cells are taken longest first from one shared list by whoever is
    free (this process, or a thread of this process that keeps one cell in flight per worker)."""

    def __init__(self, n_jobs: int):
        self.n_jobs = max(int(n_jobs), 1)
        self.pool: ProcessPoolExecutor | None = None
        self.state_file: Path | None = None
        self.todo: list[CellJob] = []
        if self.n_jobs > 1:
            ctx = multiprocessing.get_context("spawn")
            self.pool = ProcessPoolExecutor(max_workers=self.n_jobs - 1, mp_context=ctx, initializer=_warm_imports)
            for _ in range(self.n_jobs - 1):  # workers are spawned on demand: one warm-up task each
                self.pool.submit(_noop)

    def prefetch(self, fn: Callable[..., Any], *args: Any) -> None:
        """Run ``fn(*args)`` on a worker before any cell (the workers idle while this process trains): work
        whose result the cells find in a disk cache. Nothing without workers; a failure there is ignored
        (the cell that needs the result makes it, and reports any error itself)."""
        if self.pool is not None:
            self.pool.submit(fn, *args)

    def close(self) -> None:
        self.todo.clear()  # feeder threads stop taking cells
        if self.pool is not None:
            self.pool.shutdown(wait=True, cancel_futures=True)
            self.pool = None
        if self.state_file is not None:
            self.state_file.unlink(missing_ok=True)
            self.state_file = None

    def __call__(self, jobs: list[CellJob]) -> Iterator[tuple[Cell, dict[str, Any]]]:
        try:
            if self.pool is None:
                for job in jobs:
                    yield job[1], compute_cell(*job)
                return
            yield from self._shared(jobs)
        finally:
            self.close()

    def _shared(self, jobs: list[CellJob]) -> Iterator[tuple[Cell, dict[str, Any]]]:
        assert self.pool is not None  # only with workers
        pool = self.pool
        key, blob = packed_state(jobs)
        self.state_file = state_file(blob)
        name = str(self.state_file)
        del blob

        def remote(job: CellJob) -> dict[str, Any]:
            try:
                return pool.submit(compute_cell_from, name, key, *job).result()
            except BrokenProcessPool as exc:  # a worker died (segfault, os._exit)
                raise WorkersGone(f"worker process died ({exc})") from exc

        yield from share_cells(jobs, self.todo, self.n_jobs - 1, remote)


class WorkersGone(Exception):
    """No worker can take cells any more: the cell in flight fails and this process takes the rest."""


def share_cells(
    jobs: list[CellJob], todo: list[CellJob], n_workers: int, remote: Callable[[CellJob], dict[str, Any]]
) -> Iterator[tuple[Cell, dict[str, Any]]]:
    """Cells from one shared list, longest first, taken by whoever is free: this process (in this thread)
    and ``n_workers`` workers, each kept busy with one cell in flight by a thread of this process calling
    ``remote(job)``. ``todo`` is the shared list (emptied from outside to stop the workers' threads)."""
    import queue

    todo[:] = longest_first(jobs)
    if not todo:
        return
    lock = threading.Lock()
    done: queue.Queue = queue.Queue()

    def take() -> CellJob | None:
        with lock:
            return todo.pop(0) if todo else None

    def feed() -> None:  # keeps one cell in flight on one worker
        while (job := take()) is not None:
            started = time.perf_counter()
            try:
                result = remote(job)
            except WorkersGone as exc:
                done.put((job[1], failed_result(job[1], str(exc), started)))
                break  # the workers are unusable: this process takes the remaining cells
            except Exception as exc:  # noqa: BLE001 - e.g. a result that cannot be pickled back
                result = failed_result(job[1], f"{type(exc).__name__}: {exc}", started)
            done.put((job[1], result))
        done.put(None)

    feeders = [threading.Thread(target=feed, daemon=True) for _ in range(n_workers)]
    for thread in feeders:
        thread.start()
    running = len(feeders)
    while True:
        while True:  # hand over what the workers finished
            try:
                item = done.get_nowait()
            except queue.Empty:
                break
            if item is None:
                running -= 1
            else:
                yield item
        job = take()
        if job is None:
            break
        yield job[1], compute_cell(*job)
    while running:
        item = done.get()
        if item is None:
            running -= 1
        else:
            yield item


def worker_environment() -> dict[str, Any]:
    """dask configuration for the workers a local cluster spawns: glibc's own trim threshold (unset the
    nanny's ``MALLOC_TRIM_THRESHOLD_``), one thread for every numeric library, no statistical profiler."""
    return {
        "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
        "distributed.nanny.pre-spawn-environ.OMP_NUM_THREADS": 1,
        "distributed.nanny.pre-spawn-environ.MKL_NUM_THREADS": 1,
        "distributed.nanny.pre-spawn-environ.OPENBLAS_NUM_THREADS": 1,
        # the workers' statistical profiler samples every thread's stack each 10 ms: GIL and CPU time that
        # the Python-heavy parts of a cell (captum glue, metrics) pay for
        "distributed.worker.profile.enabled": False,
        # no memory manager (it polls each worker's memory every 100 ms, from the worker and its nanny) and a
        # slower system monitor: cells are small, and on a 2-core machine every polling process takes CPU
        # from the cells
        "distributed.worker.memory.target": False,
        "distributed.worker.memory.spill": False,
        "distributed.worker.memory.pause": False,
        "distributed.worker.memory.terminate": False,
        "distributed.admin.system-monitor.interval": "5s",
        # every server (the scheduler and the worker in the client's process, each worker process) checks
        # its event loop for blocking every 20 ms by default: 50 wake-ups a second per server that take the
        # GIL from a cell computing on a thread of the same process
        "distributed.admin.tick.interval": "1s",
        # cells are queued on the scheduler longest first and handed to whichever worker is free: stealing
        # can only move a long cell behind another
        "distributed.scheduler.work-stealing": False,
    }


def _exit_with_parent() -> None:
    """In a worker process started by multiprocessing: end when the parent ends. A pool's worker waits on a
    queue whose pipe it holds both ends of, so a client killed outright (SIGKILL, SIGTERM) would otherwise
    leave it waiting forever, holding its memory (seen: ~0.8 GB)."""
    parent = multiprocessing.parent_process()
    if parent is None:  # not started by multiprocessing (a dask worker process, the client itself)
        return

    def watch() -> None:
        parent.join()  # returns when the parent's sentinel closes, i.e. when it has ended
        os._exit(1)

    threading.Thread(target=watch, name="xbench-exit-with-parent", daemon=True).start()


def _warm_imports() -> None:
    """Import what cells need (torch, captum, the explainers and metrics), so a worker that starts while the
    client prepares the models is ready when the first cell arrives."""
    _exit_with_parent()
    import xbench.explainers  # noqa: F401
    import xbench.metrics  # noqa: F401
    from xbench.explainers.registry import load_plugins

    load_plugins()
    import_backends()  # a worker that is waiting for the client's models has the time
    _init_worker()


def import_backends() -> None:
    """Import the explainers' libraries (captum, scikit-image) now. The explainers import them where they are
    used (a client that only dispatches cells never pays for them); every worker imports them when it starts,
    and a client that computes cells before its first one, so that a one-time import (~0.6-1.2 s) is not
    counted in one cell's seconds. Not on a background thread during the model preparation: two threads
    importing packages with circular imports inside can end in importlib's deadlock error."""
    import captum.attr  # noqa: F401
    import skimage.segmentation  # noqa: F401


def dask_setup(worker: Any) -> None:
    """dask's preload hook (``preload=["xbench.runs.executors"]``): a local cluster's worker processes import
    what cells need and set one thread per library when they start."""
    _warm_imports()


def _free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on now (the scheduler takes it a moment later)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _worker_process(address: str, name: str) -> subprocess.Popen:
    """A one-thread dask worker process without a nanny (``dask worker --no-nanny``) for a local cluster:
    one process per worker instead of two (the nanny's own start-up, imports and polling cost CPU on a
    machine whose every core runs cells). Settings
    go through the environment: :func:`worker_environment` as ``DASK_*`` variables, one thread for every
    numeric library, glibc's own trim threshold. It gives up if no scheduler answers within a minute (so
    it never outlives a client that died)."""
    env = {k: v for k, v in os.environ.items() if k != "MALLOC_TRIM_THRESHOLD_"}
    for key, value in worker_environment().items():
        if key.startswith("distributed.nanny.pre-spawn-environ."):
            if value is not None:
                env[key.rsplit(".", 1)[1]] = str(value)
        else:
            env["DASK_" + key.replace(".", "__").replace("-", "_").upper()] = repr(value)
    command = [sys.executable, "-m", "distributed.cli.dask_worker", address, "--no-nanny", "--nthreads", "1"]
    command += ["--name", name, "--host", "127.0.0.1", "--no-dashboard", "--memory-limit", "0"]
    command += ["--death-timeout", "60", "--preload", __name__]
    log = tempfile.TemporaryFile(mode="w+b")  # read back only if the worker ends before it is told to
    return subprocess.Popen(command, env=env, stdin=subprocess.DEVNULL, stdout=log, stderr=log)


def _ended_early(process: subprocess.Popen) -> str | None:
    """Why a worker process ended before the client told it to (its exit code and last log lines), or None."""
    code = process.poll()
    if code is None:
        return None
    log = process.stdout
    tail: list[str] = []
    if log is not None:
        log.seek(0)
        tail = log.read().decode(errors="replace").strip().splitlines()[-3:]
    return f"exit code {code}" + (": " + " | ".join(tail) if tail else "")


class DaskCluster:
    """A dask client (to ``scheduler``, or to a local cluster of ``n_workers`` one-thread workers) that starts
    in a background thread as soon as it is made, so workers boot and import while the client prepares the
    data, models and truth; calling it with the jobs waits for it, then runs the cells.

    A local cluster of ``n_workers`` has ``n_workers - 1`` worker processes (no nannies); this process is the
    other worker: it computes cells in its main thread, as ``--jobs N`` does, while a thread per worker
    process keeps one cell in flight there (so no process sits idle, and the machine starts one worker
    process fewer). An earlier design ran a dask ``Worker`` inside this process instead: its cells computed on
    a thread that shared the interpreter lock with the scheduler's and the client's event loops, about 5%
    slower than the same cells here. A remote scheduler's workers are wherever their owner started them: all
    cells go to them."""

    def __init__(self, scheduler: str | None = None, n_workers: int = 2):
        import importlib.util

        # found, not imported: the import (a quarter second) runs on the starting thread, beside the client's
        # preparation
        if importlib.util.find_spec("dask") is None or importlib.util.find_spec("distributed") is None:
            raise XbenchInputError(
                "--executor dask", "dask.distributed is not installed", expected="pip install 'xbench[cluster]'"
            )
        self.scheduler = scheduler
        self.n_workers = n_workers
        self.client: Any = None
        self.cluster: Any = None
        self.error: BaseException | None = None
        self._config: Any = None
        self.state_path: Path | None = None
        self.processes: list[subprocess.Popen] = []
        self.todo: list[CellJob] = []  # the local cluster's shared list of cells (emptied to stop its feeders)
        self._scattered: list[Any] = []  # the state's futures on a local cluster
        self._prefetch: list[tuple[Callable[..., Any], tuple[Any, ...]]] = []
        self._prefetched: list[Any] = []  # their futures (kept, so that dask does not drop them)
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._start, name="xbench-dask-start", daemon=True)
        self._thread.start()

    def prefetch(self, fn: Callable[..., Any], *args: Any) -> None:
        """Run ``fn(*args)`` on a worker before the cells, as :meth:`LocalPool.prefetch` does: submitted as
        soon as the client is connected (now, or when the starting thread gets there); errors are ignored."""
        with self._lock:
            if self.client is None:
                self._prefetch.append((fn, args))
                return
        self._submit_prefetch(fn, args)

    def _submit_prefetch(self, fn: Callable[..., Any], args: tuple[Any, ...]) -> None:
        try:
            self._prefetched.append(self.client.submit(fn, *args, pure=False))
        except Exception:  # noqa: BLE001 - the cell that needs the result makes it
            pass

    def _start(self) -> None:
        import dask
        from dask.distributed import Client, LocalCluster

        try:
            if self.scheduler:
                self.client = Client(self.scheduler)
            else:
                port = _free_port()
                # the worker processes start first and import while the scheduler comes up (they retry
                # connecting until it listens)
                self.processes = [
                    _worker_process(f"tcp://127.0.0.1:{port}", f"xbench-worker-{i + 1}")
                    for i in range(self.n_workers - 1)
                ]
                self._config = dask.config.set(worker_environment())  # kept until close()
                self.cluster = LocalCluster(
                    n_workers=0,
                    threads_per_worker=1,
                    processes=True,
                    host="127.0.0.1",
                    scheduler_port=port,
                    dashboard_address=None,
                    scheduler_kwargs={"dashboard": False},  # no web server (and no port clash) for a batch run
                    silence_logs=logging.ERROR,
                )
                self.client = Client(self.cluster)
            with self._lock:  # work asked for before the client was connected
                waiting, self._prefetch = self._prefetch, []
            for fn, args in waiting:
                self._submit_prefetch(fn, args)
            if self.cluster is None:  # a remote cluster's workers import while the client prepares
                self.client.run(_warm_imports)
        except BaseException as exc:  # noqa: BLE001 - re-raised in the caller's thread
            self.error = exc

    def close(self) -> None:
        self.todo.clear()  # feeder threads stop taking cells
        self._thread.join()
        self._prefetched = []
        if self._scattered and self.client is not None:
            # released before the workers that hold them stop (else the scheduler logs lost data as an error)
            self.client.cancel(self._scattered)
            self._scattered = []
        # worker processes first, while the scheduler still answers; killed, not asked to stop: they hold
        # nothing the run needs (every result is back, the shared state released), and a dask worker's
        # orderly shutdown takes about 0.6 s of the run's wall time
        for process in self.processes:
            why = _ended_early(process)
            if why is not None:  # its cells ran on the other workers; the run is right, only slower
                warnings.warn(f"a local dask worker process ended early ({why})", stacklevel=2)
            process.kill()
        for process in self.processes:
            process.wait()
            if process.stdout is not None:
                process.stdout.close()
        self.processes = []
        if self.client is not None:
            self.client.close()
            self.client = None
        if self.cluster is not None:
            self.cluster.close()
            self.cluster = None
        if self._config is not None:
            self._config.__exit__(None, None, None)
            self._config = None
        if self.state_path is not None:
            self.state_path.unlink(missing_ok=True)
            self.state_path = None

    def __call__(self, jobs: list[CellJob]) -> Iterator[tuple[Cell, dict]]:
        self._thread.join()
        try:
            if self.error is not None:
                raise self.error
            if not jobs:
                return
            # once per worker, keyed by content (the task file hash is in the cache keys): not once per cell
            key, blob = packed_state(jobs)
            _INSTALLED.add(key)  # this process holds the state already
            if self.cluster is not None:  # workers on this machine: they read a file once each
                self.state_path = state_file(blob)
                del blob
                yield from self._shared(jobs, key)
            else:
                yield from self._remote(jobs, key, blob)
        finally:
            self.close()

    def _shared(self, jobs: list[CellJob], key: str) -> Iterator[tuple[Cell, dict]]:
        """A local cluster: this process computes cells in this thread, as ``--jobs N`` does, and each worker
        process is kept busy with one cell in flight; all take from one list, longest first."""
        client = self.client
        state = client.scatter((key, str(self.state_path)), broadcast=True, hash=False)
        self._scattered = list(state)
        processes = self.processes

        def remote(job: CellJob) -> dict[str, Any]:
            future = client.submit(compute_cell_with, state, *job, key=f"xbench-cell-{job[1].cell_id}", pure=False)
            while True:
                try:
                    return future.result(timeout=1.0)
                except TimeoutError:
                    # a cell waits for a worker; if none is left, it would wait for ever
                    ended = [why for p in processes if (why := _ended_early(p)) is not None]
                    if processes and len(ended) == len(processes):
                        future.cancel()
                        raise WorkersGone(f"every local dask worker process ended ({ended[0]})") from None

        yield from share_cells(jobs, self.todo, len(processes), remote)

    def _remote(self, jobs: list[CellJob], key: str, blob: bytes) -> Iterator[tuple[Cell, dict]]:
        """A remote scheduler: every cell goes to its workers, longest first (they run on dask's queue)."""
        from dask.distributed import as_completed as dask_completed

        client = self.client
        ordered = longest_first(jobs)
        state = client.scatter((key, blob), broadcast=True, hash=True)
        del blob
        futures = [
            client.submit(
                compute_cell_with,
                state,
                *job,
                key=f"xbench-cell-{job[1].cell_id}",
                pure=False,
                priority=len(ordered) - rank,  # dask runs higher priorities first
            )
            for rank, job in enumerate(ordered)
        ]
        by_key = {f.key: job[1] for f, job in zip(futures, ordered, strict=True)}
        for future in dask_completed(futures):
            yield by_key[future.key], future.result()


def run_dask(jobs: list[CellJob], scheduler: str | None = None, n_workers: int = 2) -> Iterator[tuple[Cell, dict]]:
    """Run cells on a dask.distributed cluster (an address, or a local cluster when none is given)."""
    yield from DaskCluster(scheduler, n_workers)(jobs)


def executor_for(name: str, n_jobs: int, scheduler: str | None) -> Callable[[list[CellJob]], Iterator]:
    if name == "local":
        return LocalPool(n_jobs)  # workers start now, while the client prepares
    if name == "dask":
        return DaskCluster(scheduler, max(n_jobs, 1))  # starts now, while the client prepares
    raise XbenchInputError("--executor", "unknown executor", expected="local or dask", found=name)
