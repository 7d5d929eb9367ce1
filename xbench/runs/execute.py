"""Work done for one cell: prepare (data, model, truth) and then explain and score.

Preparation is shared by every cell of one (model, seed) and kept in a per-process cache, so that the
local executor prepares once and each dask worker prepares at most once per (model, seed). Models come
from the training cache; the runner trains them on the client before cells are dispatched.
"""

from __future__ import annotations

import json
import signal
import threading
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import torch

from xbench.errors import XbenchInputError
from xbench.runs.grid import Cell, content_hash, model_fingerprint
from xbench.runs.store import CONCEPT_COLUMNS, CURVE_COLUMNS, REASON_COLUMNS, RECORD_COLUMNS

if TYPE_CHECKING:  # annotations only: the modules below are imported where used, when a cell first needs them
    from collections.abc import Callable

    from xbench.data import TilePack
    from xbench.explainers import ExplainContext
    from xbench.metrics.base import MetricInputs, MetricResult
    from xbench.models.base import ModelHandle
    from xbench.models.train import TrainedModel
    from xbench.tasks import ModelSpec, Task, TaskData
    from xbench.truth import Reliance

# One thread everywhere inside cells: results must not depend on how many threads a worker has.
CELL_THREADS = 1
# A metric setting the runner understands for every metric: score on the first K explained tiles only.
TILE_SUBSET_SETTING = "tiles"


@dataclass
class Prepared:
    """What every cell of one (model, seed) shares."""

    task: Task
    data: TaskData
    trained: TrainedModel
    seed: int
    explain_index: np.ndarray  # indices into the test split
    images: np.ndarray
    targets: np.ndarray
    twins: np.ndarray | None
    masks: np.ndarray
    mask_names: list[str]
    planted: np.ndarray
    reliance: Reliance | None  # None for a user's tile pack (no scenes to intervene on)
    fit_images: np.ndarray
    fit_labels: np.ndarray
    fit_masks: np.ndarray
    concept_sets: dict[str, np.ndarray] | None
    planted_coverage: np.ndarray | None = None  # float32 (N, H, W): max coverage of the driving types
    band_spread: np.ndarray | None = None  # (C,) per-band standard deviation of the training split
    # metrics' work that does not depend on the explainer (MetricInputs.shared_work), kept for its other cells
    metric_work: dict = field(default_factory=dict, repr=False)
    # this model's explanations by (explainer, settings) with their self-checks: a task's protocol variants
    # score the same maps under other metric settings and take them from here (``explanation_key``)
    explanations: dict = field(default_factory=dict, repr=False)


def gallery_positions(targets: np.ndarray, count: int) -> np.ndarray:
    """Which explained tiles (positions in the explained set) the gallery shows: the first tile of every
    class, then the second of every class, and so on, so that a gallery of a few tiles shows every class."""
    targets = np.asarray(targets)
    by_class = [np.flatnonzero(targets == c) for c in dict.fromkeys(targets.tolist())]
    order = [int(idx[k]) for k in range(max((len(i) for i in by_class), default=0)) for idx in by_class if k < len(idx)]
    return np.asarray(order[: max(count, 0)], dtype=np.int64)


_TASK_CACHE: dict[str, tuple[Task, TaskData]] = {}
_PREP_CACHE: dict[tuple[str, str, int], Prepared] = {}
_CONCEPT_CACHE: dict[str, dict[str, np.ndarray]] = {}


def release_process_caches() -> None:
    """Drop what this process keeps between cells (task data, prepared models and truth, concept sets, fitted
    cluster models) and hand the freed memory back to the system, so that work after a run (the demo's
    report) does not stack its peak on the run's. The next cell prepares again."""
    import ctypes
    import gc

    from xbench.explainers import clusters, tcav

    for cache in (_TASK_CACHE, _PREP_CACHE, _CONCEPT_CACHE, clusters._FITS, tcav._CAV_FITS):
        cache.clear()
    gc.collect()
    try:  # glibc keeps freed small blocks in its arenas; one trim returns them (not a per-free trim threshold)
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):  # not glibc: nothing to do
        pass


