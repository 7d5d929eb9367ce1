"""Benchmark task files (TOML, data only) -> :class:`Task`, and the task's tile packs and scenes.

A task file names a landscape recipe and how to sample tiles from it (size, counts per split, seed, how
often each structure type appears, the label rule, label noise, an optional spurious cue), the models to
train with their hyper-parameters and seeds, and the explainers, metrics and run settings that later
stages honour. Every key is checked: unknown keys, wrong types and bad values raise
:class:`~xbench.errors.XbenchInputError` naming the file and the key.

Spurious cue (``[data.cue]``, the synthesizer's cue table, e.g. ``kind = "band-offset"``, ``band``,
``strength``): in each split the cue is switched on in tiles of the non-default classes with probability
``cue_rate_<split>`` and in default-class tiles with probability ``1 - cue_rate_<split>``. A rate of
0.95 makes the cue a strong shortcut; 0.5 makes it independent of the label (the usual test setting).

Splits are synthesised with seeds derived from ``[data] seed`` and the split's name; label noise applies
to the train split only; only the test split carries twins, and its scenes are kept for the truth module.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.data import TilePack, load_pack, save_pack
from xbench.errors import XbenchInputError, load_toml, repo_root
from xbench.names import HUMAN_TYPES, LOOKALIKE_TYPES, RENAMED, renamed_hint
from xbench.schema import Where

MODEL_KINDS = ("cnn", "resnet", "separable", "forest", "user-torch", "user-callable")
# Bring your own model: `factory` is an import path `package.module:function`. For `user-torch` it returns a
# torch module (raw reflectance in, logits out) and `weights` (a state_dict file, relative to the task file)
# is loaded with torch.load(weights_only=True); for `user-callable` it returns f(images) -> class scores.
USER_KINDS = ("user-torch", "user-callable")

TOP_KEYS = {"name", "description", "seeds", "data", "models", "explainers", "metrics", "run", "variants"}
DATA_KEYS = {
    "recipe",
    "size",
    "train",
    "val",
    "test",
    "seed",
    "presence",
    "labels",
    "label_noise",
    "lookalikes",
    "cue",
    "cue_rate_train",
    "cue_rate_val",
    "cue_rate_test",
}
RUN_DEFAULTS: dict[str, int] = {
    "explain_tiles": 64,  # test tiles explained and scored per (model, seed)
    "gallery_tiles": 8,  # tiles kept with every explainer's map for figures
    "batch_size": 64,  # images per model call in explainers and metrics
    "concept_set_size": 40,  # example tiles per concept set (tcav)
    "fit_tiles": 200,  # training tiles used to fit concept explainers (activation-clusters)
    "random_sets": 10,  # random example sets for concept significance tests (tcav)
    "cell_timeout": 1800,  # seconds one cell (explain + score) may take before it is stopped and recorded failed
}
MAX_SPLIT_TILES = 100_000  # tiles per split: a stated maximum instead of running out of memory
# Hyper-parameters per model kind: architecture (see models/zoo.py) and training (see models/train.py).
TORCH_TRAIN_PARAMS: dict[str, tuple[type, ...]] = {
    "epochs": (int,),
    "patience": (int,),
    "lr": (int, float),
    "weight_decay": (int, float),
    "batch_size": (int,),
    "augment": (bool,),
}
MODEL_PARAMS: dict[str, dict[str, tuple[type, ...]]] = {
    "cnn": {"width": (int,), "dropout": (int, float), **TORCH_TRAIN_PARAMS},
    "resnet": {"width": (int,), "dropout": (int, float), **TORCH_TRAIN_PARAMS},
    "separable": {"width": (int,), "dropout": (int, float), **TORCH_TRAIN_PARAMS},
    "forest": {"n_trees": (int,), "max_depth": (int,), "min_samples_leaf": (int,), "max_features": (int, float, str)},
    "user-torch": {"factory": (str,), "weights": (str,)},
    "user-callable": {"factory": (str,), "output": (str,)},
}
SPLITS = ("train", "val", "test")


@dataclass(frozen=True)
class ModelSpec:
    """One ``[[models]]`` entry: a unique name, a zoo kind and its hyper-parameters."""

    name: str
    kind: str
    params: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"name": self.name, "kind": self.kind, "params": dict(sorted(self.params.items()))}


@dataclass(frozen=True)
class DataSpec:
    """The validated ``[data]`` section. ``raw`` is the section itself (hashed for caches)."""

    recipe: str
    size: int
    counts: dict[str, int]
    seed: int
    presence: dict[str, float] | None
    labels: dict[str, Any]
    label_noise: float
    cue: dict[str, Any] | None
    cue_rates: dict[str, float]
    lookalikes: list[str] | None
    raw: dict[str, Any]
    pack: str | None = None  # a user's tile pack (`[data] pack = ...`) instead of a recipe
    pack_classes: list[str] | None = None
    pack_drives: dict[int, list[str]] | None = None
    possible_types: list[str] = field(default_factory=list)  # types that may appear in the tiles
    backgrounds: dict[str, Any] | None = None  # real background rasters (transplant mode), see _load_raster_data

    @property
    def hash(self) -> str:
        """sha256 of the canonical JSON of the data section (keys sorted)."""
        return hashlib.sha256(json.dumps(self.raw, sort_keys=True, default=str).encode()).hexdigest()


@dataclass
class Task:
    name: str
    path: Path
    file_hash: str
    description: str
    data: DataSpec
    models: list[ModelSpec]
    seeds: list[int]
    explainers: list[str]
    explainer_settings: dict[str, dict[str, Any]]
    metrics: list[str]
    metric_settings: dict[str, dict[str, Any]]
    run: dict[str, Any]
    class_names: list[str]
    class_driving_types: dict[int, list[str]]
    lookalike_types: list[str]
    label_rule: Any = None
    variants: list[Variant] = field(default_factory=list)  # protocol variants ([[variants]])
    variant: str | None = None  # the variant this task object runs (apply_variant), None for the task itself

    def model_spec(self, name: str) -> ModelSpec:
        for spec in self.models:
            if spec.name == name:
                return spec
        raise XbenchInputError(
            f"task '{self.name}'",
            f"no model named '{name}'",
            expected="one of " + ", ".join(m.name for m in self.models),
            found=name,
        )


@dataclass
class TaskData:
    """The task's tiles: train/val/test packs (test with twins) and the test scenes (for truth)."""

    train: TilePack
    val: TilePack
    test: TilePack
    test_scenes: list[Any]

    def split(self, name: str) -> TilePack:
        return {"train": self.train, "val": self.val, "test": self.test}[name]


