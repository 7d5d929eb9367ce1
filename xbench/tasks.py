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

import contextlib
import dataclasses
import hashlib
import json
import os
import warnings
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.data import TilePack, load_pack, save_pack
from xbench.errors import XbenchInputError, load_toml, repo_root
from xbench.names import HUMAN_TYPES, LOOKALIKE_TYPES, renamed_hint
from xbench.schema import Field, Where, as_where, check_table, check_value, load_config

MODEL_KINDS = ("cnn", "resnet", "separable", "forest", "user-torch", "user-callable")
# Bring your own model: `factory` is an import path `package.module:function`. For `user-torch` it returns a
# torch module (raw reflectance in, logits out) and `weights` (a state_dict file, relative to the task file)
# is loaded with torch.load(weights_only=True); for `user-callable` it returns f(images) -> class scores.
USER_KINDS = ("user-torch", "user-callable")

RUN_DEFAULTS: dict[str, int] = {
    "explain_tiles": 64,  # test tiles explained and scored per (model, seed)
    "gallery_tiles": 8,  # tiles kept with every explainer's map for figures
    "batch_size": 64,  # images per model call in explainers and metrics
    "concept_set_size": 80,  # example tiles per concept set (tcav; 80 gives the test power on the zoo)
    "fit_tiles": 200,  # training tiles used to fit concept explainers (activation-clusters)
    "random_sets": 20,  # random example sets for concept significance tests (tcav)
    "cell_timeout": 1800,  # seconds one cell (explain + score) may take before it is stopped and recorded failed
}
MAX_SPLIT_TILES = 100_000  # tiles per split: a stated maximum instead of running out of memory
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
# the task file's schema (declared once; checked by xbench.schema, errors name file, line and key)


def _no_duplicates(value: list[Any], where: Where) -> list[Any]:
    dup = [v for i, v in enumerate(value) if v in value[:i]]
    if dup:
        raise where.error("duplicate entry", expected="each entry once", found=dup[0])
    return value


def _names(doc: str, default: Any = None, *, min_len: int = 0, choices: tuple[str, ...] | None = None) -> Field:
    """A list of distinct strings (optionally from ``choices``)."""
    return Field("list", default, doc=doc, item=Field("str", choices=choices), min_len=min_len, check=_no_duplicates)


def _multiple_of_4(value: int, where: Where) -> int:
    if value % 4:
        raise where.error("tile size must be a multiple of 4", expected="a multiple of 4", found=value)
    return value


def _model_name(value: str, where: Where) -> str:
    if not value or any(c in value for c in "/\\ "):
        raise where.error(
            "model names must be non-empty, without spaces or slashes", expected="a name like 'cnn-small'", found=value
        )
    return value


def _model_kind(value: str, where: Where) -> str:
    if value not in MODEL_KINDS:
        hint = renamed_hint("model", value)
        raise where.error(
            "unknown model kind" + (f": {hint}" if hint else ""), expected=" | ".join(MODEL_KINDS), found=value
        )
    return value


def _variant_name(value: str, where: Where) -> str:
    if not value or not all(c.isalnum() or c in "-_" for c in value):
        raise where.error("bad variant name", expected="letters, digits, '-' or '_'", found=value)
    return value


def _import_path(value: str, where: Where) -> str:
    if value.count(":") != 1 or not all(value.split(":")):
        raise where.error("bad import path", expected="'package.module:function'", found=value)
    return value


def _max_features(value: Any, where: Where) -> Any:
    """Forest ``max_features``: 'sqrt', 'log2', a count (integer) or a fraction in (0, 1]."""
    expected = "'sqrt' | 'log2' | an integer >= 1 | a fraction in (0, 1]"
    if isinstance(value, str):
        if value not in ("sqrt", "log2"):
            raise where.error("not an allowed value", expected=expected, found=value)
    elif isinstance(value, bool) or not isinstance(value, int | float):
        raise where.error("wrong type", expected=expected, found=value)
    elif isinstance(value, int) and value < 1 or isinstance(value, float) and not 0 < value <= 1:
        raise where.error("out of range", expected=expected, found=value)
    return value


