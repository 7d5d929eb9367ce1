"""Landscape recipes: TOML files in ``synthetic/`` declaring land cover, materials, sensor and structures.

Layout of a recipe (every key is validated; errors name the file and the key)::

    name = "conifer-upland"
    description = "..."
    [terrain]      beta, texture_beta, texture, relief, edge
    [sensor]       noise_sigma (one value or six), haze
    [materials.NAME]  reflectance = [blue, green, red, nir, swir1, swir2], kind = "vegetation" | ...
    [[landcover]]  name, material, share, mix, mix_share, matrix   (listed from low to high ground)
    [structures.TYPE]  probability, count = [lo, hi], jitter, and the type's geometry keys (see SCHEMA)
    [labels]       optional default label rule for `xbench synth` (see labels.py)

Shares must sum to at most 1; the rest goes to the matrix class (``matrix = true``, else the largest).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError, repo_root
from xbench.names import HUMAN_TYPES, renamed_hint
from xbench.scenes.labels import ALL_TYPES, LabelRule, parse_label_rule
from xbench.scenes.materials import BANDS, LIBRARY, MATERIAL_KINDS, Material
from xbench.schema import Field, Where, as_where, check_table, check_value, load_config


# Structure catalogue schema, per type. Material names are checked against the recipe's materials after
# the schema check (they are data of the recipe, not of the schema).
def _prob(default: float, doc: str = "") -> Field:
    return Field("number", default, low=0.0, high=1.0, doc=doc)


def _positive_range(default: list[float], doc: str = "") -> Field:
    return Field("range", default, low=0.0, low_open=True, doc=doc)


def _unit_range(default: list[float], doc: str = "") -> Field:
    return Field("range", default, low=0.0, high=1.0, doc=doc)


def _count(default: list[int], least: int, doc: str = "") -> Field:
    return Field("list", default, item=Field("int", low=least), min_len=2, max_len=2, check=_ordered, doc=doc)


def _ordered(value: list[int], where: Where) -> list[int]:
    if value[0] > value[1]:
        raise where.error("low above high", expected="low <= high", found=value)
    return [int(v) for v in value]


def _nonneg(default: float, doc: str = "") -> Field:
    return Field("number", default, low=0.0, doc=doc)


def _material(default: str) -> Field:
    return Field("str", default, doc="a material of the recipe or library")


def _materials(default: list[str]) -> Field:
    return Field("list", default, item=Field("str"), min_len=1, doc="materials of the recipe or library")


COMMON: dict[str, Field] = {
    "probability": _prob(0.0, "share of tiles that hold this type"),
    "count": _count([1, 1], 1, "instances per tile that holds the type"),
    "jitter": _nonneg(0.08, "random variation of the material's reflectance"),
}
SCHEMA: dict[str, dict[str, Field]] = {
    "road": {
        "width": _positive_range([0.6, 1.8]),
        "paved_fraction": _prob(0.25),
        "paved_material": _material("asphalt"),
        "unpaved_material": _material("gravel"),
        "curvature": _nonneg(0.3),
        "branching": _prob(0.4),
        "branches": _count([1, 2], 0),
        "branch_length": _positive_range([12.0, 40.0]),
        "avoid_water": _prob(0.9),
    },
    "clearing": {
        "area": _positive_range([40.0, 400.0]),
        "vertices": _count([5, 8], 3),
        "roughness": _nonneg(0.22),
        "regrowth": _unit_range([0.0, 0.6]),
        "material": _material("slash"),
        "regrowth_material": _material("regrowth"),
    },
    "building": {
        "length": _positive_range([1.2, 3.0]),
        "width": _positive_range([1.0, 2.0]),
        "materials": _materials(["roof-red", "roof-grey"]),
        "spacing": _positive_range([2.5, 5.0]),
        "setback": _positive_range([0.5, 1.5]),
    },
    "corridor": {
        "width": _positive_range([2.0, 4.0]),
        "material": _material("corridor-grass"),
    },
    "field": {
        "length": _positive_range([10.0, 28.0]),
        "width": _positive_range([6.0, 16.0]),
        "materials": _materials(["crop", "stubble", "bare-soil"]),
        "soil_material": _material("bare-soil"),
        "row_period": _positive_range([2.0, 4.0]),
        "row_amplitude": _unit_range([0.15, 0.4]),
    },
    "river": {
        "width": _positive_range([1.0, 3.0]),
        "material": _material("river-water"),
        "meander": _nonneg(0.5),
    },
    "natural-gap": {
        "area": _positive_range([30.0, 300.0]),
        "vertices": _count([14, 22], 3),
        "roughness": _nonneg(0.35),
        "materials": _materials(["windthrow", "burn-scar"]),
        "remnant": _unit_range([0.1, 0.4]),
    },
    "outcrop": {
        "area": _positive_range([6.0, 40.0]),
        "vertices": _count([8, 14], 3),
        "roughness": _nonneg(0.3),
        "material": _material("rock"),
    },
}

TOP_SCHEMA: dict[str, Field] = {
    "name": Field("str", None, nullable=True, doc="the recipe's key (default: the file name)"),
    "description": Field("str", ""),
    "terrain": Field("table", {}),
    "sensor": Field("table", {}),
    "materials": Field("table", {}),
    "landcover": Field("list", item=Field("table"), min_len=1, doc="[[landcover]] classes"),
    "structures": Field("table", {}),
    "labels": Field("table", None, nullable=True),
}
TERRAIN_SCHEMA: dict[str, Field] = {
    "beta": Field("number", 3.0, low=0.5, high=5.0, doc="spectral exponent of the land-cover field"),
    "texture_beta": Field("number", 1.8, low=0.5, high=5.0),
    "texture": Field("number", 0.06, low=0.0, high=0.5),
    "relief": Field("number", 0.1, low=0.0, high=0.5),
    "edge": Field("number", 0.08, low=1e-3, high=2.0),
}
SENSOR_SCHEMA: dict[str, Field] = {
    "noise_sigma": Field("any", 0.004, doc="one value or one per band, each in [0, 0.1]"),
    "haze": Field("number", 0.015, low=0.0, high=0.3),
}
MATERIAL_SCHEMA: dict[str, Field] = {
    "reflectance": Field(
        "list",
        item=Field("number", low=0.0, high=1.0),
        min_len=len(BANDS),
        max_len=len(BANDS),
        doc="one surface reflectance per band (" + ", ".join(BANDS) + ")",
    ),
    "kind": Field("str", choices=tuple(MATERIAL_KINDS)),
    "note": Field("str", ""),
}
LANDCOVER_SCHEMA: dict[str, Field] = {
    "name": Field("str", None, nullable=True),
    "material": Field("str"),
    "share": Field("number", 0.0, low=0.0, high=1.0),
    "mix": Field("str", None, nullable=True),
    "mix_share": Field("number", 0.0, low=0.0, high=1.0),
    "matrix": Field("bool", False),
}


@dataclass(frozen=True)
class LandCover:
    name: str
    material: str
    share: float
    mix: str | None = None
    mix_share: float = 0.0


@dataclass(frozen=True)
class Terrain:
    beta: float = 3.0
    texture_beta: float = 1.8
    texture: float = 0.06
    relief: float = 0.1
    edge: float = 0.08


@dataclass(frozen=True)
class Sensor:
    noise_sigma: tuple[float, ...] = (0.004,) * 6
    haze: float = 0.015


@dataclass
class StructureSpec:
    kind: str
    probability: float
    count: tuple[int, int]
    jitter: float
    params: dict[str, Any]

    @property
    def human(self) -> bool:
        return self.kind in HUMAN_TYPES


@dataclass
class Recipe:
    name: str
    path: str
    description: str
    materials: dict[str, Material]
    landcover: list[LandCover]
    terrain: Terrain
    sensor: Sensor
    structures: dict[str, StructureSpec]
    labels: LabelRule | None = None
    bands: tuple[str, ...] = BANDS
    _spectra: dict[str, np.ndarray] = field(default_factory=dict, repr=False)
    _defaults: dict[str, StructureSpec] = field(default_factory=dict, repr=False)
    _cache: dict[str, Any] = field(default_factory=dict, repr=False)

    def spectrum(self, material: str) -> np.ndarray:
        s = self._spectra.get(material)
        if s is None:
            s = self._spectra[material] = self.materials[material].spectrum
        return s

    def spec(self, kind: str) -> StructureSpec:
        """The catalogue entry of a type, or its defaults (probability 0) when the recipe leaves it out."""
        if kind in self.structures:
            return self.structures[kind]
        spec = self._defaults.get(kind)
        if spec is None:
            spec = self._defaults[kind] = _structure(kind, {}, Where(self.path, f"structures.{kind}"), self.materials)
        return spec

    def types(self) -> list[str]:
        """Structure types of the catalogue, in the canonical order (human types, then look-alikes)."""
        return [t for t in ALL_TYPES if t in self.structures]


# ----------------------------------------------------------------------------------------------------
# loading


def recipe_dir() -> Path:
    return repo_root() / "synthetic"


def list_recipes() -> list[str]:
    """Names of the shipped recipes (files ``synthetic/*.toml``)."""
    return sorted(p.stem for p in recipe_dir().glob("*.toml"))


def load_recipe(name_or_path: str | Path | Recipe) -> Recipe:
    """A shipped recipe by name, or a recipe file by path; validated (errors name file and key)."""
    if isinstance(name_or_path, Recipe):
        return name_or_path
    text = str(name_or_path)
    path = Path(text)
    if not (text.endswith(".toml") or path.is_file() or "/" in text):
        shipped = recipe_dir() / f"{text}.toml"
        if not shipped.is_file():
            hint = renamed_hint("recipe", text)
            raise XbenchInputError(
                f"recipe '{text}'",
                "unknown recipe" + (f": {hint}" if hint else ""),
                expected="a file path or one of " + ", ".join(list_recipes()),
                found=text,
            )
        path = shipped
    data, where = load_config(path)
    return parse_recipe(data, where, default_name=path.stem)


def _check_materials(value: Any, where: Where, materials: dict[str, Material]) -> None:
    for v in [value] if isinstance(value, str) else value:
        if v not in materials:
            raise where.error("unknown material", expected="a material of the recipe or library", found=v)


def _structure(kind: str, table: Any, where: str | Where, materials: dict[str, Material]) -> StructureSpec:
    w = as_where(where)
    schema = {**COMMON, **SCHEMA[kind]}
    if isinstance(table, dict) and isinstance(table.get("materials"), str):
        table = {**table, "materials": [table["materials"]]}
    values = check_table(table, schema, w)
    for key, spec in schema.items():
        if spec.doc.startswith("a material") or spec.doc.startswith("materials"):
            _check_materials(values[key], w.child(key), materials)
    return StructureSpec(
        kind,
        values.pop("probability"),
        tuple(values.pop("count")),
        values.pop("jitter"),
        values,
    )


def parse_recipe(data: dict[str, Any], where: str | Where, default_name: str = "recipe") -> Recipe:
    """Validate recipe data (already read from TOML); errors name the file, line and key."""
    w = as_where(where)
    top = check_table(data, TOP_SCHEMA, w)
    name = top["name"] if top["name"] is not None else default_name
    if not name:
        raise w.child("name").error("must be a non-empty string", found=name)
    terrain = Terrain(**check_table(top["terrain"], TERRAIN_SCHEMA, w.child("terrain")))
    sv = check_table(top["sensor"], SENSOR_SCHEMA, w.child("sensor"))
    sigma_raw = sv["noise_sigma"]
    sigma_field = Field("list", item=Field("number", low=0.0, high=0.1), min_len=len(BANDS), max_len=len(BANDS))
    sigmas = sigma_raw if isinstance(sigma_raw, list) else [sigma_raw] * len(BANDS)
    sig = tuple(check_value(sigmas, sigma_field, w.child("sensor").child("noise_sigma")))
    sensor = Sensor(sig, sv["haze"])

    materials = dict(LIBRARY)
    for mname, m in top["materials"].items():
        mv = check_table(m, MATERIAL_SCHEMA, w.child("materials").child(mname))
        materials[mname] = Material(mname, tuple(mv["reflectance"]), mv["kind"], mv["note"])

    classes: list[dict[str, Any]] = []
    for i, c in enumerate(top["landcover"]):
        cw = w.child("landcover").child(i)
        cv = check_table(c, LANDCOVER_SCHEMA, cw)
        cv["name"] = cv["name"] or f"class{i}"
        for key in ("material", "mix"):
            if cv[key] is not None:
                _check_materials(cv[key], cw.child(key), materials)
        classes.append(cv)
    total = sum(c["share"] for c in classes)
    if total > 1 + 1e-9:
        raise w.child("landcover").error("shares add up to more than 1", expected="a sum <= 1", found=round(total, 6))
    matrices = [i for i, c in enumerate(classes) if c["matrix"]]
    if len(matrices) > 1:
        raise w.child("landcover").error("more than one matrix class", found=[classes[i]["name"] for i in matrices])
    mi = matrices[0] if matrices else int(np.argmax([c["share"] for c in classes]))
    classes[mi]["share"] += max(0.0, 1.0 - total)
    landcover = [LandCover(c["name"], c["material"], c["share"], c["mix"], c["mix_share"]) for c in classes]

    structures: dict[str, StructureSpec] = {}
    for kind, table in top["structures"].items():
        kw = w.child("structures").child(kind)
        if kind not in ALL_TYPES:
            raise kw.error("unknown structure type", expected=", ".join(ALL_TYPES), found=kind)
        structures[kind] = _structure(kind, table, kw, materials)

    labels = None if top["labels"] is None else parse_label_rule(top["labels"], w.child("labels"))
    return Recipe(
        name,
        w.source,
        description=top["description"],
        materials=materials,
        landcover=landcover,
        terrain=terrain,
        sensor=sensor,
        structures=structures,
        labels=labels,
    )