# ---------------------------------------------------------------------------------------------------
# validation helpers


def _type_name(value: Any) -> str:
    return type(value).__name__


def _expect(value: Any, types: tuple[type, ...], where: str, what: str) -> Any:
    # bool is an int subclass in Python; accept it only where bool is asked for.
    ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
    if not ok:
        raise XbenchInputError(where, "wrong type", expected=what, found=f"{_type_name(value)} {value!r}")
    return value


def _unknown(table: dict[str, Any], allowed: set[str], where: str) -> None:
    extra = sorted(set(table) - allowed)
    if extra:
        at = f"{where} {extra[0]}" if where.endswith(":") else f"{where}.{extra[0]}"
        raise XbenchInputError(at, "unknown key", expected="one of " + ", ".join(sorted(allowed)), found=extra[0])


def _int_in(value: Any, where: str, lo: int, hi: int | None = None) -> int:
    _expect(value, (int,), where, "an integer")
    if value < lo or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"in [{lo}, {hi}]"
        raise XbenchInputError(where, "value out of range", expected=rng, found=value)
    return int(value)


def _float_in(value: Any, where: str, lo: float, hi: float) -> float:
    _expect(value, (int, float), where, "a number")
    if not (lo <= float(value) <= hi):
        raise XbenchInputError(where, "value out of range", expected=f"in [{lo}, {hi}]", found=value)
    return float(value)


def _str_list(value: Any, where: str, *, allow_empty: bool = False) -> list[str]:
    _expect(value, (list,), where, "a list of strings")
    for i, item in enumerate(value):
        _expect(item, (str,), f"{where}[{i}]", "a string")
    if not value and not allow_empty:
        raise XbenchInputError(where, "empty list", expected="at least one entry", found=[])
    dup = sorted({v for v in value if value.count(v) > 1})
    if dup:
        raise XbenchInputError(where, "duplicate entry", found=dup[0])
    return list(value)


def _settings(section: dict[str, Any], keys: list[str], where: str) -> dict[str, dict[str, Any]]:
    raw = section.get("settings", {})
    _expect(raw, (dict,), f"{where}.settings", "a table of tables")
    out: dict[str, dict[str, Any]] = {}
    for key, table in raw.items():
        if key not in keys:
            raise XbenchInputError(
                f"{where}.settings.{key}",
                "settings for a key that is not listed",
                expected=f"one of {where}.keys: " + ", ".join(keys),
                found=key,
            )
        _expect(table, (dict,), f"{where}.settings.{key}", "a table")
        out[key] = dict(table)
    return out


# ---------------------------------------------------------------------------------------------------
# loading


