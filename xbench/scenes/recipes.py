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

import copy
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError, load_toml, repo_root
from xbench.names import RENAMED, renamed_hint
from xbench.scenes.labels import ALL_TYPES, HUMAN_TYPES, LabelRule, _number, _unknown_keys, parse_label_rule
from xbench.scenes.materials import BANDS, LIBRARY, MATERIAL_KINDS, Material

# Structure schema: key -> (check, default). Checks: "prob" (0..1), "pos" (> 0), "nonneg" (>= 0),
# "range+" ([lo, hi], 0 < lo <= hi), "range01" ([lo, hi] within [0, 1]), "count" ([lo, hi] integers,
# 1 <= lo <= hi), "material" (a material name), "materials" (non-empty list of names).
COMMON: dict[str, tuple[str, Any]] = {
    "probability": ("prob", 0.0),
    "count": ("count", [1, 1]),
    "jitter": ("nonneg", 0.08),
}
SCHEMA: dict[str, dict[str, tuple[str, Any]]] = {
    "road": {
        "width": ("range+", [0.6, 1.8]),
        "paved_fraction": ("prob", 0.25),
        "paved_material": ("material", "asphalt"),
        "unpaved_material": ("material", "gravel"),
        "curvature": ("nonneg", 0.3),
        "branching": ("prob", 0.4),
        "branches": ("count0", [1, 2]),
        "branch_length": ("range+", [12.0, 40.0]),
        "avoid_water": ("prob", 0.9),
    },
    "clearing": {
        "area": ("range+", [40.0, 400.0]),
        "vertices": ("count3", [5, 8]),
        "roughness": ("nonneg", 0.22),
        "regrowth": ("range01", [0.0, 0.6]),
        "material": ("material", "slash"),
        "regrowth_material": ("material", "regrowth"),
    },
    "building": {
        "length": ("range+", [1.2, 3.0]),
        "width": ("range+", [1.0, 2.0]),
        "materials": ("materials", ["roof-red", "roof-grey"]),
        "spacing": ("range+", [2.5, 5.0]),
        "setback": ("range+", [0.5, 1.5]),
    },
    "corridor": {
        "width": ("range+", [2.0, 4.0]),
        "material": ("material", "corridor-grass"),
    },
    "field": {
        "length": ("range+", [10.0, 28.0]),
        "width": ("range+", [6.0, 16.0]),
        "materials": ("materials", ["crop", "stubble", "bare-soil"]),
        "soil_material": ("material", "bare-soil"),
        "row_period": ("range+", [2.0, 4.0]),
        "row_amplitude": ("range01", [0.15, 0.4]),
    },
    "river": {
        "width": ("range+", [1.0, 3.0]),
        "material": ("material", "river-water"),
        "meander": ("nonneg", 0.5),
    },
    "natural-gap": {
        "area": ("range+", [30.0, 300.0]),
        "vertices": ("count3", [14, 22]),
        "roughness": ("nonneg", 0.35),
        "materials": ("materials", ["windthrow", "burn-scar"]),
        "remnant": ("range01", [0.1, 0.4]),
    },
    "outcrop": {
        "area": ("range+", [6.0, 40.0]),
        "vertices": ("count3", [8, 14]),
        "roughness": ("nonneg", 0.3),
        "material": ("material", "rock"),
    },
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
            spec = self._defaults[kind] = _structure(kind, {}, f"{self.path}: structures.{kind}", self.materials)
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
            if hint:
                raise XbenchInputError(
                    f"recipe '{text}'", f"unknown recipe: {hint}", expected=RENAMED["recipe"][text], found=text
                )
            raise XbenchInputError(
                f"recipe '{text}'",
                "unknown recipe",
                expected="a file path or one of " + ", ".join(list_recipes()),
                found=text,
            )
        path = shipped
    data = load_toml(path)
    return parse_recipe(data, str(path), default_name=path.stem)


def _range(value: Any, where: str, check: str) -> list[float]:
    if not isinstance(value, list) or len(value) != 2:
        raise XbenchInputError(where, "need a range [low, high]", expected="two numbers", found=value)
    lo, hi = _number(value[0], where), _number(value[1], where)
    if check == "range+" and (lo <= 0 or hi <= 0):
        raise XbenchInputError(where, "must be positive", expected="0 < low <= high", found=value)
    if check == "range01" and not (0 <= lo <= 1 and 0 <= hi <= 1):
        raise XbenchInputError(where, "out of range", expected="values within [0, 1]", found=value)
    if lo > hi:
        raise XbenchInputError(where, "low above high", expected="low <= high", found=value)
    return [lo, hi]


def _check_value(check: str, value: Any, where: str, materials: dict[str, Material]) -> Any:
    if check == "prob":
        v = _number(value, where)
        if not 0 <= v <= 1:
            raise XbenchInputError(where, "out of range", expected="a probability in [0, 1]", found=value)
        return v
    if check in ("pos", "nonneg"):
        v = _number(value, where)
        if v < 0 or (check == "pos" and v == 0):
            raise XbenchInputError(
                where,
                "must not be negative" if v < 0 else "must be positive",
                expected="a number >= 0" if check == "nonneg" else "a number > 0",
                found=value,
            )
        return v
    if check in ("range+", "range01"):
        return _range(value, where, check)
    if check in ("count", "count0", "count3"):
        least = {"count": 1, "count0": 0, "count3": 3}[check]
        if (
            not isinstance(value, list)
            or len(value) != 2
            or not all(isinstance(v, int) and not isinstance(v, bool) for v in value)
        ):
            raise XbenchInputError(where, "need an integer range [low, high]", expected="two integers", found=value)
        if value[0] < least or value[0] > value[1]:
            raise XbenchInputError(where, "bad integer range", expected=f"{least} <= low <= high", found=value)
        return [int(value[0]), int(value[1])]
    if check == "material":
        if value not in materials:
            raise XbenchInputError(
                where, "unknown material", expected="a material of the recipe or library", found=value
            )
        return value
    if check == "materials":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not value:
            raise XbenchInputError(where, "need a list of material names", found=value)
        for v in value:
            if v not in materials:
                raise XbenchInputError(
                    where, "unknown material", expected="a material of the recipe or library", found=v
                )
        return list(value)
    raise AssertionError(check)  # pragma: no cover


def _structure(kind: str, table: Any, where: str, materials: dict[str, Material]) -> StructureSpec:
    if not isinstance(table, dict):
        raise XbenchInputError(where, "structure entry must be a table", found=table)
    schema = {**COMMON, **SCHEMA[kind]}
    _unknown_keys(table, tuple(schema), where)
    values: dict[str, Any] = {}
    for key, (check, default) in schema.items():
        raw = table.get(key, copy.deepcopy(default))
        values[key] = _check_value(check, raw, f"{where}.{key}", materials)
    return StructureSpec(
        kind,
        values.pop("probability"),
        tuple(values.pop("count")),  # type: ignore[arg-type]
        values.pop("jitter"),
        values,
    )


def _table(data: dict, key: str, where: str) -> dict:
    t = data.get(key, {})
    if not isinstance(t, dict):
        raise XbenchInputError(f"{where}: {key}", "must be a table", found=type(t).__name__)
    return t


def parse_recipe(data: dict[str, Any], where: str, default_name: str = "recipe") -> Recipe:
    """Validate recipe data (already read from TOML); ``where`` is the file name used in errors."""
    _unknown_keys(
        data,
        ("name", "description", "terrain", "sensor", "materials", "landcover", "structures", "labels"),
        f"{where}:",
    )
    name = data.get("name", default_name)
    if not isinstance(name, str) or not name:
        raise XbenchInputError(f"{where}: name", "must be a non-empty string", found=name)
    description = str(data.get("description", ""))

    # terrain and sensor
    t = _table(data, "terrain", where)
    _unknown_keys(t, ("beta", "texture_beta", "texture", "relief", "edge"), f"{where}: terrain")
    tv = {}
    for key, lo, hi in (
        ("beta", 0.5, 5.0),
        ("texture_beta", 0.5, 5.0),
        ("texture", 0.0, 0.5),
        ("relief", 0.0, 0.5),
        ("edge", 1e-3, 2.0),
    ):
        if key in t:
            v = _number(t[key], f"{where}: terrain.{key}")
            if not lo <= v <= hi:
                raise XbenchInputError(f"{where}: terrain.{key}", "out of range", expected=f"{lo} to {hi}", found=v)
            tv[key] = v
    terrain = Terrain(**tv)
    s = _table(data, "sensor", where)
    _unknown_keys(s, ("noise_sigma", "haze"), f"{where}: sensor")
    sigma_raw = s.get("noise_sigma", 0.004)
    sigmas = sigma_raw if isinstance(sigma_raw, list) else [sigma_raw] * len(BANDS)
    if len(sigmas) != len(BANDS):
        raise XbenchInputError(
            f"{where}: sensor.noise_sigma",
            "need one value or one per band",
            expected=f"{len(BANDS)} values",
            found=sigma_raw,
        )
    sig = tuple(_number(v, f"{where}: sensor.noise_sigma") for v in sigmas)
    if any(v < 0 or v > 0.1 for v in sig):
        raise XbenchInputError(f"{where}: sensor.noise_sigma", "out of range", expected="0 to 0.1", found=sigma_raw)
    haze = _number(s.get("haze", 0.015), f"{where}: sensor.haze")
    if not 0 <= haze <= 0.3:
        raise XbenchInputError(f"{where}: sensor.haze", "out of range", expected="0 to 0.3", found=haze)
    sensor = Sensor(sig, haze)

    # materials
    materials = dict(LIBRARY)
    for mname, m in _table(data, "materials", where).items():
        w = f"{where}: materials.{mname}"
        if not isinstance(m, dict):
            raise XbenchInputError(w, "material must be a table", expected="{reflectance = [...], kind = ...}", found=m)
        _unknown_keys(m, ("reflectance", "kind", "note"), w)
        refl = m.get("reflectance")
        if not isinstance(refl, list) or len(refl) != len(BANDS):
            raise XbenchInputError(
                f"{w}.reflectance",
                "need one reflectance per band",
                expected=f"{len(BANDS)} numbers ({', '.join(BANDS)})",
                found=refl,
            )
        vals = [_number(v, f"{w}.reflectance") for v in refl]
        if any(v < 0 or v > 1 for v in vals):
            raise XbenchInputError(
                f"{w}.reflectance", "reflectance out of range", expected="values in [0, 1]", found=refl
            )
        kind = m.get("kind")
        if kind not in MATERIAL_KINDS:
            raise XbenchInputError(f"{w}.kind", "unknown material kind", expected=", ".join(MATERIAL_KINDS), found=kind)
        materials[mname] = Material(mname, tuple(vals), kind, str(m.get("note", "")))

    # land cover
    lc_raw = data.get("landcover")
    if not isinstance(lc_raw, list) or not lc_raw:
        raise XbenchInputError(
            f"{where}: landcover",
            "need at least one [[landcover]] class",
            expected="a list of {name, material, share}",
            found=lc_raw,
        )
    classes: list[dict] = []
    for i, c in enumerate(lc_raw):
        w = f"{where}: landcover[{i}]"
        if not isinstance(c, dict):
            raise XbenchInputError(w, "class must be a table", found=c)
        _unknown_keys(c, ("name", "material", "share", "mix", "mix_share", "matrix"), w)
        cname = c.get("name", f"class{i}")
        w = f"{where}: landcover[{i}] ({cname})"
        for key in ("material", "mix"):
            if key in c and c[key] not in materials:
                raise XbenchInputError(
                    f"{w}.{key}",
                    "unknown material",
                    expected="a material of the recipe or library",
                    found=c[key],
                )
        if "material" not in c:
            raise XbenchInputError(f"{w}.material", "missing key")
        share = _number(c.get("share", 0.0), f"{w}.share")
        mix_share = _number(c.get("mix_share", 0.0), f"{w}.mix_share")
        if not 0 <= share <= 1:
            raise XbenchInputError(f"{w}.share", "out of range", expected="a share in [0, 1]", found=share)
        if not 0 <= mix_share <= 1:
            raise XbenchInputError(f"{w}.mix_share", "out of range", expected="a share in [0, 1]", found=mix_share)
        classes.append(
            {
                "name": cname,
                "material": c["material"],
                "share": share,
                "mix": c.get("mix"),
                "mix_share": mix_share,
                "matrix": bool(c.get("matrix", False)),
            }
        )
    total = sum(c["share"] for c in classes)
    if total > 1 + 1e-9:
        raise XbenchInputError(
            f"{where}: landcover.share",
            "shares add up to more than 1",
            expected="a sum <= 1",
            found=round(total, 6),
        )
    matrices = [i for i, c in enumerate(classes) if c["matrix"]]
    if len(matrices) > 1:
        raise XbenchInputError(
            f"{where}: landcover.matrix",
            "more than one matrix class",
            found=[classes[i]["name"] for i in matrices],
        )
    mi = matrices[0] if matrices else int(np.argmax([c["share"] for c in classes]))
    classes[mi]["share"] += max(0.0, 1.0 - total)
    landcover = [LandCover(c["name"], c["material"], c["share"], c["mix"], c["mix_share"]) for c in classes]

    # structures
    structures: dict[str, StructureSpec] = {}
    for kind, table in _table(data, "structures", where).items():
        if kind not in ALL_TYPES:
            raise XbenchInputError(
                f"{where}: structures.{kind}",
                "unknown structure type",
                expected=", ".join(ALL_TYPES),
                found=kind,
            )
        structures[kind] = _structure(kind, table, f"{where}: structures.{kind}", materials)

    labels = None
    if "labels" in data:
        labels = parse_label_rule(data["labels"], f"{where}: labels")
    return Recipe(name, where, description, materials, landcover, terrain, sensor, structures, labels)
