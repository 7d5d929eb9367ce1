"""Grid expansion: a task file becomes cells (model x seed x explainer), each keyed on its content.

A cell's key covers everything its values depend on and nothing else: the task's parsed data section (with
the recipe's content or the tile pack's checksum), the model's configuration and, for user models, the
weights file's and the factory module's checksums, the seed, the explainer and its settings, every metric
and its settings, the run settings that change values, and the xbench version. So a change recomputes
exactly the cells it affects; a comment in the task file recomputes nothing.
"""

from __future__ import annotations

import functools
import hashlib
import importlib.metadata
import importlib.util
import json
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from xbench import __version__
from xbench.data import file_sha256
from xbench.errors import XbenchInputError
from xbench.schema import Where

if TYPE_CHECKING:
    from xbench.tasks import ModelSpec, Task

# Run settings that do not change any value (only whether a cell finishes in time): left out of cell keys.
NON_VALUE_RUN_SETTINGS = ("cell_timeout",)
# Names that become parts of file names (task names in artifact files): no path separators, no "..".
SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$")


def content_hash(payload: Any, length: int = 16) -> str:
    """A short, stable hash of JSON-serialisable data (keys sorted)."""
    text = json.dumps(payload, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:length]


@dataclass(frozen=True)
class Cell:
    """One unit of work: explain the chosen test tiles with one explainer and score every metric."""

    cell_id: str
    task: str
    model: str
    seed: int
    explainer: str
    explainer_settings: dict = field(default_factory=dict, hash=False, compare=False)

    def describe(self) -> str:
        return f"{self.task}/{self.model}/seed {self.seed}/{self.explainer}"

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


@dataclass
class Grid:
    cells: list[Cell]
    skipped: list[dict[str, str]]  # (model, explainer, reason) that cannot run, e.g. gradients on a black box
    metrics: list[str] = field(default_factory=list)  # metric keys scored in every cell


# Packages whose version can change a value (numerics, models, attribution methods): part of every cell key.
VALUE_PACKAGES = ("numpy", "scipy", "scikit-learn", "scikit-image", "pandas", "torch", "captum")


@functools.lru_cache(maxsize=1)
def package_versions() -> dict[str, str]:
    """Installed versions of the packages that can change values (``not installed`` when absent)."""
    out = {}
    for name in VALUE_PACKAGES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def check_safe_name(name: str, where: str) -> str:
    """A name used in file names: letters, digits, '.', '_' and '-', not starting with a dot (no '../')."""
    if not isinstance(name, str) or not SAFE_NAME.match(name) or ".." in name:
        raise XbenchInputError(
            where,
            "unsafe name for file names",
            expected="letters, digits, '.', '_' or '-' (at most 100, no '..', not starting with '.' or '-')",
            found=name,
        )
    return name


def validate_task_keys(task: Task) -> None:
    """Explainer and metric keys of a task must exist in the registries, their settings must be known and
    of the right kind, and there must be something to measure (checked before any work)."""
    from xbench.explainers import get_explainer
    from xbench.metrics import get_metric

    # One error format (xbench.schema): the task file, the line and the key of a bad setting.
    text = Where.of_file(task.path).text if Path(task.path).is_file() else None
    top = Where(str(task.path), "", text)
    check_safe_name(task.name, str(top.child("name")))
    if not task.explainers:
        raise top.child("explainers").child("keys").error("no explainers: nothing would be measured")
    if not task.metrics:
        raise (
            top.child("metrics")
            .child("keys")
            .error(
                "no metrics: nothing would be measured",
                expected="a [metrics] table with keys = [...] (`xbench metrics` lists them)",
            )
        )
    for i, key in enumerate(task.explainers):
        try:
            spec = get_explainer(key)
        except XbenchInputError as exc:
            raise top.child("explainers").child("keys").child(i).error(exc.problem, exc.expected, key) from None
        where = top.child("explainers").child("settings").child(key)
        spec.check_settings(task.explainer_settings.get(key, {}), where)
    for i, key in enumerate(task.metrics):
        try:
            metric_spec = get_metric(key)
        except XbenchInputError as exc:
            raise top.child("metrics").child("keys").child(i).error(exc.problem, exc.expected, key) from None
        where = top.child("metrics").child("settings").child(key)
        settings = task.metric_settings.get(key, {})
        metric_spec.check_settings(settings, where)
        tiles = settings.get("tiles", 1)
        if isinstance(tiles, bool) or not isinstance(tiles, int) or tiles < 1:  # `tiles`: see runs.execute
            raise where.child("tiles").error("bad value", expected="a positive integer", found=tiles)
    # a variant's own settings, checked where they stand in the file (its [[variants]] table)
    for i, variant in enumerate(getattr(task, "variants", None) or []):
        w = top.child("variants").child(i)
        for key, settings in variant.explainer_settings.items():
            get_explainer(key).check_settings(settings, w.child("explainer_settings").child(key))
        for key, settings in variant.metric_settings.items():
            get_metric(key).check_settings(settings, w.child("metric_settings").child(key))