_SPLIT_COUNT = "tiles in the {} split"
TASK_SCHEMA: dict[str, Field] = {
    "name": Field("str", doc="the task's name (runs and reports show it)"),
    "description": Field("str", "", doc="one paragraph for the report"),
    "seeds": Field("list", [0], doc="model training seeds", item=Field("int", low=0), min_len=1, check=_no_duplicates),
    "data": Field("table", doc="the tiles: a recipe, a tile pack or rasters"),
    "models": Field("list", doc="[[models]] tables", item=Field("table"), min_len=1),
    "explainers": Field("table", {}, doc="keys and [explainers.settings.KEY] tables"),
    "metrics": Field("table", {}, doc="keys and [metrics.settings.KEY] tables"),
    "run": Field("table", {}, doc="run settings (see RUN_SCHEMA)"),
    "variants": Field("list", [], doc="[[variants]] tables", item=Field("table")),
}
DATA_SCHEMA: dict[str, Field] = {
    "recipe": Field("str", doc="a shipped recipe's name or a recipe file (relative to the task file)"),
    "size": Field("int", low=16, high=512, check=_multiple_of_4, doc="tile side in pixels, a multiple of 4"),
    **{s: Field("int", low=2, high=MAX_SPLIT_TILES, doc=_SPLIT_COUNT.format(s)) for s in SPLITS},
    "seed": Field("int", 0, low=0, doc="synthesis seed (each split derives its own)"),
    "presence": Field("table", None, doc="structure type -> probability that it appears in a tile"),
    "labels": Field("table", doc="the label rule (see xbench.scenes.labels)"),
    "label_noise": Field("number", 0.0, low=0.0, high=0.5, doc="share of train labels flipped"),
    "lookalikes": _names("natural look-alike types (default: those that drive no class)", choices=LOOKALIKE_TYPES),
    "cue": Field("table", None, doc="a spurious cue (the synthesizer's cue table)"),
    **{
        f"cue_rate_{s}": Field("number", None, low=0.0, high=1.0, doc=f"cue rate in the {s} split (with [data.cue])")
        for s in SPLITS
    },
}
PRESENCE_SCHEMA: dict[str, Field] = {
    kind: Field("number", None, low=0.0, high=1.0, doc=f"probability that a tile holds a {kind}")
    for kind in HUMAN_TYPES + LOOKALIKE_TYPES
}
PACK_DATA_SCHEMA: dict[str, Field] = {
    "pack": Field("str", doc="a .npz tile pack (relative to the task file)"),
    **{s: Field("int", low=2, doc=_SPLIT_COUNT.format(s)) for s in SPLITS},
    "drives": Field("table", doc="class name -> the structure types (mask names) that make it"),
    "lookalikes": _names("mask names that are look-alikes (default: natural types that drive no class)"),
}
RUN_DOCS = {
    "explain_tiles": "test tiles explained and scored per (model, seed)",
    "gallery_tiles": "tiles kept with every explainer's map for figures",
    "batch_size": "images per model call in explainers and metrics",
    "concept_set_size": "example tiles per concept set (tcav)",
    "fit_tiles": "training tiles used to fit concept explainers (activation-clusters)",
    "random_sets": "random example sets for concept significance tests (tcav)",
    "cell_timeout": "seconds one cell (explain + score) may take before it is stopped and recorded failed",
}
RUN_SCHEMA: dict[str, Field] = {
    key: Field("int", value, low=1, doc=RUN_DOCS[key]) for key, value in RUN_DEFAULTS.items()
}
KEYS_SCHEMA: dict[str, Field] = {
    "keys": _names("registered keys to run", []),
    "settings": Field("table", {}, doc="KEY -> a table of that key's settings"),
}
# Hyper-parameters per model kind: architecture (see models/zoo.py) and training (see models/train.py). A key
# left out takes the trainer's default, so no default is filled in here (None).
TORCH_TRAIN_SCHEMA: dict[str, Field] = {
    "epochs": Field("int", None, low=1, doc="training epochs at most"),
    "patience": Field("int", None, low=1, doc="epochs without validation gain before stopping"),
    "lr": Field("number", None, low=1e-6, high=1.0, doc="learning rate"),
    "weight_decay": Field("number", None, low=0.0, high=1.0, doc="weight decay"),
    "batch_size": Field("int", None, low=1, doc="tiles per training step"),
    "augment": Field("bool", None, doc="flips and 90-degree turns in training"),
}
_NET_SCHEMA: dict[str, Field] = {
    "width": Field("int", None, low=1, doc="channels of the first layer"),
    "dropout": Field("number", None, low=0.0, high=0.9, doc="dropout before the classifier"),
    **TORCH_TRAIN_SCHEMA,
}
MODEL_PARAM_SCHEMAS: dict[str, dict[str, Field]] = {
    "cnn": _NET_SCHEMA,
    "resnet": _NET_SCHEMA,
    "separable": _NET_SCHEMA,
    "forest": {
        "n_trees": Field("int", None, low=1, doc="trees in the forest"),
        "max_depth": Field("int", None, low=1, doc="depth of each tree at most"),
        "min_samples_leaf": Field("int", None, low=1, doc="tiles per leaf at least"),
        "max_features": Field("any", None, check=_max_features, doc="'sqrt', 'log2', a count or a fraction"),
    },
    "user-torch": {
        "factory": Field("str", check=_import_path, doc="'package.module:function' returning a torch module"),
        "weights": Field("str", None, doc="a state_dict file (relative to the task file)"),
    },
    "user-callable": {
        "factory": Field("str", check=_import_path, doc="'package.module:function' returning f(images) -> scores"),
        "output": Field("str", None, choices=("probabilities", "logits"), doc="what the callable returns"),
    },
}
MODEL_SCHEMA: dict[str, Field] = {
    "name": Field("str", check=_model_name, doc="a unique name without spaces or slashes"),
    "kind": Field("str", check=_model_kind, doc=" | ".join(MODEL_KINDS)),
}
VARIANT_SCHEMA: dict[str, Field] = {
    "name": Field("str", check=_variant_name, doc="letters, digits, '-' and '_'"),
    "description": Field("str", "", doc="what the variant changes"),
    "models": _names("a subset of the task's models", min_len=1),
    "explainers": _names("a subset of the task's explainers", min_len=1),
    "metrics": _names("a subset of the task's metrics", min_len=1),
    "explainer_settings": Field("table", {}, doc="KEY -> explainer settings overriding the task's"),
    "metric_settings": Field("table", {}, doc="KEY -> metric settings overriding the task's"),
}
# kept for code that lists the keys
TOP_KEYS = set(TASK_SCHEMA)
DATA_KEYS = set(DATA_SCHEMA)
PACK_DATA_KEYS = set(PACK_DATA_SCHEMA)
VARIANT_KEYS = set(VARIANT_SCHEMA)
MODEL_PARAMS = {kind: set(schema) for kind, schema in MODEL_PARAM_SCHEMAS.items()}


