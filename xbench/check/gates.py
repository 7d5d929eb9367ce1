"""Gate files: parse and validate the TOML rules (data only) into a :class:`GateSpec`."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from xbench.errors import XbenchInputError

GROUP_KEYS = ("task", "model", "explainer", "metric", "truth")
PAIR_KEYS = ("seed", "tile")  # within a group, the model is fixed: pairs are by (model, seed, tile)

SELECTOR_KEYS = GROUP_KEYS
SETTING_KEYS = {"alpha", "correction", "min_pairs", "tolerance"}
THRESHOLD_KEYS = ("at_least", "at_most", "max_drop", "max_relative_drop")
RULE_KEYS = {*THRESHOLD_KEYS, "paired_test", "alpha", "higher_is_better", "allow_missing", "skip"}
TOP_KEYS = {"settings", "default", "gate"}

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


def _line_of(text: str | None, key: str, occurrence_after: int = 0) -> int | None:
    """Best-effort line number of ``key = ...`` in a TOML text (first one at or after a line)."""
    if not text:
        return None
    k = re.escape(key)
    name = rf"(\"{k}\"|'{k}'|{k})"
    pattern = re.compile(rf"^\s*({name}\s*=|\[\[?\s*{name}\s*[\].])")  # key = ... or a [key] header
    for number, line in enumerate(text.splitlines(), start=1):
        if number >= occurrence_after and pattern.match(line):
            return number
    return None


def _table_line(text: str | None, header: str, nth: int = 1) -> int:
    """Line of the ``nth`` occurrence of a table header such as ``[[gate]]`` (0 when unknown)."""
    if not text:
        return 0
    seen = 0
    pattern = re.compile(rf"^\s*{re.escape(header)}\s*(#.*)?$")
    for number, line in enumerate(text.splitlines(), start=1):
        if pattern.match(line):
            seen += 1
            if seen == nth:
                return number
    return 0


class _Where:
    """Builds ``file line N, [table] key 'k'`` strings for error messages."""

    def __init__(self, source: str, text: str | None):
        self.source = source
        self.text = text

    def __call__(self, table: str, key: str | None = None, header: str | None = None, nth: int = 1) -> str:
        start = _table_line(self.text, header, nth) if header else 0
        line = _line_of(self.text, key, start) if key else (start or None)
        at = f"{self.source} line {line}" if line else self.source
        if key is None:
            return f"{at}, {table}"
        return f"{at}, {table} key '{key}'"


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def _check_rule_value(where: str, key: str, v: Any) -> Any:
    if key in ("at_least", "at_most"):
        if v is False:
            return False
        if not _is_number(v):
            raise XbenchInputError(where, "wrong type", expected="a finite number or false", found=v)
        return float(v)
    if key in ("max_drop", "max_relative_drop"):
        if v is False:
            return False
        if not _is_number(v) or v < 0:
            raise XbenchInputError(where, "wrong type or value", expected="a number >= 0 or false", found=v)
        return float(v)
    if key == "alpha":
        if not _is_number(v) or not 0 < v < 1:
            raise XbenchInputError(where, "wrong type or value", expected="a number in (0, 1)", found=v)
        return float(v)
    # paired_test, higher_is_better, allow_missing, skip
    if not isinstance(v, bool):
        raise XbenchInputError(where, "wrong type", expected="true or false", found=v)
    return v


def parse_gates(data: dict[str, Any], source: str = "<gates>", text: str | None = None) -> GateSpec:
    """Validate gate data (as read from TOML) into a :class:`GateSpec`; errors name file, line and key."""
    where = _Where(source, text)
    if not isinstance(data, dict):
        raise XbenchInputError(source, "a gate file is a table", found=type(data).__name__)
    for key in data:
        if key not in TOP_KEYS:
            raise XbenchInputError(
                where("top level", key), "unknown key", expected="one of " + ", ".join(sorted(TOP_KEYS))
            )

    raw_settings = data.get("settings", {})
    if not isinstance(raw_settings, dict):
        raise XbenchInputError(where("[settings]"), "must be a table", found=raw_settings)
    settings: dict[str, Any] = {}
    for key, v in raw_settings.items():
        w = where("[settings]", key, "[settings]")
        if key not in SETTING_KEYS:
            raise XbenchInputError(w, "unknown key", expected="one of " + ", ".join(sorted(SETTING_KEYS)))
        if key == "alpha":
            settings[key] = _check_rule_value(w, "alpha", v)
        elif key == "correction":
            if v not in ("none", "holm"):
                raise XbenchInputError(w, "wrong value", expected="'none' or 'holm'", found=v)
            settings[key] = v
        elif key == "min_pairs":
            if not isinstance(v, int) or isinstance(v, bool) or v < 1:
                raise XbenchInputError(w, "wrong type or value", expected="an integer >= 1", found=v)
            settings[key] = v
        elif key == "tolerance":
            if not _is_number(v) or v < 0:
                raise XbenchInputError(w, "wrong type or value", expected="a number >= 0", found=v)
            settings[key] = float(v)

    rules: list[Rule] = []
    default = data.get("default", {})
    if not isinstance(default, dict):
        raise XbenchInputError(where("[default]"), "must be a table", found=default)
    values = {}
    for key, v in default.items():
        w = where("[default]", key, "[default]")
        if key in SELECTOR_KEYS:
            raise XbenchInputError(w, "selectors belong in a [[gate]] table, not in [default]")
        if key not in RULE_KEYS:
            raise XbenchInputError(w, "unknown key", expected="one of " + ", ".join(sorted(RULE_KEYS)))
        values[key] = _check_rule_value(w, key, v)
    rules.append(Rule(selectors={}, values=values, index=0, label="[default]"))

    gates = data.get("gate", [])
    if isinstance(gates, dict) or not isinstance(gates, list):
        raise XbenchInputError(where("'gate'"), "write gate rules as [[gate]] tables (an array of tables)")
    for i, table in enumerate(gates, start=1):
        label = f"[[gate]] {i}"
        if not isinstance(table, dict):
            raise XbenchInputError(where(label), "must be a table", found=table)
        selectors: dict[str, tuple[str, ...]] = {}
        values = {}
        for key, v in table.items():
            w = where(label, key, "[[gate]]", i)
            if key in SELECTOR_KEYS:
                items = [v] if isinstance(v, str) else v
                names_ok = isinstance(items, list) and items and all(isinstance(s, str) and s for s in items)
                if not names_ok:
                    raise XbenchInputError(w, "wrong type", expected="a name or a list of names", found=v)
                selectors[key] = tuple(items)
            elif key in RULE_KEYS:
                values[key] = _check_rule_value(w, key, v)
            else:
                raise XbenchInputError(
                    w, "unknown key", expected="one of " + ", ".join(sorted(RULE_KEYS | set(SELECTOR_KEYS)))
                )
        if not values:
            raise XbenchInputError(
                where(label, None, "[[gate]]", i),
                "a gate rule sets no gate",
                expected="at least one of " + ", ".join(sorted(RULE_KEYS)),
            )
        rules.append(Rule(selectors=selectors, values=values, index=i, label=label))
    if not any(r.values for r in rules):
        raise XbenchInputError(
            source,
            "the gate file sets no gate (an empty check would pass whatever the run holds)",
            expected="rules in [default] or at least one [[gate]] table",
        )
    return GateSpec(settings=Settings(**settings), rules=tuple(rules), source=source)


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