def task_and_data(task_path: str | Path | Task) -> tuple[Task, TaskData]:
    """The task and its tile packs, built once per process (deterministic from the task's data seed)."""
    from xbench.tasks import build_task_data, load_task

    task = load_task(task_path)
    key = _task_key(task)
    if key not in _TASK_CACHE:
        _TASK_CACHE[key] = (task, build_task_data(task))
    return _TASK_CACHE[key]


def _task_key(task: Task) -> str:
    # the parsed task and its data (recipe content, pack checksum): an edit between two runs in one process
    # never reuses tiles or models prepared for the old content
    return f"{task.path}:{task.file_hash}:{task.data.hash}"


def model_spec(task: Task, name: str) -> ModelSpec:
    return next(m for m in task.models if m.name == name)


def train_or_load(task_path: str | Path | Task, model_name: str, seed: int) -> TrainedModel:
    from xbench.models import train_model

    task, data = task_and_data(task_path)
    return train_model(task, data, model_spec(task, model_name), seed)


def choose_explain_tiles(task: Task, labels: np.ndarray, count: int) -> np.ndarray:
    """The first `count` test tiles whose class is made by planted structures (so localization is defined)."""
    positive = [c for c, types in task.class_driving_types.items() if types]
    index = np.flatnonzero(np.isin(labels, positive))
    return index[:count]


def concept_sets_for(task: Task, types: list[str]) -> dict[str, np.ndarray]:
    """TCAV example sets for the structure types the task's recipe can plant: made once per process, and
    kept in ``$XBENCH_CACHE/concepts`` (keyed by the data section, the sets' settings and the package
    version, like the task's tile packs) so a later run of the task reads them instead of synthesizing
    ~2,000 scenes again (about 3 s on the demo)."""
    key = _task_key(task)
    if key not in _CONCEPT_CACHE:
        _CONCEPT_CACHE[key] = frozen_sets(_concept_sets_through_disk(task, types))
    return _CONCEPT_CACHE[key]


def _concept_settings(task: Task, types: list[str]) -> tuple:
    run = task.run
    return (list(types), int(run["concept_set_size"]), int(run.get("random_sets", 10)), int(task.data.seed) + 7919)


def _concept_sets_through_disk(task: Task, types: list[str]) -> dict[str, np.ndarray]:
    """The sets from the disk cache, or made and written there (a tile pack's task: made, not kept)."""
    from xbench.explainers.concept_sets import make_concept_sets

    settings = _concept_settings(task, types)
    path = _concept_cache_path(task, settings) if not task.data.pack else None
    sets = _read_concept_sets(path) if path is not None else None
    if sets is None:
        sets = make_concept_sets(task.data.recipe, task.data.size, *settings)
        if path is not None:
            _write_concept_sets(path, sets)
    return sets


def prefetch_concept_sets(task_path: str | Path | Task, types: list[str]) -> None:
    """In a worker process while the client trains: make the task's TCAV example sets and write them to the
    disk cache, so the cell that needs them reads them (~0.5 s) instead of synthesizing them in its own time
    (~8 s on the demo, on a 2-core AVX2 machine). Nothing is kept in this process (a worker that never runs a
    TCAV cell should not hold ~120 MB of sets); a task without a disk cache entry (a tile pack) is skipped."""
    from xbench.tasks import load_task

    task = load_task(task_path)  # a parsed task passes through
    if task.data.pack or _task_key(task) in _CONCEPT_CACHE:
        return
    if not _concept_cache_path(task, _concept_settings(task, types)).is_file():  # not read just to be dropped
        _concept_sets_through_disk(task, types)