def tasks_dir() -> Path:
    return repo_root() / "tasks"


def list_tasks() -> list[str]:
    """Names of the shipped task files (``tasks/*.toml``)."""
    return sorted(p.stem for p in tasks_dir().glob("*.toml"))


def resolve_task_path(path_or_name: str | Path) -> Path:
    text = str(path_or_name)
    path = Path(text)
    if path.suffix == ".toml" or path.is_file() or os.sep in text:
        return path
    shipped = tasks_dir() / f"{text}.toml"
    if not shipped.is_file():
        hint = renamed_hint("task", text)
        if hint:
            raise XbenchInputError(
                f"task '{text}'", f"unknown task: {hint}", expected=RENAMED["task"][text], found=text
            )
        raise XbenchInputError(
            f"task '{text}'",
            "unknown task",
            expected="a task file path or one of: " + ", ".join(list_tasks()),
            found=text,
        )
    return shipped


def load_task(task: str | Path | dict[str, Any] | Task) -> Task:
    """Read and validate a task: a task file's path, a shipped task's name, the file's content as a dict
    (e.g. built in Python; relative paths in it are taken from the working folder), or a Task as it is.
    Errors use the one format of :mod:`xbench.schema` (file, line, key, expected, found)."""
    if isinstance(task, Task):
        return task
    if isinstance(task, dict):
        path = Path.cwd() / "task-from-python.toml"
        doc, text = task, None
    else:
        path = resolve_task_path(task)
        doc = load_toml(path)
        text = Where.of_file(path).text
    try:
        return _parse_task(path, doc)
    except XbenchInputError as exc:
        raise _in_one_format(exc, str(path), text) from None


def _in_one_format(exc: XbenchInputError, source: str, text: str | None) -> XbenchInputError:
    """Restate an error raised as ``"FILE: key.path"`` in the schema's format (adds the line)."""
    where = exc.where
    if not where.startswith(source):
        return exc
    rest = where[len(source) :].lstrip(":").strip()
    if rest.startswith("line "):
        return exc  # already in the one format
    rest = rest.replace(", key ", ".")
    return Where(source, rest, text).error(exc.problem, exc.expected, exc.found)


def _parse_task(path: Path, doc: dict[str, Any]) -> Task:
    # The content of the parsed task, not the file's bytes: a comment or a reordered table changes nothing.
    file_hash = hashlib.sha256(json.dumps(doc, sort_keys=True, default=str).encode()).hexdigest()
    f = str(path)
    _unknown(doc, TOP_KEYS, f"{f}:")
    for key in ("name", "data", "models"):
        if key not in doc:
            raise XbenchInputError(f"{f}: {key}", "missing required key")
    name = _expect(doc["name"], (str,), f"{f}: name", "a string")
    description = _expect(doc.get("description", ""), (str,), f"{f}: description", "a string")
    seeds_raw = doc.get("seeds", [0])
    _expect(seeds_raw, (list,), f"{f}: seeds", "a list of integers")
    if not seeds_raw:
        raise XbenchInputError(f"{f}: seeds", "empty list", expected="at least one seed", found=[])
    seeds = [_int_in(s, f"{f}: seeds[{i}]", 0) for i, s in enumerate(seeds_raw)]
    if len(set(seeds)) != len(seeds):
        raise XbenchInputError(f"{f}: seeds", "duplicate seed", found=seeds)

    if isinstance(doc["data"], dict) and "pack" in doc["data"]:
        data, rule = _load_pack_data(doc["data"], f), None
    elif isinstance(doc["data"], dict) and ("rasters" in doc["data"] or "backgrounds" in doc["data"]):
        data, rule = _load_raster_data(doc["data"], f)
    else:
        data, rule = _load_data(doc["data"], f)
    models = _load_models(doc["models"], f)

    explainers_sec = _expect(doc.get("explainers", {}), (dict,), f"{f}: explainers", "a table")
    _unknown(explainers_sec, {"keys", "settings"}, f"{f}: explainers")
    explainers = _str_list(explainers_sec.get("keys", []), f"{f}: explainers.keys", allow_empty=True)
    explainer_settings = _settings(explainers_sec, explainers, f"{f}: explainers")
    metrics_sec = _expect(doc.get("metrics", {}), (dict,), f"{f}: metrics", "a table")
    _unknown(metrics_sec, {"keys", "settings"}, f"{f}: metrics")
    metrics = _str_list(metrics_sec.get("keys", []), f"{f}: metrics.keys", allow_empty=True)
    metric_settings = _settings(metrics_sec, metrics, f"{f}: metrics")

    run_sec = _expect(doc.get("run", {}), (dict,), f"{f}: run", "a table")
    _unknown(run_sec, set(RUN_DEFAULTS), f"{f}: run")
    run = dict(RUN_DEFAULTS)
    for key, value in run_sec.items():
        run[key] = _int_in(value, f"{f}: run.{key}", 1)
    test_count = data.counts["test"]
    for key in ("explain_tiles", "gallery_tiles"):
        if run[key] > test_count:
            raise XbenchInputError(
                f"{f}: run.{key}",
                "more tiles than the test split holds",
                expected=f"<= data.test ({test_count})",
                found=run[key],
            )
    if run["gallery_tiles"] > run["explain_tiles"]:
        raise XbenchInputError(
            f"{f}: run.gallery_tiles",
            "gallery tiles must be among the explained tiles",
            expected=f"<= run.explain_tiles ({run['explain_tiles']})",
            found=run["gallery_tiles"],
        )

    if rule is None:
        class_names, driving = list(data.pack_classes or []), dict(data.pack_drives or {})
    else:
        class_names = [str(c) for c in rule.classes]
        driving = {i: list(rule.driving_types(i)) for i in range(len(class_names))}
    if data.lookalikes is not None:
        lookalikes = list(data.lookalikes)
    else:
        lookalikes = _default_lookalikes(data, driving)

    return Task(
        name=name,
        path=path,
        file_hash=file_hash,
        description=description,
        data=data,
        models=models,
        seeds=seeds,
        explainers=explainers,
        explainer_settings=explainer_settings,
        metrics=metrics,
        metric_settings=metric_settings,
        run=run,
        class_names=class_names,
        class_driving_types=driving,
        lookalike_types=lookalikes,
        label_rule=rule,
        variants=parse_variants(doc.get("variants", []), explainers, metrics, [m.name for m in models], f),
    )