def _settings(section: dict[str, Any], keys: list[str], where: Where) -> dict[str, dict[str, Any]]:
    """``[SECTION.settings.KEY]`` tables, each for a listed key."""
    out: dict[str, dict[str, Any]] = {}
    for key, table in section["settings"].items():
        w = where.child("settings").child(key)
        if key not in keys:
            raise w.error(
                "settings for a key that is not listed",
                expected=f"one of {where.key}.keys: " + (", ".join(keys) or "(none listed)"),
                found=key,
            )
        out[key] = dict(check_value(table, Field("table"), w))
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
        raise XbenchInputError(
            f"task '{text}'",
            "unknown task" + (f": {hint}" if hint else ""),
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
        return _parse_task(path, task, Where(str(path)))
    path = resolve_task_path(task)
    doc, where = load_config(path)
    return _parse_task(path, doc, where)


def _parse_task(path: Path, doc: dict[str, Any], where: Where) -> Task:
    # The content of the parsed task, not the file's bytes: a comment or a reordered table changes nothing.
    file_hash = hashlib.sha256(json.dumps(doc, sort_keys=True, default=str).encode()).hexdigest()
    top = check_table(doc, TASK_SCHEMA, where)
    f = str(path)
    data_sec, w_data = top["data"], where.child("data")
    if "pack" in data_sec:
        data, rule = _load_pack_data(data_sec, f, w_data), None
    elif "rasters" in data_sec or "backgrounds" in data_sec:
        data, rule = _load_raster_data(data_sec, f, w_data)
    else:
        data, rule = _load_data(data_sec, f, w_data)
    models = _load_models(top["models"], f, where.child("models"))

    explainers_sec = check_table(top["explainers"], KEYS_SCHEMA, where.child("explainers"))
    explainers = explainers_sec["keys"]
    explainer_settings = _settings(explainers_sec, explainers, where.child("explainers"))
    metrics_sec = check_table(top["metrics"], KEYS_SCHEMA, where.child("metrics"))
    metrics = metrics_sec["keys"]
    metric_settings = _settings(metrics_sec, metrics, where.child("metrics"))

    w_run = where.child("run")
    run = check_table(top["run"], RUN_SCHEMA, w_run)
    test_count = data.counts["test"]
    for key in ("explain_tiles", "gallery_tiles"):
        if run[key] > test_count:
            raise w_run.child(key).error(
                "more tiles than the test split holds", expected=f"<= data.test ({test_count})", found=run[key]
            )
    if run["gallery_tiles"] > run["explain_tiles"]:
        raise w_run.child("gallery_tiles").error(
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
        name=top["name"],
        path=path,
        file_hash=file_hash,
        description=top["description"],
        data=data,
        models=models,
        seeds=top["seeds"],
        explainers=explainers,
        explainer_settings=explainer_settings,
        metrics=metrics,
        metric_settings=metric_settings,
        run=run,
        class_names=class_names,
        class_driving_types=driving,
        lookalike_types=lookalikes,
        label_rule=rule,
        variants=parse_variants(
            top["variants"], explainers, metrics, [m.name for m in models], where.child("variants")
        ),
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


def parse_variants(
    raw: Any, explainers: list[str], metrics: list[str], models: list[str], where: str | Where
) -> list[Variant]:
    """``[[variants]]`` tables: ``name`` (letters, digits, '-' and '_'), optional ``description``, optional
    subsets ``models`` / ``explainers`` / ``metrics`` of the task's lists, and ``[variants.explainer_settings.KEY]``
    / ``[variants.metric_settings.KEY]`` tables that override the task's settings for that variant."""
    w_all = as_where(where)
    raw = check_value(raw, TASK_SCHEMA["variants"], w_all)
    out: list[Variant] = []
    for i, table in enumerate(raw):
        w = w_all.child(i)
        v = check_table(table, VARIANT_SCHEMA, w)
        name = v["name"]
        if name in {o.name for o in out}:
            raise w.child("name").error("duplicate variant name", expected="a name not used before", found=name)
        subsets: dict[str, list[str] | None] = {}
        for key, allowed in (("models", models), ("explainers", explainers), ("metrics", metrics)):
            chosen = v[key]
            bad = [c for c in chosen or [] if c not in allowed]
            if bad:
                raise w.child(key).error("not in the task", expected=", ".join(allowed), found=bad[0])
            subsets[key] = chosen
        settings: dict[str, dict[str, dict[str, Any]]] = {}
        for key, allowed in (("explainer_settings", explainers), ("metric_settings", metrics)):
            settings[key] = {}
            for k, t in v[key].items():
                wk = w.child(key).child(k)
                if k not in allowed:
                    raise wk.error("not in the task", expected=", ".join(allowed), found=k)
                settings[key][k] = dict(check_value(t, Field("table"), wk))
        out.append(
            Variant(name, v["description"], settings["explainer_settings"], settings["metric_settings"], **subsets)
        )
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


def _load_data(sec: dict[str, Any], f: str, w: Where) -> tuple[DataSpec, Any]:
    from xbench import scenes  # the synthesizer validates recipes and label rules

    d = check_table(sec, DATA_SCHEMA, w)
    recipe = d["recipe"]
    try:
        recipe_obj = scenes.load_recipe(_recipe_ref(recipe, f))
    except XbenchInputError as exc:
        raise w.child("recipe").error(
            f"cannot load recipe ({exc})", expected="a recipe name or path", found=recipe
        ) from None
    presence = None
    if d["presence"] is not None:
        checked = check_table(d["presence"], PRESENCE_SCHEMA, w.child("presence"))
        presence = {kind: float(checked[kind]) for kind in d["presence"]}
    rule = scenes.parse_label_rule(d["labels"], w.child("labels"))
    cue = None
    rates = {s: 0.5 for s in SPLITS}
    cue_keys = [k for k in sec if k.startswith("cue_")]
    if d["cue"] is not None:
        cue = dict(d["cue"])
        scenes.parse_cue(cue, w.child("cue"))
        for s in SPLITS:
            key = f"cue_rate_{s}"
            if d[key] is None:
                raise w.child(key).error("missing required key (data.cue is set)", expected=DATA_SCHEMA[key].expected())
            rates[s] = float(d[key])
    elif cue_keys:
        raise w.child(cue_keys[0]).error("cue settings without a [data.cue] table", expected="a [data.cue] table")
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
        size=d["size"],
        counts={s: d[s] for s in SPLITS},
        seed=d["seed"],
        presence=presence,
        labels=d["labels"],
        label_noise=float(d["label_noise"]),
        cue=cue,
        cue_rates=rates,
        lookalikes=d["lookalikes"],
        # the recipe's parsed content keys the data and model caches: an edited recipe recomputes
        raw=json.loads(json.dumps(sec, default=str)) | {"recipe_sha256": _recipe_sha256(recipe_obj.path)},
        possible_types=possible,
    )
    return spec, rule


def _load_pack_data(sec: dict[str, Any], f: str, w: Where) -> DataSpec:
    """`[data]` naming a user's tile pack: its tiles, in order, fill the train, val and test splits.

    ``drives`` maps a class name to the structure types (mask names) that make it: they are the planted
    truth of localization metrics and of the `oracle`. Packs carry no scenes, so per-instance
    (model-verified) truth and the synthesizer's concept sets are not available for them.
    """
    from xbench.data import load_pack

    d = check_table(sec, PACK_DATA_SCHEMA, w)
    ref = Path(d["pack"])
    path = ref if ref.is_absolute() else Path(f).parent / ref
    try:
        pack = load_pack(path)  # every array validated; errors name the file and the array
    except XbenchInputError as exc:
        raise w.child("pack").error(str(exc), expected="a readable .npz tile pack", found=str(path)) from None
    counts = {s: d[s] for s in SPLITS}
    if sum(counts.values()) > len(pack):
        raise w.child("test").error(
            "more tiles than the pack holds (train + val + test)",
            expected=f"a sum <= {len(pack)}",
            found=sum(counts.values()),
        )
    classes = list(pack.class_names)
    masks = tuple(pack.mask_names)
    driving: dict[int, list[str]] = {i: [] for i in range(len(classes))}
    drives_schema = {c: _names(f"structure types that make class {c}", [], choices=masks) for c in classes}
    drives = check_table(d["drives"], drives_schema, w.child("drives"))
    for name in d["drives"]:
        driving[classes.index(name)] = drives[name]
    used = {t for types in driving.values() for t in types}
    if d["lookalikes"] is not None:
        lookalikes = check_value(d["lookalikes"], _names("mask names", choices=masks), w.child("lookalikes"))
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


@contextlib.contextmanager
def _raster_errors(f: str, w: Where) -> Iterator[None]:
    """The raster forms' checks (xbench.imagery.taskdata) name ``FILE: data.KEY``; restated here in the one
    format (with the line)."""
    try:
        yield
    except XbenchInputError as exc:
        prefix = f"{f}: "
        if not exc.where.startswith(prefix):
            raise
        key = exc.where[len(prefix) :].strip()
        raise Where(w.source, key, w.text).error(exc.problem, exc.expected, exc.found) from None


def _load_raster_data(sec: dict[str, Any], f: str, w: Where) -> tuple[DataSpec, Any]:
    """`[data]` naming georeferenced rasters (see ``xbench.imagery.taskdata`` for the keys).

    ``rasters`` + ``annotations``: real tiles with vector annotations become a tile pack (cached), used like
    `[data] pack`: planted truth from the annotations, no twins. ``backgrounds`` + ``recipe``: the recipe's
    structures are transplanted into the rasters' tiles, with twins and scenes (the whole benchmark).
    """
    from xbench.imagery import taskdata

    if "backgrounds" in sec:
        with _raster_errors(f, w):
            rest, backgrounds = taskdata.split_backgrounds(sec, f, cache_root())
        spec, rule = _load_data(rest, f, w)
        raw = spec.raw | {"backgrounds": backgrounds["raw"]}
        return dataclasses.replace(spec, raw=raw, backgrounds=backgrounds), rule
    from xbench import scenes

    for key in ("labels", "train", "val", "test"):
        if key not in sec:
            raise w.child(key).error("missing required key (data.rasters is set)", expected=DATA_SCHEMA[key].expected())
    rule = scenes.parse_label_rule(
        check_value(sec["labels"], DATA_SCHEMA["labels"], w.child("labels")), w.child("labels")
    )
    counts = {s: check_value(sec[s], PACK_DATA_SCHEMA[s], w.child(s)) for s in SPLITS}
    with _raster_errors(f, w):
        path, raw = taskdata.annotated_pack_for_task(sec, f, rule, counts, cache_root())
    pack_sec = {"pack": str(path), "train": counts["train"], "val": counts["val"], "test": counts["test"]}
    pack_sec["drives"] = {c: list(rule.driving_types(i)) for i, c in enumerate(rule.classes)}
    if "lookalikes" in sec:
        pack_sec["lookalikes"] = sec["lookalikes"]
    spec = _load_pack_data(pack_sec, f, w)
    return dataclasses.replace(spec, raw=raw | {"pack_sha256": spec.raw["pack_sha256"]}), None


def _recipe_ref(recipe: str, task_file: str) -> str:
    """A recipe given as a relative path is read relative to the task file."""
    if recipe.endswith(".toml") and not Path(recipe).is_absolute():
        return str(Path(task_file).parent / recipe)
    return recipe


def _load_models(raw: list[Any], f: str, where: Where) -> list[ModelSpec]:
    out: list[ModelSpec] = []
    for i, entry in enumerate(raw):
        w = where.child(i)
        if not isinstance(entry, dict):
            raise w.error("must be a table", expected="a [[models]] table", found=entry)
        head = check_table({k: entry[k] for k in MODEL_SCHEMA if k in entry}, MODEL_SCHEMA, w)
        name, kind = head["name"], head["kind"]
        schema = MODEL_PARAM_SCHEMAS[kind]
        checked = check_table({k: v for k, v in entry.items() if k not in MODEL_SCHEMA}, schema, w)
        params = {k: checked[k] for k in entry if k not in MODEL_SCHEMA}
        if "weights" in params:
            weights = Path(params["weights"])
            if not weights.is_absolute():
                weights = Path(f).parent / weights
            if not weights.is_file():
                raise w.child("weights").error(
                    "weights file not found", expected="a state_dict file", found=str(weights)
                )
            params["weights"] = str(weights.resolve())
        if any(m.name == name for m in out):
            raise w.child("name").error("duplicate model name", expected="a name not used before", found=name)
        out.append(ModelSpec(name=name, kind=kind, params=params))
    return out


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
