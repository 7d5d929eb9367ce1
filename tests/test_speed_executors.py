"""Parallel executors give the local executor's records, and ship the prepared state once per worker."""

from __future__ import annotations

import json
import os
import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xbench.runs import execute, load_records, run_task
from xbench.runs.executors import install_state, longest_first, shared_state

TINY = Path(__file__).parent / "data" / "tiny_task.toml"
KEY = ["model", "seed", "explainer", "metric", "truth", "tile"]
EXPLAINERS = ["gradient", "occlusion", "oracle"]


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    cache = tmp_path_factory.mktemp("xbench-cache")
    old = os.environ.get("XBENCH_CACHE")
    os.environ["XBENCH_CACHE"] = str(cache)
    out = tmp_path_factory.mktemp("local")
    summary = run_task(TINY, out, explainers=EXPLAINERS)
    assert summary.ok, summary.failures
    yield out
    if old is None:
        os.environ.pop("XBENCH_CACHE", None)
    else:
        os.environ["XBENCH_CACHE"] = old


def comparable(out: Path) -> pd.DataFrame:
    records = load_records(out)
    kept = records[records["metric"] != "seconds"].drop(columns=["run_id"])  # wall-clock values differ
    return kept.sort_values(KEY).reset_index(drop=True)


@pytest.mark.parametrize("executor", ["local", "dask"])
def test_two_workers_give_the_local_records(local_run, tmp_path, executor):
    if executor == "dask":
        pytest.importorskip("dask.distributed")
    summary = run_task(TINY, tmp_path / executor, executor=executor, jobs=2, explainers=EXPLAINERS)
    assert summary.ok, summary.failures
    pd.testing.assert_frame_equal(comparable(tmp_path / executor), comparable(local_run))


def test_metric_calls_and_seconds_are_recorded_per_metric(local_run):
    cells = {c["explainer"]: c for c in json.loads((local_run / "manifest.json").read_text())["cells"]}
    cost = cells["occlusion"]["cost"]
    # the randomization check re-runs occlusion once on the randomized model: 16 windows + 1 per tile
    # (32 px tiles, window = stride = 8), 12 tiles
    assert cost["metric_calls"]["randomization-spearman"] == [12 * 17, 0]
    assert cost["metric_calls"]["mass-accuracy"] == [0, 0]  # the map alone
    assert cells["oracle"]["cost"]["metric_calls"]["randomization-spearman"] == [0, 0]  # no model call
    assert set(cost["metric_seconds"]) == set(cost["metric_calls"])
    assert all(v >= 0 for v in cost["metric_seconds"].values())


def test_explainer_reruns_are_clocked_apart_from_the_metrics_own_work(local_run):
    # The randomization check re-runs occlusion once on the randomized model (above); mass-accuracy re-runs
    # nothing. The re-runs' seconds are part of the metric's seconds, and their model seconds part of both.
    cells = {c["explainer"]: c for c in json.loads((local_run / "manifest.json").read_text())["cells"]}
    cost = cells["occlusion"]["cost"]
    reruns = cost["metric_rerun_seconds"]
    assert "mass-accuracy" not in reruns
    seconds, model_seconds = reruns["randomization-spearman"]
    assert 0 < model_seconds <= seconds <= cost["metric_seconds"]["randomization-spearman"]
    assert model_seconds <= cost["metric_model_seconds"]["randomization-spearman"]
    assert cells["oracle"]["cost"]["metric_rerun_seconds"].get("randomization-spearman", [0, 0])[1] == 0


