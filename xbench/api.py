"""The Python front door: the pipeline's verbs as typed functions (``import xbench``).

``xbench.synthesize``, ``xbench.train``, ``xbench.run``, ``xbench.report``, ``xbench.check``,
``xbench.explain`` and ``xbench.score`` do what the command's verbs do, without printing; the CLI is a thin
layer over them. A task can be given as a task file's path, a shipped task's name, a dict with the file's
content, or a :class:`xbench.tasks.Task`; it is parsed once. Like the CLI, this module is an edge: it may
import every stage.

Example (a whole run, as in the README)::

    import xbench
    summary = xbench.run("demo", "runs/demo")
    report = xbench.report(["runs/demo"], "runs/demo-report")
"""

from __future__ import annotations

import types
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # heavy imports stay lazy: `import xbench` must not load torch
    import pandas as pd

    from xbench.data import TilePack
    from xbench.explainers.base import ExplainContext, Explanation
    from xbench.metrics.base import MetricInputs, MetricResult
    from xbench.models.base import ModelHandle
    from xbench.runs.runner import RunSummary
    from xbench.scenes import Recipe, Scene
    from xbench.tasks import Task

TaskLike = "str | Path | dict[str, Any] | Task"


def load(task: str | Path | dict[str, Any] | Task) -> Task:
    """The task, parsed and validated once (path, shipped name, dict or Task)."""
    from xbench.tasks import load_task

    return load_task(task)


def synthesize(
    recipe: str | Path | Recipe,
    count: int,
    seed: int,
    *,
    size: int = 64,
    twins: bool = False,
    presence: dict[str, float] | None = None,
    label_rule: Any = None,
    label_noise: float = 0.0,
    preview: str | Path | None = None,
) -> tuple[TilePack, list[Scene]]:
    """Synthesize ``count`` tiles of a landscape recipe (see :func:`xbench.scenes.synthesize`); with
    ``preview`` a PNG contact sheet of the tiles and their masks is written there too."""
    from xbench.scenes import synthesize as _synthesize

    pack, scenes = _synthesize(
        recipe,
        count,
        seed,
        size=size,
        twins=twins,
        presence=presence,
        label_rule=label_rule,
        label_noise=label_noise,
    )
    if preview is not None:
        from xbench.scenes.preview import write_preview

        write_preview(pack, preview)
    return pack, scenes


@dataclass
class TrainingResult:
    """What :func:`train` measured: one accuracy row per (model, seed), and per model and seed the
    reliance table (mean drop of the target-class probability when a type is removed, with intervals)."""

    accuracy: pd.DataFrame
    reliance: dict[tuple[str, int], pd.DataFrame] = field(default_factory=dict)
    relied_on: dict[tuple[str, int], list[str]] = field(default_factory=dict)
    models: dict[tuple[str, int], ModelHandle] = field(default_factory=dict)
    reliance_tiles: int = 0
    note: str = ""  # why the reliance table is left out (a task on a user's tile pack), else empty


def reliance_role(task: Task, kind: str) -> str:
    """What a structure type is to a task: label-driving, look-alike, human but not driving, or the cue."""
    from xbench.names import LOOKALIKE_TYPES

    if kind == "cue":
        return "spurious cue"
    if any(kind in types for types in task.class_driving_types.values()):
        return "label-driving"
    if kind in task.lookalike_types or kind in LOOKALIKE_TYPES:
        return "look-alike"
    return "human, not driving"


