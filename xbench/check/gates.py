"""Gate files: parse and validate the TOML rules (data only) into a :class:`GateSpec`."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xbench.errors import XbenchInputError
from xbench.schema import Field, Where, check_table

GROUP_KEYS = ("task", "model", "explainer", "metric", "truth")
PAIR_KEYS = ("seed", "tile")  # within a group, the model is fixed: pairs are by (model, seed, tile)

SELECTOR_KEYS = GROUP_KEYS
THRESHOLD_KEYS = ("at_least", "at_most", "max_drop", "max_relative_drop")

# The gates used when no gate file is given: any worsening beyond 5 % of the baseline or a significant
# per-tile drop fails; wall-clock seconds differ between machines and are not gated.
BUILTIN_GATES: dict[str, Any] = {
    "default": {"max_relative_drop": 0.05, "paired_test": True},
    "gate": [{"metric": "seconds", "skip": True}],
}

RELATIVE_CHECKS = (("max-drop", "max_drop"), ("max-relative-drop", "max_relative_drop"), ("paired-test", "paired_test"))
CHECK_ORDER = ("present", "at-least", "at-most", "max-drop", "max-relative-drop", "paired-test")
CHECK_LABEL = {
    "present": "present",
    "at-least": "at least",
    "at-most": "at most",
    "max-drop": "max drop",
    "max-relative-drop": "max rel. drop",
    "paired-test": "paired test",
}


@dataclass(frozen=True)
class Settings:
    alpha: float = 0.05
    correction: str = "none"
    min_pairs: int = 8
    tolerance: float = 1e-9


@dataclass(frozen=True)
class Rule:
    """One ``[[gate]]`` table (or ``[default]``, which has no selectors)."""

    selectors: dict[str, tuple[str, ...]]
    values: dict[str, Any]
    index: int  # position in the file (0 = [default])
    label: str  # e.g. "[[gate]] 3" for messages
    where: Where = field(default=Where("<gates>"), compare=False)  # the table in the file, for errors

    def matches(self, group: dict[str, str]) -> bool:
        return all(group[k] in allowed for k, allowed in self.selectors.items())

    @property
    def specificity(self) -> int:
        return len(self.selectors)


@dataclass(frozen=True)
class GateSpec:
    settings: Settings
    rules: tuple[Rule, ...]
    source: str  # file name, or "<built-in gates>" / "<gates>"

    def rule_for(self, group: dict[str, str]) -> dict[str, Any]:
        """The merged rule values for one group."""
        merged: dict[str, Any] = {}
        matching = [r for r in self.rules if r.matches(group)]
        for rule in sorted(matching, key=lambda r: (r.specificity, r.index)):
            merged.update(rule.values)
        return {k: v for k, v in merged.items() if not (k in THRESHOLD_KEYS and v is False)}


def _number_or_false(*, non_negative: bool) -> Any:
    expected = "a number >= 0 or false" if non_negative else "a finite number or false"

    def check(v: Any, where: Where) -> Any:
        if v is False:
            return False
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise where.error("wrong type", expected=expected, found=v)
        if not math.isfinite(v) or (non_negative and v < 0):
            raise where.error("out of range", expected=expected, found=v)
        return float(v)

    return check


def _selector(v: Any, where: Where) -> tuple[str, ...]:
    items = [v] if isinstance(v, str) else v
    if not (isinstance(items, list) and items and all(isinstance(s, str) and s for s in items)):
        raise where.error("wrong type", expected="a name or a list of names", found=v)
    return tuple(items)


# The gate file's schema, declared once: [settings], [default] and [[gate]] tables.
SETTINGS_SCHEMA: dict[str, Field] = {
    "alpha": Field("number", 0.05, low=0.0, high=1.0, low_open=True, high_open=True, doc="paired tests' level"),
    "correction": Field("str", "none", choices=("none", "holm"), doc="multiple-testing correction of paired tests"),
    "min_pairs": Field("int", 8, low=1, doc="pairs a paired test needs at least"),
    "tolerance": Field("number", 1e-9, low=0.0, doc="differences this small count as equal"),
}
RULE_SCHEMA: dict[str, Field] = {
    "at_least": Field("any", None, check=_number_or_false(non_negative=False), doc="lowest allowed value, or false"),
    "at_most": Field("any", None, check=_number_or_false(non_negative=False), doc="highest allowed value, or false"),
    "max_drop": Field("any", None, check=_number_or_false(non_negative=True), doc="largest worsening, or false"),
    "max_relative_drop": Field(
        "any", None, check=_number_or_false(non_negative=True), doc="largest worsening as a share of the baseline"
    ),
    "paired_test": Field("bool", None, doc="a significant per-tile worsening fails"),
    "alpha": Field("number", None, low=0.0, high=1.0, low_open=True, high_open=True, doc="this rule's test level"),
    "higher_is_better": Field("bool", None, doc="the direction of a metric the registry does not know"),
    "allow_missing": Field("bool", None, doc="a group missing from the current run passes"),
    "skip": Field("bool", None, doc="the matched groups are not gated"),
}
SELECTOR_SCHEMA: dict[str, Field] = {
    key: Field("any", None, check=_selector, doc=f"a {key} name or a list of names") for key in SELECTOR_KEYS
}
GATE_SCHEMA: dict[str, Field] = {**SELECTOR_SCHEMA, **RULE_SCHEMA}
GATE_FILE_SCHEMA: dict[str, Field] = {
    "settings": Field("table", {}, doc="settings of the whole check"),
    "default": Field("table", {}, doc="rule values for every group"),
    "gate": Field("any", [], doc="[[gate]] tables: selectors and rule values"),
}
SETTING_KEYS = set(SETTINGS_SCHEMA)
RULE_KEYS = set(RULE_SCHEMA)
TOP_KEYS = set(GATE_FILE_SCHEMA)


def _given(table: dict[str, Any], checked: dict[str, Any], keys: Any) -> dict[str, Any]:
    """The checked values of the keys the table sets (no defaults), in the file's order."""
    return {k: checked[k] for k in table if k in keys}


