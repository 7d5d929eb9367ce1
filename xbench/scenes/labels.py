"""Declarative label rules over planted structures, and the spurious cue.

A label rule is parsed TOML data, never evaluated code::

    [labels]
    classes = ["intact", "road", "clearing"]
    default = "intact"
    [[labels.rule]]                 # ordered: the first matching rule wins
    class = "road"
    type = "road"                   # a structure type, or a list of types (their union)
    stat = "coverage"               # "coverage": fraction of the tile covered; "count": instances
    above = 0.01                    # strictly above this value
    [[labels.rule]]
    class = "clearing"
    type = ["clearing"]
    stat = "count"
    above = 0

A spurious cue is a faint signal switched on per tile (correlated with the label by ``synthesize``)::

    [cue]
    kind = "band-offset"            # adds ``strength`` to one band everywhere
    band = "blue"
    strength = 0.03
    # or: kind = "haze-patch", strength = 0.04, radius = 12   (a faint Gaussian haze blob)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.names import HUMAN_TYPES, STRUCTURE_TYPES
from xbench.scenes.materials import BANDS

if TYPE_CHECKING:
    from xbench.scenes.render import Scene

ALL_TYPES: tuple[str, ...] = STRUCTURE_TYPES

STATS = ("coverage", "count")


def _unknown_keys(table: dict, allowed: tuple[str, ...], where: str) -> None:
    for key in table:
        if key not in allowed:
            raise XbenchInputError(f"{where}.{key}", "unknown key", expected="one of " + ", ".join(allowed), found=key)


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise XbenchInputError(where, "not a number", expected="a finite number", found=value)
    return float(value)


@dataclass(frozen=True)
class Condition:
    """``class_name`` when the statistic of the union of ``types`` is strictly above ``above``."""

    class_name: str
    types: tuple[str, ...]
    stat: str
    above: float

    def value(self, scene: Scene) -> float:
        if self.stat == "count":
            return float(sum(1 for inst in scene.instances if inst.kind in self.types))
        cov = scene.type_coverage(list(self.types))
        return float(cov.sum(dtype=np.float64)) / cov.size

    def holds(self, scene: Scene) -> bool:
        return self.value(scene) > self.above

    def to_dict(self) -> dict[str, Any]:
        t: Any = self.types[0] if len(self.types) == 1 else list(self.types)
        return {"class": self.class_name, "type": t, "stat": self.stat, "above": self.above}


@dataclass
class LabelRule:
    """Classes, a default class and ordered conditions (the first condition that holds wins)."""

    classes: list[str]
    default: str
    rules: list[Condition] = field(default_factory=list)

    def apply(self, scene: Scene) -> int:
        for cond in self.rules:
            if cond.holds(scene):
                return self.classes.index(cond.class_name)
        return self.classes.index(self.default)

    @property
    def default_index(self) -> int:
        return self.classes.index(self.default)

    def driving_types(self, class_index: int) -> list[str]:
        """The structure types whose presence makes class ``class_index`` (empty for the default)."""
        name = self.classes[class_index]
        out: list[str] = []
        for cond in self.rules:
            if cond.class_name == name:
                out.extend(t for t in cond.types if t not in out)
        return out

    def types_used(self) -> list[str]:
        out: list[str] = []
        for cond in self.rules:
            out.extend(t for t in cond.types if t not in out)
        return out

    def to_dict(self) -> dict[str, Any]:
        return {
            "classes": list(self.classes),
            "default": self.default,
            "rule": [c.to_dict() for c in self.rules],
        }

    @property
    def text(self) -> str:
        """A one-line readable form, e.g. ``road if coverage(road) > 0.01; else intact``."""
        parts = [f"{c.class_name} if {c.stat}({'+'.join(c.types)}) > {c.above:g}" for c in self.rules]
        return "; ".join(parts + [f"else {self.default}"])


def default_label_rule(types: list[str] | tuple[str, ...] = HUMAN_TYPES) -> LabelRule:
    """``disturbed`` when any human structure is planted, else ``intact``."""
    types = tuple(t for t in types if t in HUMAN_TYPES) or HUMAN_TYPES
    return LabelRule(["intact", "disturbed"], "intact", [Condition("disturbed", types, "count", 0.0)])


def parse_label_rule(table: Any, where: str) -> LabelRule:
    """Validate a label-rule table (see module docstring); errors name ``where`` and the key."""
    if isinstance(table, LabelRule):
        return table
    if not isinstance(table, dict):
        raise XbenchInputError(where, "label rule must be a table", expected="a TOML table", found=type(table).__name__)
    _unknown_keys(table, ("classes", "default", "rule"), where)
    classes = table.get("classes")
    if not isinstance(classes, list) or len(classes) < 2 or not all(isinstance(c, str) and c for c in classes):
        raise XbenchInputError(
            f"{where}.classes",
            "need a list of at least two class names",
            expected='e.g. ["intact", "road"]',
            found=classes,
        )
    if len(set(classes)) != len(classes):
        raise XbenchInputError(f"{where}.classes", "class names repeat", found=classes)
    default = table.get("default", classes[0])
    if default not in classes:
        raise XbenchInputError(f"{where}.default", "not one of the classes", expected=", ".join(classes), found=default)
    rules_raw = table.get("rule", [])
    if isinstance(rules_raw, dict):
        rules_raw = [rules_raw]
    if not isinstance(rules_raw, list) or not rules_raw:
        raise XbenchInputError(
            f"{where}.rule",
            "need at least one [[rule]] table",
            expected="a list of {class, type, stat, above}",
            found=rules_raw,
        )
    rules: list[Condition] = []
    for i, r in enumerate(rules_raw):
        w = f"{where}.rule[{i}]"
        if not isinstance(r, dict):
            raise XbenchInputError(w, "rule must be a table", found=r)
        _unknown_keys(r, ("class", "type", "stat", "above"), w)
        for key in ("class", "type"):
            if key not in r:
                raise XbenchInputError(f"{w}.{key}", "missing key")
        cls = r["class"]
        if cls not in classes:
            raise XbenchInputError(f"{w}.class", "not one of the classes", expected=", ".join(classes), found=cls)
        if cls == default:
            raise XbenchInputError(f"{w}.class", "a rule cannot name the default class", found=cls)
        types = r["type"]
        types = [types] if isinstance(types, str) else types
        if not isinstance(types, list) or not types:
            raise XbenchInputError(f"{w}.type", "need a structure type or a list of them", found=r["type"])
        for t in types:
            if t not in ALL_TYPES:
                raise XbenchInputError(f"{w}.type", "unknown structure type", expected=", ".join(ALL_TYPES), found=t)
        stat = r.get("stat", "coverage")
        if stat not in STATS:
            raise XbenchInputError(f"{w}.stat", "unknown statistic", expected=" or ".join(STATS), found=stat)
        above = _number(r.get("above", 0.0), f"{w}.above")
        if above < 0 or (stat == "coverage" and above >= 1):
            raise XbenchInputError(
                f"{w}.above",
                "threshold out of range",
                expected="0 <= above < 1 for coverage, >= 0 for count",
                found=above,
            )
        rules.append(Condition(cls, tuple(types), stat, above))
    for c in classes:
        if c != default and not any(r.class_name == c for r in rules):
            raise XbenchInputError(
                f"{where}.rule",
                f"no rule produces class '{c}'",
                expected="one [[rule]] per non-default class",
            )
    return LabelRule(list(classes), default, rules)


# ----------------------------------------------------------------------------------------------------
# spurious cue

CUE_KINDS = ("band-offset", "haze-patch")


@dataclass(frozen=True)
class Cue:
    """A faint tile-wide signal: a band offset or a haze blob (position drawn from the scene's seed)."""

    kind: str
    strength: float
    band: str = "blue"
    radius: float = 12.0

    def to_dict(self) -> dict[str, Any]:
        d: dict[str, Any] = {"kind": self.kind, "strength": self.strength}
        if self.kind == "band-offset":
            d["band"] = self.band
        else:
            d["radius"] = self.radius
        return d


def parse_cue(table: Any, where: str) -> Cue:
    """Validate a cue table (see module docstring); errors name ``where`` and the key."""
    if isinstance(table, Cue):
        return table
    if not isinstance(table, dict):
        raise XbenchInputError(where, "cue must be a table", expected="a TOML table", found=type(table).__name__)
    _unknown_keys(table, ("kind", "band", "strength", "radius"), where)
    kind = table.get("kind", "band-offset")
    if kind not in CUE_KINDS:
        raise XbenchInputError(f"{where}.kind", "unknown cue kind", expected=" or ".join(CUE_KINDS), found=kind)
    strength = _number(table.get("strength", 0.03), f"{where}.strength")
    if not 0 < strength <= 0.5:
        raise XbenchInputError(f"{where}.strength", "out of range", expected="0 < strength <= 0.5", found=strength)
    band = table.get("band", "blue")
    if band not in BANDS:
        raise XbenchInputError(f"{where}.band", "unknown band", expected=", ".join(BANDS), found=band)
    radius = _number(table.get("radius", 12.0), f"{where}.radius")
    if radius <= 0:
        raise XbenchInputError(f"{where}.radius", "must be positive", found=radius)
    if kind == "band-offset" and "radius" in table:
        raise XbenchInputError(f"{where}.radius", "only a haze-patch cue has a radius", found=radius)
    if kind == "haze-patch" and "band" in table:
        raise XbenchInputError(f"{where}.band", "only a band-offset cue has a band", found=band)
    return Cue(kind, strength, band, radius)