# ---------------------------------------------------------------------------------------------------
# protocol variants


@dataclass(frozen=True)
class Variant:
    """A protocol variant: the same task run again with some explainer or metric settings overridden, on a
    subset of its models, explainers and metrics (all when not given). Each runs into ``OUT/variants/NAME/``."""

    name: str
    description: str
    explainer_settings: dict[str, dict[str, Any]]
    metric_settings: dict[str, dict[str, Any]]
    models: list[str] | None = None
    explainers: list[str] | None = None
    metrics: list[str] | None = None


VARIANT_KEYS = {"name", "description", "models", "explainers", "metrics", "explainer_settings", "metric_settings"}


def parse_variants(raw: Any, explainers: list[str], metrics: list[str], models: list[str], f: str) -> list[Variant]:
    """``[[variants]]`` tables: ``name`` (letters, digits, '-' and '_'), optional ``description``, optional
    subsets ``models`` / ``explainers`` / ``metrics`` of the task's lists, and ``[variants.explainer_settings.KEY]``
    / ``[variants.metric_settings.KEY]`` tables that override the task's settings for that variant."""
    _expect(raw, (list,), f"{f}: variants", "an array of tables ([[variants]])")
    out: list[Variant] = []
    for i, table in enumerate(raw):
        w = f"{f}: variants[{i}]"
        _expect(table, (dict,), w, "a table")
        _unknown(table, VARIANT_KEYS, w)
        if "name" not in table:
            raise XbenchInputError(f"{w}.name", "missing required key")
        name = _expect(table["name"], (str,), f"{w}.name", "a string")
        if not name or not all(c.isalnum() or c in "-_" for c in name):
            raise XbenchInputError(f"{w}.name", "bad variant name", expected="letters, digits, '-' or '_'", found=name)
        if name in {v.name for v in out}:
            raise XbenchInputError(f"{w}.name", "duplicate variant name", found=name)
        subsets: dict[str, list[str] | None] = {}
        for key, allowed in (("models", models), ("explainers", explainers), ("metrics", metrics)):
            if key not in table:
                subsets[key] = None
                continue
            chosen = _str_list(table[key], f"{w}.{key}")
            bad = [c for c in chosen if c not in allowed]
            if bad:
                raise XbenchInputError(f"{w}.{key}", "not in the task", expected=", ".join(allowed), found=bad[0])
            subsets[key] = chosen
        settings = {}
        for key, allowed in (("explainer_settings", explainers), ("metric_settings", metrics)):
            sec = _expect(table.get(key, {}), (dict,), f"{w}.{key}", "a table of tables")
            settings[key] = {}
            for k, t in sec.items():
                if k not in allowed:
                    raise XbenchInputError(f"{w}.{key}.{k}", "not in the task", expected=", ".join(allowed), found=k)
                settings[key][k] = dict(_expect(t, (dict,), f"{w}.{key}.{k}", "a table"))
        description = _expect(table.get("description", ""), (str,), f"{w}.description", "a string")
        out.append(Variant(name, description, settings["explainer_settings"], settings["metric_settings"], **subsets))
    return out