def parse_gates(data: dict[str, Any], source: str = "<gates>", text: str | None = None) -> GateSpec:
    """Validate gate data (as read from TOML) into a :class:`GateSpec`; errors name file, line and key."""
    where = Where(source, "", text)
    top = check_table(data, GATE_FILE_SCHEMA, where)
    settings = check_table(top["settings"], SETTINGS_SCHEMA, where.child("settings"))

    w_default = where.child("default")
    for key in top["default"]:
        if key in SELECTOR_KEYS:
            raise w_default.child(key).error(
                "selectors belong in a [[gate]] table, not in [default]", expected="one of " + ", ".join(RULE_SCHEMA)
            )
    values = _given(top["default"], check_table(top["default"], RULE_SCHEMA, w_default), RULE_SCHEMA)
    rules = [Rule(selectors={}, values=values, index=0, label="[default]", where=w_default)]

    gates = top["gate"]
    if not isinstance(gates, list):
        raise where.child("gate").error(
            "write gate rules as [[gate]] tables (an array of tables)", expected="[[gate]] tables", found="[gate]"
        )
    for i, table in enumerate(gates, start=1):
        label, w = f"[[gate]] {i}", where.child("gate").child(i - 1)
        checked = check_table(table, GATE_SCHEMA, w)
        selectors = _given(table, checked, SELECTOR_SCHEMA)
        values = _given(table, checked, RULE_SCHEMA)
        if not values:
            raise w.error("a gate rule sets no gate", expected="at least one of " + ", ".join(RULE_SCHEMA), found=label)
        rules.append(Rule(selectors=selectors, values=values, index=i, label=label, where=w))
    if not any(r.values for r in rules):
        raise XbenchInputError(
            source,
            "the gate file sets no gate (an empty check would pass whatever the run holds)",
            expected="rules in [default] or at least one [[gate]] table",
        )
    numbers = {k: float(v) for k, v in settings.items() if k in ("alpha", "tolerance")}
    return GateSpec(settings=Settings(**(settings | numbers)), rules=tuple(rules), source=source)


def load_gates(gates: str | Path | dict | GateSpec | None) -> GateSpec:
    """A gate file path, gate data (a dict shaped like the TOML), a ready spec, or None (built-in gates)."""
    if gates is None:
        return parse_gates(BUILTIN_GATES, source="<built-in gates>")
    if isinstance(gates, GateSpec):
        return gates
    if isinstance(gates, dict):
        return parse_gates(gates, source="<gates>")
    path = Path(gates)
    if not path.is_file():
        raise XbenchInputError(str(path), "gate file not found")
    import tomllib

    text = path.read_text(encoding="utf-8")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:  # the message carries "(at line L, column C)"
        raise XbenchInputError(str(path), f"TOML syntax error: {exc}") from None
    return parse_gates(data, source=str(path), text=text)
