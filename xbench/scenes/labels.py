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
from xbench.schema import Field, Where, as_where, check_table

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


def _types_field(value: Any, where: Where) -> list[str]:
    types = [value] if isinstance(value, str) else value
    if not isinstance(types, list) or not types:
        raise where.error("need a structure type or a list of them", expected=", ".join(ALL_TYPES), found=value)
    for t in types:
        if t not in ALL_TYPES:
            raise where.error("unknown structure type", expected=", ".join(ALL_TYPES), found=t)
    return list(types)


RULE_SCHEMA = {
    "classes": Field("list", item=Field("str"), min_len=2, doc="class names, the default first or named"),
    "default": Field("str", None, nullable=True, doc="the class of a tile no rule matches (default: the first)"),
    "rule": Field("any", doc="ordered [[rule]] tables; the first that holds gives the class"),
}
CONDITION_SCHEMA = {
    "class": Field("str", doc="the class this rule gives"),
    "type": Field("any", check=_types_field, doc="a structure type or a list of them"),
    "stat": Field("str", "coverage", choices=STATS, doc="coverage (area fraction) or count (instances)"),
    "above": Field("number", 0.0, low=0.0, doc="the rule holds when the statistic is strictly above this"),
}


def parse_label_rule(table: Any, where: str | Where) -> LabelRule:
    """Validate a label-rule table (see module docstring); errors name the file, line and key."""
    if isinstance(table, LabelRule):
        return table
    w = as_where(where)
    values = check_table(table, RULE_SCHEMA, w)
    classes = values["classes"]
    if not all(classes) or len(set(classes)) != len(classes):
        raise w.child("classes").error("class names must be non-empty and distinct", found=classes)
    default = values["default"] if values["default"] is not None else classes[0]
    if default not in classes:
        raise w.child("default").error("not one of the classes", expected=", ".join(classes), found=default)
    rules_raw = table.get("rule", [])
    if isinstance(rules_raw, dict):
        rules_raw = [rules_raw]
    if not isinstance(rules_raw, list) or not rules_raw:
        raise w.child("rule").error(
            "need at least one [[rule]] table", expected="a list of {class, type, stat, above}", found=rules_raw
        )
    rules: list[Condition] = []
    for i, r in enumerate(rules_raw):
        rw = w.child("rule").child(i)
        cond = check_table(r, CONDITION_SCHEMA, rw)
        cls = cond["class"]
        if cls not in classes:
            raise rw.child("class").error("not one of the classes", expected=", ".join(classes), found=cls)
        if cls == default:
            raise rw.child("class").error("a rule cannot name the default class", found=cls)
        if cond["stat"] == "coverage" and cond["above"] >= 1:
            raise rw.child("above").error(
                "threshold out of range", expected="0 <= above < 1 for coverage", found=cond["above"]
            )
        rules.append(Condition(cls, tuple(cond["type"]), cond["stat"], cond["above"]))
    for c in classes:
        if c != default and not any(r.class_name == c for r in rules):
            raise w.child("rule").error(f"no rule produces class '{c}'", expected="one [[rule]] per non-default class")
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


CUE_SCHEMA = {
    "kind": Field("str", "band-offset", choices=CUE_KINDS, doc="a band offset or a haze blob"),
    "strength": Field("number", 0.03, low=0.0, high=0.5, low_open=True, doc="reflectance added"),
    "band": Field("str", "blue", choices=tuple(BANDS), doc="band-offset only: the band offset"),
    "radius": Field("number", 12.0, low=0.0, low_open=True, doc="haze-patch only: blob radius in pixels"),
}


def parse_cue(table: Any, where: str | Where) -> Cue:
    """Validate a cue table (see module docstring); errors name the file, line and key."""
    if isinstance(table, Cue):
        return table
    w = as_where(where)
    v = check_table(table, CUE_SCHEMA, w)
    if v["kind"] == "band-offset" and "radius" in table:
        raise w.child("radius").error("only a haze-patch cue has a radius", found=v["radius"])
    if v["kind"] == "haze-patch" and "band" in table:
        raise w.child("band").error("only a band-offset cue has a band", found=v["band"])
    return Cue(v["kind"], v["strength"], v["band"], v["radius"])