def _source_sha256(factory: str) -> str | None:
    """sha256 of the file that defines a user factory's module (found without importing it when possible)."""
    module = factory.split(":", 1)[0]
    try:
        spec = importlib.util.find_spec(module)
    except (ImportError, ValueError):
        return None
    origin = getattr(spec, "origin", None) if spec is not None else None
    return file_sha256(origin) if origin and Path(origin).is_file() else None


def model_fingerprint(spec: ModelSpec) -> dict[str, Any]:
    """What a model's values depend on: its configuration and, for user models, the checksums of the
    weights file and of the factory's source file (a retrained model or edited code recomputes)."""
    out: dict[str, Any] = {"name": spec.name, "kind": spec.kind, "params": spec.params}
    weights = spec.params.get("weights")
    if weights and Path(weights).is_file():
        out["weights_sha256"] = file_sha256(weights)
    factory = spec.params.get("factory")
    if factory:
        out["factory_source_sha256"] = _source_sha256(str(factory))
    return out


def data_fingerprint(task: Task) -> dict[str, Any]:
    """What every cell of a task depends on besides its model, seed and explainer."""
    return {
        "task": task.name,
        "data": task.data.raw,  # includes the recipe's content hash or the tile pack's checksum
        "class_names": list(task.class_names),
        "driving_types": {str(k): v for k, v in sorted(task.class_driving_types.items())},
        "lookalikes": list(task.lookalike_types),
        "run": {k: v for k, v in task.run.items() if k not in NON_VALUE_RUN_SETTINGS},
    }


def expand_grid(
    task: Task,
    *,
    explainers: list[str] | None = None,
    models: list[str] | None = None,
    seeds: list[int] | None = None,
    metrics: list[str] | None = None,
) -> Grid:
    """Cells of a task, in a fixed order (model, seed, explainer). Filters narrow the task's own lists."""
    from xbench.explainers import get_explainer

    validate_task_keys(task)
    keys = list(task.explainers) if explainers is None else list(explainers)
    unknown = [k for k in keys if k not in task.explainers]
    for k in unknown:
        get_explainer(k)  # raises for keys that do not exist anywhere
    model_specs = [m for m in task.models if models is None or m.name in models]
    if models is not None and len(model_specs) != len(set(models)):
        names = [m.name for m in task.models]
        raise XbenchInputError(
            f"{task.path}: [[models]]",
            "model not in the task",
            expected=", ".join(names),
            found=sorted(set(models) - set(names)),
        )
    run_seeds = list(task.seeds) if seeds is None else list(seeds)
    metric_keys = list(task.metrics) if metrics is None else list(metrics)
    missing = [k for k in metric_keys if k not in task.metrics]
    if missing:
        raise XbenchInputError(
            f"{task.path}: [metrics] keys", "metric not in the task", expected=", ".join(task.metrics), found=missing
        )
    base = {
        "xbench": __version__,
        "packages": package_versions(),
        "task": data_fingerprint(task),
        "metrics": {k: task.metric_settings.get(k, {}) for k in metric_keys},
    }
    fingerprints = {spec.name: model_fingerprint(spec) for spec in model_specs}
    cells: list[Cell] = []
    skipped: list[dict[str, str]] = []
    for spec in model_specs:
        black_box = spec.kind in ("forest", "user-callable")
        for seed in run_seeds:
            for key in keys:
                needs = set(get_explainer(key).needs)
                reason = None
                if black_box and needs & {"gradients", "layer"}:
                    reason = "needs gradients or a layer; the model is a black box"
                elif task.data.pack and "concept-sets" in needs:
                    reason = "needs concept example sets from the synthesizer; the task uses a tile pack"
                if reason:
                    if seed == run_seeds[0]:
                        skipped.append({"model": spec.name, "explainer": key, "reason": reason})
                    continue
                settings = dict(task.explainer_settings.get(key, {}))
                payload = base | {
                    "model": fingerprints[spec.name],
                    "seed": seed,
                    "explainer": key,
                    "settings": settings,
                }
                cells.append(Cell(content_hash(payload), task.name, spec.name, int(seed), key, settings))
    return Grid(cells, skipped, metric_keys)