def test_frozen_shared_arrays_never_reach_torch_as_read_only(tmp_path):
    # The runner freezes the prepared images and each cell's attributions (read-only, so metric caches hash
    # them once); torch warns once per process when it wraps a read-only array ("not writable ... undefined
    # behavior"), so a fresh process runs the tiny task with that warning raised as an error: a cell that
    # hands a frozen array to torch without a copy fails.
    import subprocess
    import sys

    script = (
        "import sys\n"
        "from xbench.runs import run_task\n"
        f"summary = run_task({str(TINY)!r}, {str(tmp_path / 'run')!r})\n"
        "sys.exit(0 if summary.ok else '; '.join(f['error'] for f in summary.failures))\n"
    )
    env = dict(os.environ, XBENCH_CACHE=str(tmp_path / "cache"), MPLBACKEND="Agg")
    done = subprocess.run(
        [sys.executable, "-W", "error:The given NumPy array is not writable:UserWarning", "-c", script],
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr[-2000:]


def test_shared_state_makes_a_fresh_worker_skip_its_setup(local_run, monkeypatch):
    task_path = str(TINY.resolve())
    cell = type("C", (), {"explainer": "gradient"})()
    state = pickle.loads(pickle.dumps(shared_state([(task_path, cell, [], {}, "r")])))  # as a worker gets it
    assert state["preps"] and state["tasks"]
    saved = (dict(execute._TASK_CACHE), dict(execute._PREP_CACHE))
    execute._TASK_CACHE.clear()
    execute._PREP_CACHE.clear()
    try:

        def forbidden(*_a, **_k):
            raise AssertionError("a worker with shipped state must not rebuild the data or the truth")

        monkeypatch.setattr("xbench.tasks.build_task_data", forbidden)
        monkeypatch.setattr("xbench.truth.compute_reliance", forbidden)
        install_state(state)
        prep = execute.prepare(task_path, "cnn", 0)
        assert prep.images.shape[0] == 12 and prep.trained.handle.layout == "channels_last"
    finally:
        execute._TASK_CACHE.clear()
        execute._PREP_CACHE.clear()
        execute._TASK_CACHE.update(saved[0])
        execute._PREP_CACHE.update(saved[1])


def test_costliest_cells_are_dispatched_first():
    cells = [type("C", (), {"explainer": k})() for k in ("oracle", "gradient", "rise", "my-plugin", "occlusion")]
    order = [job[1].explainer for job in longest_first([("t", c, [], {}, "r") for c in cells])]
    assert order == ["rise", "occlusion", "my-plugin", "gradient", "oracle"]


def test_a_local_dask_worker_process_runs_without_a_nanny_and_says_why_it_ended_early():
    pytest.importorskip("dask.distributed")
    from xbench.runs.executors import _ended_early, _worker_process

    # no scheduler listens on this address: the worker gives up after its death timeout, so stop it here
    process = _worker_process("tcp://127.0.0.1:9", "probe")
    try:
        assert "--no-nanny" in process.args and "--preload" in process.args
        assert _ended_early(process) is None  # still trying to reach the scheduler
    finally:
        process.kill()
        process.wait()
    reason = _ended_early(process)
    assert reason is not None and reason.startswith("exit code -9")


def test_when_the_workers_are_gone_the_cell_in_flight_fails_and_this_process_takes_the_rest(monkeypatch):
    import threading

    from xbench.runs import executors
    from xbench.runs.grid import Cell

    here = []

    def compute_here(task, cell, *_rest):
        here.append(cell.explainer)
        return {"status": "ok", "meta": {"cell": cell.to_dict()}}

    monkeypatch.setattr(executors, "compute_cell", compute_here)
    gone = threading.Event()

    def remote(job):  # the one worker dies on its first cell
        gone.set()
        raise executors.WorkersGone("every local dask worker process ended (exit code -9)")

    names = ["rise", "occlusion", "gradient", "oracle"]
    jobs = [("t", Cell(cell_id=n, task="t", model="cnn", seed=0, explainer=n), [], {}, "r") for n in names]
    results = {cell.explainer: result for cell, result in executors.share_cells(jobs, [], 1, remote)}
    assert gone.is_set() and set(results) == set(names)  # every cell comes back, none twice
    failed = [k for k, r in results.items() if r["status"] == "failed"]
    assert len(failed) == 1 and "exit code -9" in results[failed[0]]["meta"]["error"]
    assert sorted(here) == sorted(set(names) - set(failed))  # this process computed all the others


def test_dask_missing_is_named_with_the_install_command(monkeypatch):
    import importlib.util

    from xbench.errors import XbenchInputError
    from xbench.runs.executors import DaskCluster

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "distributed" else real(name, *a))
    with pytest.raises(XbenchInputError, match=r"dask.distributed is not installed.*xbench\[cluster\]"):
        DaskCluster(None, 2)