def train(
    task: str | Path | dict[str, Any] | Task,
    *,
    models: Sequence[str] | None = None,
    seeds: Sequence[int] | None = None,
    use_cache: bool = True,
    reliance: bool = True,
    reliance_tiles: int | None = None,
    on_model: Callable[[dict[str, Any]], None] | None = None,
    on_reliance: Callable[[str, int, pd.DataFrame, list[str]], None] | None = None,
) -> TrainingResult:
    """Train (or load from the cache) the task's models for each seed, with accuracy and reliance.

    ``on_model`` is called with each accuracy row as soon as a model is ready, ``on_reliance`` with
    (model, seed, reliance table, relied-on types) (the CLI prints them). Reliance needs the task's
    synthetic scenes (counterfactual twins); for a task on a user's tile pack it is left out and
    ``result.note`` says so.
    """
    import pandas as pd

    from xbench.errors import XbenchInputError
    from xbench.models.train import train_model
    from xbench.tasks import build_task_data
    from xbench.truth import compute_reliance

    task_obj = load(task)
    specs = [task_obj.model_spec(m) for m in models] if models else list(task_obj.models)
    seed_list = list(seeds) if seeds is not None else list(task_obj.seeds)
    for s in seed_list:
        if s < 0:
            raise XbenchInputError("seeds", "seeds are non-negative integers", found=s)
    data = build_task_data(task_obj)
    result = TrainingResult(accuracy=pd.DataFrame())
    if reliance and not data.test_scenes:
        reliance = False
        result.note = (
            f"task {task_obj.name} uses a tile pack ({task_obj.data.pack}): models are trained or loaded and "
            "their accuracy reported; the reliance table needs synthetic scenes and is left out"
        )
    n_rel = 0
    if reliance:
        n_rel = len(data.test_scenes) if reliance_tiles is None else min(reliance_tiles, len(data.test_scenes))
    result.reliance_tiles = n_rel
    test = data.test
    targets = (test.clean_labels if test.clean_labels is not None else test.labels)[:n_rel]
    # the cue is switched on in tiles of the classes with driving types (the non-default classes)
    cue_classes = [c for c, types in task_obj.class_driving_types.items() if types]
    rows = []
    for spec in specs:
        for seed in seed_list:
            tm = train_model(task_obj, data, spec, seed, use_cache=use_cache, batch_size=task_obj.run["batch_size"] * 2)
            acc = tm.accuracy
            row = {
                "model": spec.name,
                "kind": spec.kind,
                "seed": seed,
                "train_acc": acc["train_accuracy"],
                "val_acc": acc["val_accuracy"],
                "test_acc": acc["test_accuracy"],
                "train_bacc": acc["train_balanced_accuracy"],
                "val_bacc": acc["val_balanced_accuracy"],
                "test_bacc": acc["test_balanced_accuracy"],
                "seconds": round(tm.seconds, 1),
                "status": "cached" if tm.cached else "trained",
            }
            rows.append(row)
            result.models[(spec.name, seed)] = tm.handle
            if on_model is not None:
                on_model(row)
            if not n_rel:
                continue
            rel = compute_reliance(
                tm.handle,
                data.test_scenes[:n_rel],
                targets,
                seed=seed,
                batch_size=task_obj.run["batch_size"] * 2,
                cue_classes=cue_classes,
            )
            table = rel.type_table.copy()
            table["role"] = [reliance_role(task_obj, k) for k in table["kind"]]
            result.reliance[(spec.name, seed)] = table
            result.relied_on[(spec.name, seed)] = list(rel.relied_types())
            if on_reliance is not None:
                on_reliance(spec.name, seed, table, result.relied_on[(spec.name, seed)])
    result.accuracy = pd.DataFrame(rows)
    return result


def run(task: str | Path | dict[str, Any] | Task, out_dir: str | Path, **options: Any) -> RunSummary:
    """Run a task's grid into ``out_dir`` (see :func:`xbench.runs.run_task` for the options: ``jobs``,
    ``executor``, ``explainers``, ``models``, ``seeds``, ``metrics``...). Finished cells are reused."""
    from xbench.runs import run_task

    return run_task(load(task), out_dir, **options)


def report(run_dirs: str | Path | Sequence[str | Path], out_dir: str | Path, **options: Any) -> Any:
    """Statistics, tables, figures, methods text and BibTeX from run folders (see
    :func:`xbench.report.write_report` for the options)."""
    from xbench.report import write_report

    dirs = [run_dirs] if isinstance(run_dirs, str | Path) else list(run_dirs)
    return write_report(dirs, out_dir, **options)


def check(current: str | Path, baseline: str | Path, gates: str | Path | dict[str, Any] | None = None) -> Any:
    """Compare a run folder against a baseline run folder under faithfulness gates; the result says which
    gates pass and fail (``result.ok``)."""
    import importlib

    gates_module: Any = importlib.import_module("xbench.check")
    return gates_module.compare(current, baseline, gates_module.load_gates(gates))


def explain(
    key: str,
    model: ModelHandle,
    images: np.ndarray,
    targets: np.ndarray,
    context: ExplainContext | None = None,
    **settings: Any,
) -> Explanation:
    """One explainer on a batch of tiles (see :func:`xbench.explainers.explain`)."""
    from xbench.explainers import explain as _explain

    return _explain(key, model, images, targets, context, **settings)


def score(key: str, inputs: MetricInputs, **settings: Any) -> list[MetricResult]:
    """One metric on explained tiles (see :func:`xbench.metrics.compute_metric`)."""
    from xbench.metrics import compute_metric

    return compute_metric(key, inputs, **settings)


def make_module_callable(module_name: str, verb: str) -> None:
    """Let ``xbench.<module_name>(...)`` call the verb of the same name.

    ``xbench.report`` and ``xbench.check`` are both a verb of the front door and a subpackage; once the
    subpackage is imported, Python sets the package attribute to the module, so the module itself must be
    callable for ``xbench.report(...)`` to keep working."""
    import sys

    module = sys.modules[module_name]
    if isinstance(module, _VerbModule):
        return

    module.__class__ = _VerbModule
    module.__dict__["_xbench_verb"] = verb


class _VerbModule(types.ModuleType):
    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        return globals()[self.__dict__["_xbench_verb"]](*args, **kwargs)