def frozen_sets(sets: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The sets as read-only arrays that own their memory: nothing changes them after they are made, and
    explainers that hash them for their fit caches hash each one once per process."""
    out = {}
    for name, array in sets.items():
        a = np.asarray(array)
        out[name] = frozen_array(a if a.flags.owndata else np.array(a, dtype=np.float32))
    return out


def frozen_array(array: np.ndarray) -> np.ndarray:
    """The array as a read-only array that owns its memory (a copy only when it does not own it): digests of
    it are remembered (``array_digest``), so caches keyed on its content hash it once per process."""
    a = np.asarray(array)
    if not a.flags.owndata:
        a = a.copy()
    a.flags.writeable = False
    return a


def _concept_cache_path(task: Task, settings: tuple) -> Path:
    import hashlib

    from xbench import __version__
    from xbench.tasks import cache_root

    digest = hashlib.sha256(f"{task.data.hash}:{settings!r}:{__version__}".encode()).hexdigest()[:32]
    return cache_root() / "concepts" / f"{digest}.npz"


def _read_concept_sets(path: Path) -> dict[str, np.ndarray] | None:
    """The cached sets, or None when absent; a damaged entry is rebuilt, and said so."""
    import warnings
    import zipfile

    if not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            sets = {name: np.array(data[name], dtype=np.float32) for name in data.files}
    except (OSError, ValueError, KeyError, zipfile.BadZipFile) as exc:
        warnings.warn(f"damaged concept-set cache entry {path} rebuilt: {exc}", stacklevel=3)
        return None
    return sets if sets else None


def _write_concept_sets(path: Path, sets: dict[str, np.ndarray]) -> None:
    from xbench.data import atomic_write

    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:  # not compressed: reflectances barely compress, and reading stays fast
            np.savez(fh, allow_pickle=False, **sets)

    try:
        atomic_write(path, write)
    except OSError:  # a read-only or full cache folder: the sets were made, the next run makes them again
        pass


def prepare(task_path: str | Path | Task, model_name: str, seed: int, need_concepts: bool = False) -> Prepared:
    from xbench.truth import compute_reliance

    task, data = task_and_data(task_path)
    fingerprint = content_hash(model_fingerprint(model_spec(task, model_name)))
    key = (f"{_task_key(task)}:{fingerprint}", model_name, int(seed))
    if key in _PREP_CACHE:
        prep = _PREP_CACHE[key]
        if need_concepts and prep.concept_sets is None:
            prep.concept_sets = concept_sets_for(task, prep.mask_names)
        return prep
    test = data.test
    index = choose_explain_tiles(task, test.labels, int(task.run["explain_tiles"]))
    if len(index) == 0:
        positive = [task.class_names[c] for c, types in task.class_driving_types.items() if types]
        raise XbenchInputError(
            f"{task.path}: [data] test split",
            "no test tile of a class made by planted structures: nothing to explain",
            expected="tiles of " + (", ".join(positive) or "a class with driving structure types"),
            found="test labels " + str(np.bincount(test.labels, minlength=len(task.class_names)).tolist()),
        )
    torch.set_num_threads(CELL_THREADS)
    trained = train_or_load(task_path, model_name, seed)  # after the data checks: bad input stops before work
    targets = test.labels[index].astype(np.int64)
    sub = test.subset(index)
    scenes = [data.test_scenes[i] for i in index] if data.test_scenes else []
    # A user's tile pack has no scenes: no per-instance twins, so no model-verified truth.
    reliance = compute_reliance(trained.handle, scenes, targets, seed=int(seed)) if scenes else None
    planted = np.zeros((len(index),) + sub.images.shape[2:], dtype=bool)
    planted_coverage = None if sub.coverage is None else np.zeros(planted.shape, dtype=np.float32)
    for row, cls in enumerate(targets):
        planted[row] = _union(sub, row, task.class_driving_types.get(int(cls), []))
        if planted_coverage is not None:
            planted_coverage[row] = _union_coverage(sub, row, task.class_driving_types.get(int(cls), []))
    # Fitting set for activation-clusters: correctly classified training tiles.
    train = data.train
    n_fit = int(task.run["fit_tiles"])
    pred = trained.handle.predict(train.images[: 4 * n_fit])
    correct = np.flatnonzero(pred == train.labels[: 4 * n_fit])[:n_fit]
    prep = Prepared(
        task=task,
        data=data,
        trained=trained,
        seed=int(seed),
        explain_index=index,
        images=frozen_array(sub.images),  # shared by every cell of the model; metrics key caches on it
        targets=targets,
        twins=sub.twins,
        masks=sub.masks,
        mask_names=list(sub.mask_names),
        planted=planted,
        reliance=reliance,
        fit_images=train.images[correct],
        fit_labels=train.labels[correct],
        fit_masks=train.masks[correct],
        concept_sets=concept_sets_for(task, list(sub.mask_names)) if need_concepts else None,
        planted_coverage=planted_coverage,
        band_spread=train.images.std(axis=(0, 2, 3), dtype=np.float64),
    )
    _PREP_CACHE[key] = prep
    return prep


def _union(pack: TilePack, row: int, types: list[str]) -> np.ndarray:
    out = np.zeros(pack.masks.shape[2:], dtype=bool)
    for name in types:
        if name in pack.mask_names:
            out |= pack.masks[row, pack.mask_names.index(name)]
    return out


def _union_coverage(pack: TilePack, row: int, types: list[str]) -> np.ndarray:
    assert pack.coverage is not None  # prepare() asks only for packs that carry fractional coverage
    out = np.zeros(pack.coverage.shape[2:], dtype=np.float32)
    for name in types:
        if name in pack.mask_names:
            out = np.maximum(out, pack.coverage[row, pack.mask_names.index(name)])
    return out


def explain_context(prep: Prepared, cell: Cell) -> ExplainContext:
    from xbench.explainers import ExplainContext

    task = prep.task
    importance, relied, _, _ = type_groups(prep)
    return ExplainContext(
        seed=int(cell.seed),
        batch_size=int(task.run["batch_size"]),
        twins=prep.twins,
        masks=prep.masks,
        mask_names=prep.mask_names,
        driving_types=dict(task.class_driving_types),
        class_names=list(task.class_names),
        fit_images=prep.fit_images,
        fit_labels=prep.fit_labels,
        fit_masks=prep.fit_masks,
        concept_sets=prep.concept_sets,
        band_spread=prep.band_spread,
        self_checks={},
        reliance=importance,
        relied_types=relied,
    )


def type_groups(prep: Prepared) -> tuple[dict[str, float] | None, list[str], list[str], list[str]]:
    """Interventional importance per type, and the relied-on, look-alike and unused types.

    Roles come from measured reliance (``xbench.truth.type_roles``): a look-alike the model verifiably relies
    on is relied-on evidence (role ``relied-on look-alike``), listed with the relied-on types and not with
    the look-alikes; only types the model does not rely on (unused look-alikes and other unused types) can
    be false alarms."""
    from xbench.truth import type_roles

    lookalikes = [t for t in prep.task.lookalike_types if t in prep.mask_names]
    if prep.reliance is None:
        return None, [], lookalikes, [t for t in prep.mask_names if t not in lookalikes]
    table = prep.reliance.type_table
    importance = {str(k): float(v) for k, v in zip(table["kind"], table["mean_drop"], strict=True) if k != "cue"}
    roles = type_roles(prep.reliance.relied_types(), lookalikes, prep.mask_names)
    relied = [t for t, role in roles.items() if role != "unused"]
    unused_lookalikes = [t for t in lookalikes if roles[t] == "unused"]
    unused = [t for t, role in roles.items() if role == "unused" and t not in lookalikes]
    return importance, relied, unused_lookalikes, unused


class CellTimeout(BaseException):
    """Raised inside a cell when its time limit is reached (a BaseException, so user code that catches
    Exception cannot swallow it)."""


def failed_result(cell: Cell, error: str, started: float, trace: str = "") -> dict[str, Any]:
    """The result of a cell that did not finish (an error, a time limit, a crashed worker)."""
    return {
        "status": "failed",
        "meta": {
            "cell": cell.to_dict(),
            "error": error,
            "traceback": trace,
            "seconds": time.perf_counter() - started,
        },
    }


def compute_cell(
    task_path: str | Path | Task,
    cell: Cell,
    metric_keys: list[str],
    metric_settings: dict[str, dict],
    run_id: str,
    timeout: float | None = None,
) -> dict[str, Any]:
    """Explain and score one cell; never raises: a failure comes back as a failed result.

    ``timeout`` (seconds; the task's ``[run] cell_timeout`` when None) stops a cell that hangs: the cell is
    recorded as failed and the grid goes on. The limit uses SIGALRM, so it holds where cells run on a
    process's main thread (the local executor and its process pool); elsewhere (dask worker threads) a
    cell runs without it. User code that calls ``sys.exit`` fails its cell instead of ending the run.
    """
    started = time.perf_counter()
    if timeout is None:
        try:
            timeout = float(task_and_data(task_path)[0].run.get("cell_timeout", 0)) or None
        except Exception:  # the cell itself reports a task that cannot be read
            timeout = None
    use_alarm = bool(timeout) and hasattr(signal, "SIGALRM") and threading.current_thread() is threading.main_thread()
    previous = None
    try:
        if use_alarm:

            def on_alarm(_signum: int, _frame: Any) -> None:
                raise CellTimeout(f"stopped after its time limit of {timeout:g} s ([run] cell_timeout)")

            previous = signal.signal(signal.SIGALRM, on_alarm)
            assert timeout is not None  # use_alarm implies a time limit was set
            signal.setitimer(signal.ITIMER_REAL, float(timeout))
        try:
            return _compute_cell(task_path, cell, metric_keys, metric_settings, run_id, started)
        finally:
            if use_alarm:
                signal.setitimer(signal.ITIMER_REAL, 0)
    except CellTimeout as exc:
        return failed_result(cell, f"time limit: {exc}", started)
    except SystemExit as exc:  # user code calling sys.exit must not end the run (or pass it as exit 0)
        return failed_result(cell, f"user code called sys.exit({exc.code!r})", started, traceback.format_exc(limit=8))
    except Exception as exc:  # recorded and reported; the rest of the grid goes on
        return failed_result(cell, f"{type(exc).__name__}: {exc}", started, traceback.format_exc(limit=8))
    finally:
        if previous is not None:
            signal.signal(signal.SIGALRM, previous)


def _compute_cell(
    task_path: str | Path | Task,
    cell: Cell,
    metric_keys: list[str],
    metric_settings: dict[str, dict],
    run_id: str,
    started: float,
) -> dict[str, Any]:
    from xbench.explainers import explain, get_explainer
    from xbench.metrics import MetricInputs, compute_metric
    from xbench.models.base import counting_all, single_thread_pools

    cpu_started = time.thread_time()  # this thread's CPU seconds: what the cell costs whatever else runs
    torch.set_num_threads(CELL_THREADS)
    single_thread_pools()  # once per process: entering threadpool_limits rescans the libraries each time
    needs = set(get_explainer(cell.explainer).needs)
    prep = prepare(task_path, cell.model, cell.seed, need_concepts="concept-sets" in needs)
    handle = prep.trained.handle
    context = explain_context(prep, cell)
    reuse = explanation_key(cell)
    kept = prep.explanations.get(reuse)
    if kept is None:  # explained once per model and settings: a protocol variant's cell reuses the maps
        explanation = explain(
            cell.explainer, handle, prep.images, prep.targets, context=context, **cell.explainer_settings
        )
        kept = prep.explanations[reuse] = (explanation, dict(context.self_checks or {}))
    else:
        explanation = kept[0]
        context.self_checks = dict(kept[1])
    t_explained = time.perf_counter()

    importance, relied, lookalikes, unused = type_groups(prep)
    rerun_clock = RerunClock()
    full = MetricInputs(
        attributions=frozen_array(explanation.attributions),  # read by every metric, never changed
        images=prep.images,
        targets=prep.targets,
        model=handle,
        planted=prep.planted,
        verified=None if prep.reliance is None else prep.reliance.verified_masks,
        evidence=None if prep.reliance is None else prep.reliance.evidence,
        planted_coverage=prep.planted_coverage,
        verified_coverage=None if prep.reliance is None else prep.reliance.verified_coverage,
        self_checks=dict(context.self_checks or {}) or None,
        twins=prep.twins,
        type_masks=prep.masks,
        mask_names=prep.mask_names,
        rerun_explainer=make_rerun_explainer(cell, context, len(prep.targets), rerun_clock),
        concept_report=explanation.concepts,
        type_importance=importance,
        relied_types=relied,
        lookalike_types=lookalikes,
        unused_types=unused,
        cost=explanation.cost,
        seed=int(cell.seed),
        batch_size=int(prep.task.run["batch_size"]),
        shared=prep.metric_work,
    )
    # Metrics that re-run the explainer many times (sanity, stability) may be scored on the first K explained
    # tiles only (metric setting `tiles`); metrics on the same K share one inputs object and its cache.
    inputs_by_size: dict[int, MetricInputs] = {len(prep.targets): full}

    def inputs_for(size: int) -> MetricInputs:
        if size not in inputs_by_size:
            inputs_by_size[size] = subset_inputs(full, size, make_rerun_explainer(cell, context, size, rerun_clock))
        return inputs_by_size[size]

    rows: list[tuple] = []
    curves: list[dict[str, Any]] = []
    notes: dict[str, str] = {}
    reasons: list[tuple] = []  # whole reasons of skipped metrics and NaN values, keyed like the records
    if prep.reliance is not None:
        from xbench.truth import unverified_summary

        notes["verified truth"] = unverified_summary(prep.reliance)
    metric_seconds: dict[str, float] = {}
    metric_calls: dict[str, list[int]] = {}  # images forward / backward through any model, per metric
    metric_model_seconds: dict[str, float] = {}  # seconds inside those passes, per metric
    metric_rerun_seconds: dict[str, list[float]] = {}  # [seconds, model seconds] of its explainer re-runs
    tiles = prep.explain_index.astype(np.int64)
    # Self-checks the explainer recorded (integrated gradients' and DeepLIFT's completeness gap) are
    # recorded for every such cell, listed in the task or not.
    keys = list(metric_keys) + [k for k in sorted(full.self_checks or {}) if k not in metric_keys]
    for key in keys:
        t0 = time.perf_counter()
        settings = dict(metric_settings.get(key, {}))
        size = min(int(settings.pop(TILE_SUBSET_SETTING, len(tiles))), len(tiles))
        reran = (rerun_clock.seconds, rerun_clock.model_seconds)
        with counting_all() as calls:
            results = compute_metric(key, inputs_for(size), **settings)
        metric_calls[key] = [int(calls.forward), int(calls.backward)]
        metric_model_seconds[key] = round(float(calls.seconds), 4)
        if rerun_clock.seconds > reran[0]:
            metric_rerun_seconds[key] = [
                round(rerun_clock.seconds - reran[0], 4),
                round(rerun_clock.model_seconds - reran[1], 4),
            ]
        for result in results:
            tag = f"{key}/{result.truth}"
            ident = (run_id, cell.task, cell.model, cell.seed, cell.explainer, key, result.truth)
            if result.skipped:
                notes[tag] = f"skipped: {result.skipped}"
                reasons.append(ident + (f"skipped: {result.skipped}",))
                continue
            values = np.asarray(result.values, dtype=np.float64)
            if result.per_tile:
                rows.extend(
                    (run_id, cell.task, cell.model, cell.seed, cell.explainer, key, result.truth, int(t), float(v))
                    for t, v in zip(tiles[:size], values, strict=True)
                )
            else:
                rows.append(
                    (
                        run_id,
                        cell.task,
                        cell.model,
                        cell.seed,
                        cell.explainer,
                        key,
                        result.truth,
                        -1,
                        float(values.reshape(-1)[0]),
                    )
                )
            if result.reasons:
                notes[tag] = "; ".join(sorted({str(r) for r in result.reasons.values()}))
                reasons.append(ident + (notes[tag],))
            for what in ("warning", "calibrated"):  # texts the report and the manifest read
                if result.settings.get(what):
                    notes[f"{tag} {what}"] = str(result.settings[what])
            curves.extend(curve_rows(cell, key, result))
        metric_seconds[key] = time.perf_counter() - t0
    records = pd.DataFrame(rows, columns=RECORD_COLUMNS)
    concepts = concept_rows(cell, explanation.concepts)
    gallery = gallery_positions(prep.targets, int(prep.task.run["gallery_tiles"]))
    cell_result: dict[str, Any] = {
        "status": "ok",
        "explanation": kept,  # back to the client's prepared model (not stored): for the task's variants
        "records": records,
        "curves": pd.DataFrame(curves, columns=CURVE_COLUMNS),
        "concepts": pd.DataFrame(concepts, columns=CONCEPT_COLUMNS),
        "reasons": pd.DataFrame(reasons, columns=REASON_COLUMNS),
        "gallery": {"map": explanation.attributions[gallery].astype(np.float32)},
        "meta": {
            "cell": cell.to_dict(),
            "error": None,
            "notes": notes,
            "seconds": time.perf_counter() - started,
            "explain_seconds": t_explained - started,
            "metric_seconds": metric_seconds,
            # share of explained tiles whose map is all zero (a saturated model or too coarse settings)
            "zero_map_share": float(np.mean(~np.any(explanation.attributions != 0, axis=(1, 2))))
            if len(explanation.attributions)
            else 0.0,
            "cost": {
                "forward_calls": int(explanation.cost.forward_calls),
                "backward_calls": int(explanation.cost.backward_calls),
                "seconds": float(explanation.cost.seconds),
                "model_seconds": round(float(explanation.cost.model_seconds), 4),
                "tiles": int(len(tiles)),
                "cpu_seconds": round(time.thread_time() - cpu_started, 4),
                # what the metrics cost on top (explainer re-runs included): {metric: [forward, backward]}
                "metric_calls": metric_calls,
                "metric_seconds": {k: round(v, 4) for k, v in metric_seconds.items()},
                "metric_model_seconds": metric_model_seconds,
                # of those, the explainer re-runs (randomization, max-sensitivity): the compared method's own
                # code, not the benchmark's; {metric: [seconds, model seconds]}
                "metric_rerun_seconds": metric_rerun_seconds,
            },
        },
    }
    report = explanation.concepts
    if report is not None and getattr(report, "cluster_maps", None) is not None:
        cell_result["clusters"] = {
            "cluster_maps": np.asarray(report.cluster_maps)[gallery].astype(np.int64),
            "score_changes": np.asarray(report.score_changes, dtype=np.float64),
        }
    return cell_result


def explanation_key(cell: Cell) -> tuple[str, str]:
    """What an explanation of a prepared model depends on besides the model and its tiles: the explainer and
    its settings (the seed is the prepared model's)."""
    return cell.explainer, json.dumps(cell.explainer_settings, sort_keys=True, default=str)


def keep_explanation(prep: Prepared, cell: Cell, result: dict[str, Any]) -> None:
    """Keep a cell's explanation (computed here or by a worker) in the prepared model for later runs of the
    task's variants in this process (and their workers, which get the prepared models)."""
    kept = result.pop("explanation", None)
    if kept is not None:
        prep.explanations.setdefault(explanation_key(cell), kept)


@dataclass
class RerunClock:
    """Seconds spent in a cell's explainer re-runs, and the model's own seconds within them."""

    seconds: float = 0.0
    model_seconds: float = 0.0


def make_rerun_explainer(
    cell: Cell, context: ExplainContext, size: int, clock: RerunClock | None = None
) -> Callable[..., np.ndarray]:
    """The cell's explainer with its settings, for metrics that re-run it (on another model or on perturbed
    copies of the first `size` tiles). Per-tile context (twins, masks) goes along when the row count matches
    those tiles; otherwise it is left out. ``clock`` adds up the re-runs' seconds (the bench scripts tell the
    compared method's own time from the benchmark's)."""
    from dataclasses import replace

    from xbench.explainers import explain
    from xbench.models.base import counting_all

    def rows(array: np.ndarray | None, tiles: np.ndarray) -> np.ndarray | None:
        return None if array is None else array[tiles]

    def rerun_explainer(
        model: ModelHandle, images: np.ndarray, targets: np.ndarray, tiles: np.ndarray | None = None
    ) -> np.ndarray:
        # `tiles`: for each row of `images`, the index of the explained tile it is a copy of.
        if tiles is None and images.shape[0] == size:
            tiles = np.arange(size)
        # Re-runs record no self-checks: those of the cell are the explained tiles' own.
        if tiles is None:
            ctx = replace(context, twins=None, masks=None, self_checks=None)
        else:
            tiles = np.asarray(tiles, dtype=np.int64)
            ctx = replace(context, twins=rows(context.twins, tiles), masks=rows(context.masks, tiles), self_checks=None)
        started = time.perf_counter()
        with counting_all() as calls:
            attributions = explain(cell.explainer, model, images, targets, context=ctx, **cell.explainer_settings)
        if clock is not None:
            clock.seconds += time.perf_counter() - started
            clock.model_seconds += calls.seconds
        return attributions.attributions

    return rerun_explainer


def subset_inputs(full: MetricInputs, size: int, rerun_explainer: Callable[..., np.ndarray]) -> MetricInputs:
    """The metric inputs of the first `size` tiles."""
    from dataclasses import fields

    values = {}
    for f in fields(full):
        if not f.init:
            continue
        value = getattr(full, f.name)
        if isinstance(value, np.ndarray) and value.ndim >= 1 and value.shape[0] == full.n_tiles:
            value = value[:size]
        values[f.name] = value
    values["rerun_explainer"] = rerun_explainer
    return type(full)(**values)


def curve_rows(cell: Cell, key: str, result: MetricResult) -> list[dict[str, Any]]:
    """Mean curves (with sd and n) for the figures: removal curves with x = fraction removed, the
    randomization cascade with x = layer step."""
    out: list[dict[str, Any]] = []
    curves = getattr(result, "curves", None) or {}
    labels = getattr(result, "curve_labels", None) or {}
    baseline = str((getattr(result, "settings", None) or {}).get("baseline", ""))
    for name, arr in curves.items():
        arr = np.asarray(arr, dtype=np.float64)
        if arr.ndim == 1:
            arr = arr[None, :]
        n = np.sum(np.isfinite(arr), axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.nanmean(arr, axis=0) if arr.size else arr
            sd = np.nanstd(arr, axis=0, ddof=1) if arr.shape[0] > 1 else np.zeros(arr.shape[1])
        steps = arr.shape[1]
        names = list(labels.get(name, [])) if isinstance(labels, dict) else list(labels)
        for step in range(steps):
            label = names[step] if step < len(names) else ""
            # Removal curves (deletion, insertion, deletion-lerf, ...) run over the fraction of pixels removed;
            # labelled curves (the randomization cascade's layers) keep their step number.
            x = float(step) if names else step / max(steps - 1, 1)
            out.append(
                {
                    "task": cell.task,
                    "model": cell.model,
                    "seed": cell.seed,
                    "explainer": cell.explainer,
                    "curve": name,
                    "baseline": baseline,
                    "step": step,
                    "x": float(x),
                    "label": label,
                    "mean": float(mean[step]),
                    "sd": float(sd[step]),
                    "n": int(n[step]),
                }
            )
    return out


def concept_rows(cell: Cell, report: Any) -> list[dict[str, Any]]:
    if report is None:
        return []
    out = []
    for row in report.rows:
        out.append(
            {"task": cell.task, "model": cell.model, "seed": cell.seed, "explainer": cell.explainer}
            | {k: row.get(k) for k in CONCEPT_COLUMNS[4:]}
        )
    return out