@pytest.mark.skipif(not Path("/proc").is_dir(), reason="reads process states from /proc (Linux)")
def test_a_pool_worker_ends_when_its_client_is_killed(tmp_path):
    # a client killed outright (SIGKILL: no cleanup runs) must not leave its worker process waiting on the
    # pool's queue forever
    import os
    import signal
    import subprocess
    import sys
    import time

    script = tmp_path / "client.py"
    script.write_text(
        "import sys, time\n"
        "from xbench.runs.executors import LocalPool, _noop\n"
        "if __name__ == '__main__':\n"
        "    pool = LocalPool(2)\n"
        "    pool.pool.submit(_noop).result()\n"
        "    print(*[p.pid for p in pool.pool._processes.values()], flush=True)\n"
        "    time.sleep(600)\n"
    )
    client = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    workers: list[int] = []
    try:
        workers = [int(pid) for pid in client.stdout.readline().split()]
        assert workers
        client.send_signal(signal.SIGKILL)
        client.wait(timeout=10)
        deadline = time.monotonic() + 20
        alive = list(workers)
        while alive and time.monotonic() < deadline:
            time.sleep(0.2)
            alive = [pid for pid in alive if _running(pid)]
        assert not alive, f"worker processes still running after their client was killed: {alive}"
    finally:
        client.kill()
        for pid in workers:
            if _running(pid):
                os.kill(pid, signal.SIGKILL)


def _running(pid: int) -> bool:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except FileNotFoundError:
        return False
    return stat.split()[2] != "Z"  # a zombie has ended


def _touch(path: str) -> None:
    Path(path).write_text("done")


def test_a_pool_runs_prefetched_work_on_a_worker_before_the_cells(tmp_path):
    from xbench.runs.executors import LocalPool

    pool = LocalPool(2)
    try:
        pool.prefetch(_touch, str(tmp_path / "flag"))
        assert pool.pool is not None
        pool.pool.submit(_noop_wait).result(timeout=120)  # queued after the prefetch on the one worker
        assert (tmp_path / "flag").read_text() == "done"
    finally:
        pool.close()
    LocalPool(1).prefetch(_touch, str(tmp_path / "never"))  # no workers: nothing runs
    assert not (tmp_path / "never").exists()


def _noop_wait() -> None:
    return None


def test_a_local_dask_cluster_runs_prefetched_work_on_a_worker(tmp_path):
    # As the pool does: work asked for while the cluster is still starting (the runner asks at once) is
    # submitted when the client connects, and runs in a worker process (a file only it can have written).
    pytest.importorskip("dask.distributed")
    from xbench.runs.executors import DaskCluster

    flag = tmp_path / "flag"
    cluster = DaskCluster(None, 2)
    try:
        cluster.prefetch(flag.touch)
        cluster._thread.join(timeout=120)
        assert cluster.error is None and len(cluster._prefetched) == 1
        cluster._prefetched[0].result(timeout=120)
        assert flag.is_file()
        worker = next(iter(cluster.client.scheduler_info()["workers"].values()))
        assert worker["name"] == "xbench-worker-1"  # the one worker process ran it
    finally:
        cluster.close()


def test_prefetched_concept_sets_are_the_ones_a_cell_would_make(small_task_file, monkeypatch, tmp_path):
    # The worker writes the sets to the disk cache and keeps nothing in memory; the cell's process then reads
    # exactly the arrays it would have synthesized itself.
    from xbench.explainers import concept_sets as concept_sets_module
    from xbench.runs import execute
    from xbench.tasks import load_task

    monkeypatch.setenv("XBENCH_CACHE", str(tmp_path / "cache"))
    monkeypatch.setattr(execute, "_CONCEPT_CACHE", {})
    task = load_task(small_task_file)
    types = ["road", "river"]
    execute.prefetch_concept_sets(str(small_task_file), types)
    assert execute._CONCEPT_CACHE == {}
    assert list((tmp_path / "cache" / "concepts").glob("*.npz"))

    def forbidden(*_a, **_k):
        raise AssertionError("the sets are in the disk cache: nothing is synthesized again")

    monkeypatch.setattr(concept_sets_module, "make_concept_sets", forbidden)
    read = execute.concept_sets_for(task, types)
    monkeypatch.undo()
    run = task.run
    made = concept_sets_module.make_concept_sets(
        task.data.recipe, task.data.size, types, int(run["concept_set_size"]), int(run["random_sets"]),
        int(task.data.seed) + 7919,
    )  # fmt: skip
    assert set(read) == set(made)
    for name in made:
        np.testing.assert_array_equal(read[name], made[name])