def apply_variant(task: Task, name: str) -> Task:
    """The task with a variant's settings merged over its own (the variant's subsets are the run's filters)."""
    from dataclasses import replace

    variant = next((v for v in task.variants if v.name == name), None)
    if variant is None:
        raise XbenchInputError(
            f"{task.path}: variants",
            "no variant of that name",
            expected=", ".join(v.name for v in task.variants),
            found=name,
        )

    def merge(base: dict[str, dict[str, Any]], over: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
        return {k: {**base.get(k, {}), **over.get(k, {})} for k in dict.fromkeys([*base, *over])}

    return replace(
        task,
        explainer_settings=merge(task.explainer_settings, variant.explainer_settings),
        metric_settings=merge(task.metric_settings, variant.metric_settings),
        variant=name,
    )


def _default_lookalikes(data: DataSpec, driving: dict[int, list[str]]) -> list[str]:
    """Natural types that can appear in the task's tiles and drive no class."""
    driving_all = {t for types in driving.values() for t in types}
    return [t for t in LOOKALIKE_TYPES if t in data.possible_types and t not in driving_all]


def _load_data(sec: Any, f: str) -> tuple[DataSpec, Any]:
    from xbench import scenes  # the synthesizer validates recipes and label rules

    w = f"{f}: data"
    _expect(sec, (dict,), w, "a table")
    _unknown(sec, DATA_KEYS, w)
    for key in ("recipe", "size", "train", "val", "test", "labels"):
        if key not in sec:
            raise XbenchInputError(f"{w}.{key}", "missing required key")
    recipe = _expect(sec["recipe"], (str,), f"{w}.recipe", "a recipe name or path")
    try:
        recipe_obj = scenes.load_recipe(_recipe_ref(recipe, f))
    except XbenchInputError as exc:
        raise XbenchInputError(f"{w}.recipe", f"cannot load recipe ({exc})", found=recipe) from None
    size = _int_in(sec["size"], f"{w}.size", 16, 512)
    if size % 4:
        raise XbenchInputError(f"{w}.size", "tile size must be a multiple of 4", found=size)
    counts = {s: _int_in(sec[s], f"{w}.{s}", 2, MAX_SPLIT_TILES) for s in SPLITS}
    seed = _int_in(sec.get("seed", 0), f"{w}.seed", 0)
    presence = None
    if "presence" in sec:
        _expect(sec["presence"], (dict,), f"{w}.presence", "a table of structure type -> probability")
        presence = {}
        for kind, p in sec["presence"].items():
            if kind not in HUMAN_TYPES + LOOKALIKE_TYPES:
                raise XbenchInputError(
                    f"{w}.presence.{kind}",
                    "unknown structure type",
                    expected=", ".join(HUMAN_TYPES + LOOKALIKE_TYPES),
                    found=kind,
                )
            presence[kind] = _float_in(p, f"{w}.presence.{kind}", 0.0, 1.0)
    labels = _expect(sec["labels"], (dict,), f"{w}.labels", "a label-rule table")
    rule = scenes.parse_label_rule(labels, f"{w}.labels")
    label_noise = _float_in(sec.get("label_noise", 0.0), f"{w}.label_noise", 0.0, 0.5)
    lookalikes = None
    if "lookalikes" in sec:
        lookalikes = _str_list(sec["lookalikes"], f"{w}.lookalikes", allow_empty=True)
        for i, kind in enumerate(lookalikes):
            if kind not in LOOKALIKE_TYPES:
                raise XbenchInputError(
                    f"{w}.lookalikes[{i}]",
                    "not a natural look-alike type",
                    expected=", ".join(LOOKALIKE_TYPES),
                    found=kind,
                )
    cue = None
    rates = {s: 0.5 for s in SPLITS}
    cue_keys = [k for k in sec if k.startswith("cue_")]
    if "cue" in sec:
        cue = dict(_expect(sec["cue"], (dict,), f"{w}.cue", "a table describing the cue"))
        scenes.parse_cue(cue, f"{w}.cue")
        for s in SPLITS:
            key = f"cue_rate_{s}"
            if key not in sec:
                raise XbenchInputError(f"{w}.{key}", "missing required key (data.cue is set)")
            rates[s] = _float_in(sec[key], f"{w}.{key}", 0.0, 1.0)
    elif cue_keys:
        raise XbenchInputError(f"{w}.{cue_keys[0]}", "cue settings without a [data.cue] table")
    possible = []
    for kind in HUMAN_TYPES + LOOKALIKE_TYPES:
        if presence is not None and kind in presence:
            p = presence[kind]
        else:
            p = recipe_obj.spec(kind).probability if kind in recipe_obj.types() else 0.0
        if p > 0:
            possible.append(kind)
    spec = DataSpec(
        recipe=recipe,
        size=size,
        counts=counts,
        seed=seed,
        presence=presence,
        labels=labels,
        label_noise=label_noise,
        cue=cue,
        cue_rates=rates,
        lookalikes=lookalikes,
        # the recipe's parsed content keys the data and model caches: an edited recipe recomputes
        raw=json.loads(json.dumps(sec, default=str)) | {"recipe_sha256": _recipe_sha256(recipe_obj.path)},
        possible_types=possible,
    )
    return spec, rule


PACK_DATA_KEYS = {"pack", "train", "val", "test", "drives", "lookalikes"}


def _load_pack_data(sec: dict[str, Any], f: str) -> DataSpec:
    """`[data]` naming a user's tile pack: its tiles, in order, fill the train, val and test splits.

    ``drives`` maps a class name to the structure types (mask names) that make it: they are the planted
    truth of localization metrics and of the `oracle`. Packs carry no scenes, so per-instance
    (model-verified) truth and the synthesizer's concept sets are not available for them.
    """
    from xbench.data import load_pack

    w = f"{f}: data"
    _unknown(sec, PACK_DATA_KEYS, w)
    for key in ("train", "val", "test", "drives"):
        if key not in sec:
            raise XbenchInputError(f"{w}.{key}", "missing required key (data.pack is set)")
    ref = Path(_expect(sec["pack"], (str,), f"{w}.pack", "a path to a .npz tile pack"))
    path = ref if ref.is_absolute() else Path(f).parent / ref
    try:
        pack = load_pack(path)  # every array validated; errors name the file and the array
    except XbenchInputError as exc:
        raise XbenchInputError(f"{w}.pack", str(exc)) from None
    counts = {s: _int_in(sec[s], f"{w}.{s}", 2) for s in SPLITS}
    if sum(counts.values()) > len(pack):
        raise XbenchInputError(
            f"{w}.train/val/test",
            "more tiles than the pack holds",
            expected=f"a sum <= {len(pack)}",
            found=sum(counts.values()),
        )
    drives = _expect(sec["drives"], (dict,), f"{w}.drives", "a table: class name -> structure types")
    classes = list(pack.class_names)
    driving: dict[int, list[str]] = {i: [] for i in range(len(classes))}
    for name, types in drives.items():
        if name not in classes:
            raise XbenchInputError(
                f"{w}.drives.{name}", "not a class of the pack", expected=", ".join(classes), found=name
            )
        types = _str_list(types, f"{w}.drives.{name}", allow_empty=True)
        for t in types:
            if t not in pack.mask_names:
                raise XbenchInputError(
                    f"{w}.drives.{name}", "not a mask of the pack", expected=", ".join(pack.mask_names), found=t
                )
        driving[classes.index(name)] = types
    used = {t for types in driving.values() for t in types}
    if "lookalikes" in sec:
        lookalikes = _str_list(sec["lookalikes"], f"{w}.lookalikes", allow_empty=True)
        for t in lookalikes:
            if t not in pack.mask_names:
                raise XbenchInputError(
                    f"{w}.lookalikes", "not a mask of the pack", expected=", ".join(pack.mask_names), found=t
                )
    else:
        lookalikes = [t for t in pack.mask_names if t in LOOKALIKE_TYPES and t not in used]
    raw = json.loads(json.dumps(sec, default=str)) | {"pack_sha256": hashlib.sha256(path.read_bytes()).hexdigest()}
    return DataSpec(
        recipe="",
        size=int(pack.images.shape[-1]),
        counts=counts,
        seed=0,
        presence=None,
        labels={},
        label_noise=0.0,
        cue=None,
        cue_rates={},
        lookalikes=lookalikes,
        raw=raw,
        pack=str(path.resolve()),
        pack_classes=classes,
        pack_drives=driving,
        possible_types=list(pack.mask_names),
    )


def _recipe_sha256(path: str) -> str:
    """sha256 of a recipe's parsed content (comments and formatting do not count)."""
    return hashlib.sha256(json.dumps(load_toml(path), sort_keys=True, default=str).encode()).hexdigest()


def _load_raster_data(sec: dict[str, Any], f: str) -> tuple[DataSpec, Any]:
    """`[data]` naming georeferenced rasters (see ``xbench.imagery.taskdata`` for the keys).

    ``rasters`` + ``annotations``: real tiles with vector annotations become a tile pack (cached), used like
    `[data] pack`: planted truth from the annotations, no twins. ``backgrounds`` + ``recipe``: the recipe's
    structures are transplanted into the rasters' tiles, with twins and scenes (the whole benchmark).
    """
    from xbench.imagery import taskdata

    if "backgrounds" in sec:
        rest, backgrounds = taskdata.split_backgrounds(sec, f, cache_root())
        spec, rule = _load_data(rest, f)
        raw = spec.raw | {"backgrounds": backgrounds["raw"]}
        return dataclasses.replace(spec, raw=raw, backgrounds=backgrounds), rule
    from xbench import scenes

    w = f"{f}: data"
    for key in ("labels", "train", "val", "test"):
        if key not in sec:
            raise XbenchInputError(f"{w}.{key}", "missing required key (data.rasters is set)")
    rule = scenes.parse_label_rule(_expect(sec["labels"], (dict,), f"{w}.labels", "a label-rule table"), f"{w}.labels")
    counts = {s: _int_in(sec[s], f"{w}.{s}", 2) for s in SPLITS}
    path, raw = taskdata.annotated_pack_for_task(sec, f, rule, counts, cache_root())
    pack_sec = {"pack": str(path), "train": counts["train"], "val": counts["val"], "test": counts["test"]}
    pack_sec["drives"] = {c: list(rule.driving_types(i)) for i, c in enumerate(rule.classes)}
    if "lookalikes" in sec:
        pack_sec["lookalikes"] = sec["lookalikes"]
    spec = _load_pack_data(pack_sec, f)
    return dataclasses.replace(spec, raw=raw | {"pack_sha256": spec.raw["pack_sha256"]}), None


def _recipe_ref(recipe: str, task_file: str) -> str:
    """A recipe given as a relative path is read relative to the task file."""
    if recipe.endswith(".toml") and not Path(recipe).is_absolute():
        return str(Path(task_file).parent / recipe)
    return recipe


def _load_models(raw: Any, f: str) -> list[ModelSpec]:
    _expect(raw, (list,), f"{f}: models", "an array of [[models]] tables")
    if not raw:
        raise XbenchInputError(f"{f}: models", "no models", expected="at least one [[models]] table")
    out: list[ModelSpec] = []
    for i, entry in enumerate(raw):
        w = f"{f}: models[{i}]"
        _expect(entry, (dict,), w, "a table")
        for key in ("name", "kind"):
            if key not in entry:
                raise XbenchInputError(f"{w}.{key}", "missing required key")
        name = _expect(entry["name"], (str,), f"{w}.name", "a string")
        if not name or any(c in name for c in "/\\ "):
            raise XbenchInputError(f"{w}.name", "model names must be non-empty, without spaces or slashes", found=name)
        kind = _expect(entry["kind"], (str,), f"{w}.kind", "a string")
        if kind not in MODEL_KINDS:
            hint = renamed_hint("model", kind)
            problem = "unknown model kind" + (f": {hint}" if hint else "")
            raise XbenchInputError(f"{w}.kind", problem, expected=" | ".join(MODEL_KINDS), found=kind)
        allowed = MODEL_PARAMS[kind]
        params: dict[str, Any] = {}
        for key, value in entry.items():
            if key in ("name", "kind"):
                continue
            if key not in allowed:
                raise XbenchInputError(
                    f"{w}.{key}",
                    f"unknown hyper-parameter for kind '{kind}'",
                    expected="one of " + ", ".join(sorted(allowed)),
                    found=key,
                )
            _expect(value, allowed[key], f"{w}.{key}", " or ".join(t.__name__ for t in allowed[key]))
            params[key] = value
        _check_model_values(params, w)
        if kind in USER_KINDS:
            _check_user_model(params, kind, w, Path(f))
        if any(m.name == name for m in out):
            raise XbenchInputError(f"{w}.name", "duplicate model name", found=name)
        out.append(ModelSpec(name=name, kind=kind, params=params))
    return out


def _check_user_model(params: dict[str, Any], kind: str, w: str, task_file: Path) -> None:
    """A user model's keys are checked before any work: import path form and the weights file."""
    factory = params.get("factory")
    if factory is None:
        raise XbenchInputError(
            f"{w}.factory", f"missing required key for kind '{kind}'", expected="'package.module:function'"
        )
    if factory.count(":") != 1 or not all(factory.split(":")):
        raise XbenchInputError(f"{w}.factory", "bad import path", expected="'package.module:function'", found=factory)
    if "weights" in params:
        weights = Path(params["weights"])
        if not weights.is_absolute():
            weights = task_file.parent / weights
        if not weights.is_file():
            raise XbenchInputError(f"{w}.weights", "weights file not found", found=str(weights))
        params["weights"] = str(weights.resolve())
    if params.get("output", "probabilities") not in ("probabilities", "logits"):
        raise XbenchInputError(f"{w}.output", "bad value", expected="probabilities | logits", found=params["output"])


def _check_model_values(params: dict[str, Any], w: str) -> None:
    positive_ints = ("epochs", "batch_size", "width", "n_trees", "max_depth", "min_samples_leaf")
    for key in positive_ints:
        if key in params:
            _int_in(params[key], f"{w}.{key}", 1)
    if "patience" in params:
        _int_in(params["patience"], f"{w}.patience", 1)
    if "lr" in params:
        _float_in(params["lr"], f"{w}.lr", 1e-6, 1.0)
        if params["lr"] <= 0:
            raise XbenchInputError(f"{w}.lr", "value out of range", expected="> 0", found=params["lr"])
    if "weight_decay" in params:
        _float_in(params["weight_decay"], f"{w}.weight_decay", 0.0, 1.0)
    if "dropout" in params:
        _float_in(params["dropout"], f"{w}.dropout", 0.0, 0.9)
    if "max_features" in params:
        mf = params["max_features"]
        if isinstance(mf, str) and mf not in ("sqrt", "log2"):
            raise XbenchInputError(f"{w}.max_features", "bad value", expected="sqrt | log2 | a number", found=mf)
        if isinstance(mf, float) and not 0 < mf <= 1:
            raise XbenchInputError(f"{w}.max_features", "value out of range", expected="in (0, 1]", found=mf)


# ---------------------------------------------------------------------------------------------------
# building the task's tiles


def cache_root() -> Path:
    """``$XBENCH_CACHE`` or ``~/.cache/xbench``."""
    return Path(os.environ.get("XBENCH_CACHE") or Path.home() / ".cache" / "xbench")


def split_seed(data_seed: int, split: str) -> int:
    """The synthesis seed of one split (independent streams per split)."""
    return int(np.random.SeedSequence([int(data_seed), 7919, SPLITS.index(split)]).generate_state(1)[0])


def _synthesize_split(task: Task, split: str) -> tuple[TilePack, list[Any]]:
    from xbench import scenes

    d = task.data
    if d.backgrounds is not None:
        from xbench.imagery.taskdata import transplant_split

        return transplant_split(task, split, split_seed(d.seed, split))
    return scenes.synthesize(
        _recipe_ref(d.recipe, str(task.path)),
        d.counts[split],
        split_seed(d.seed, split),
        size=d.size,
        twins=(split == "test"),
        presence=d.presence,
        label_rule=task.label_rule,
        label_noise=d.label_noise if split == "train" else 0.0,
        cue=d.cue,
        cue_rate=d.cue_rates[split],
    )


def _split_user_pack(task: Task) -> TaskData:
    """A user's pack, in order: the first tiles train, the next validate, the next test (no scenes)."""
    from xbench.data import load_pack

    assert task.data.pack is not None  # a pack task (checked when the task was loaded)
    pack = load_pack(task.data.pack)
    n = task.data.counts
    edges = np.cumsum([0, n["train"], n["val"], n["test"]])
    train, val, test = (pack.subset(slice(int(a), int(b))) for a, b in zip(edges[:-1], edges[1:], strict=True))
    return TaskData(train=train, val=val, test=test, test_scenes=[])


def build_task_data(task: Task, *, use_cache: bool = True) -> TaskData:
    """The task's train/val/test packs (test with twins) and test scenes; deterministic from the data
    section. Train and val packs are cached under ``$XBENCH_CACHE/data/<hash of the data section>``;
    the test split is synthesised each time because its scenes are kept in memory."""
    from xbench import __version__

    if task.data.pack:
        return _split_user_pack(task)
    packs: dict[str, TilePack] = {}
    key = hashlib.sha256(f"{task.data.hash}:{__version__}".encode()).hexdigest()[:32]
    folder = cache_root() / "data" / key
    for split in ("train", "val"):
        path = folder / f"{split}.npz"
        if use_cache and path.is_file():
            try:
                packs[split] = load_pack(path)
                continue
            except XbenchInputError as exc:  # a damaged cache file is rebuilt, and said so
                warnings.warn(f"damaged data cache entry rebuilt: {exc}", stacklevel=2)
        packs[split], _ = _synthesize_split(task, split)
        if use_cache:
            save_pack(packs[split], path)
    test, test_scenes = _synthesize_split(task, "test")
    return TaskData(train=packs["train"], val=packs["val"], test=test, test_scenes=test_scenes)
