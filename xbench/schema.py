"""One schema for every config file: declared fields, one validator, one error format.

Recipes, label rules, task files, gate files and explainer/metric settings declare their keys as
:class:`Field` objects and are checked by :func:`check_table`. Every error has the same one-line form::

    tasks/demo.toml line 12, key data.presence.road: out of range (expected a number in [0, 1], found 1.5)

The line is found in the file's text (TOML parsers do not report where a key stands), so an error in a task
file points at the line to fix. A foundation module like ``errors.py``: every stage may import it.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xbench.errors import XbenchInputError, load_toml
from xbench.names import RENAMED

_REQUIRED = object()
KINDS = ("int", "number", "str", "bool", "list", "table", "range", "any")


@dataclass(frozen=True)
class Field:
    """One key of a config table.

    ``kind``: ``int``, ``number`` (int or float), ``str``, ``bool``, ``list`` (items checked by ``item``),
    ``table`` (a TOML table, checked by ``check`` if given), ``range`` (``[low, high]`` numbers with
    low <= high, each checked like a number) or ``any``. ``low``/``high`` bound numbers (inclusive unless
    ``low_open``/``high_open``); ``choices`` lists the allowed values; ``nullable`` admits ``None`` (a
    setting left to the runtime, e.g. a layer name chosen by the model). ``check`` is an extra rule that
    returns the cleaned value or raises through ``where.error``.
    """

    kind: str
    default: Any = _REQUIRED
    doc: str = ""
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[Any, ...] | None = None
    item: Field | None = None
    min_len: int = 0
    max_len: int | None = None
    nullable: bool = False
    check: Callable[[Any, Where], Any] | None = None

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"Field kind {self.kind!r} is not one of {KINDS}")

    @property
    def required(self) -> bool:
        return self.default is _REQUIRED

    def expected(self) -> str:
        """A readable description of what the field accepts, used in error messages and listings."""
        if self.choices is not None:
            return "one of " + ", ".join(repr(c) if isinstance(c, str) else str(c) for c in self.choices)
        noun = {
            "int": "an integer",
            "number": "a number",
            "str": "a string",
            "bool": "true or false",
            "list": "a list",
            "table": "a table",
            "range": "a range [low, high]",
            "any": "a value",
        }[self.kind]
        if self.kind == "list" and self.item is not None:
            noun = f"a list of {self.item.expected().removeprefix('a ').removeprefix('an ')}"
            if self.min_len:
                noun += f" (at least {self.min_len})"
        bounds = _bounds_text(self)
        if bounds:
            noun += (" with values " if self.kind == "range" else " ") + bounds
        if self.nullable:
            noun += " or nothing"
        return noun


def _bounds_text(f: Field) -> str:
    if f.low is None and f.high is None:
        return ""
    if f.low is not None and f.high is not None:
        left = "(" if f.low_open else "["
        right = ")" if f.high_open else "]"
        return f"in {left}{f.low:g}, {f.high:g}{right}"
    if f.low is not None:
        return f"{'>' if f.low_open else '>='} {f.low:g}"
    return f"{'<' if f.high_open else '<='} {f.high:g}"


@dataclass(frozen=True)
class Where:
    """Where a value stands: a file (or another source, e.g. ``settings of explainer 'rise'``), its dotted
    key path, and the file's text for finding the line."""

    source: str
    key: str = ""
    text: str | None = field(default=None, repr=False)

    @classmethod
    def of_file(cls, path: str | Path) -> Where:
        p = Path(path)
        try:
            text = p.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            text = None
        return cls(str(path), "", text)

    def child(self, key: str | int) -> Where:
        if isinstance(key, int):
            return Where(self.source, f"{self.key}[{key}]", self.text)
        part = key if _BARE.fullmatch(key) else f'"{key}"'
        return Where(self.source, f"{self.key}.{part}" if self.key else part, self.text)

    @property
    def line(self) -> int | None:
        return find_line(self.text, self.key) if self.text and self.key else None

    def __str__(self) -> str:
        text = self.source
        line = self.line
        if line is not None:
            text += f" line {line}"
        if self.key:
            text += f", key {self.key}"
        return text

    def error(self, problem: str, expected: str | None = None, found: Any = None) -> XbenchInputError:
        """The one error format: ``SOURCE line L, key K: problem (expected E, found F)``."""
        return XbenchInputError(str(self), problem, expected=expected, found=found)


_BARE = re.compile(r"[A-Za-z0-9_-]+")
_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_ASSIGN = re.compile(
    r'^\s*((?:"[^"]*"|\'[^\']*\'|[A-Za-z0-9_-]+)(?:\s*\.\s*(?:"[^"]*"|\'[^\']*\'|[A-Za-z0-9_-]+))*)\s*='
)


def _split_key(text: str) -> list[str]:
    parts = re.findall(r'"([^"]*)"|\'([^\']*)\'|([A-Za-z0-9_-]+)', text)
    return [a or b or c for a, b, c in parts]


def _path_parts(key: str) -> list[str]:
    """``models[1].kind`` -> ``['models', '[1]', 'kind']``."""
    out: list[str] = []
    for m in re.finditer(r'"([^"]*)"|([A-Za-z0-9_-]+)|\[(\d+)\]', key):
        if m.group(3) is not None:
            out.append(f"[{m.group(3)}]")
        else:
            out.append(m.group(1) if m.group(1) is not None else m.group(2))
    return out


def find_line(text: str | None, key: str) -> int | None:
    """The 1-based line of ``key`` (dotted, with ``[i]`` for array-of-table items) in TOML ``text``: the
    line that assigns it, else the header of the table it names, else the nearest enclosing one found."""
    if not text or not key:
        return None
    target = _path_parts(key)
    prefix: list[str] = []
    counts: dict[tuple[str, ...], int] = {}
    best: tuple[int, int] | None = None  # (matched length, line) of the nearest enclosing table
    inside: int | None = None
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("#", 1)[0] if '"' not in raw and "'" not in raw else raw
        header = _HEADER.match(line)
        if header:
            names = _split_key(header.group(2))
            if header.group(1) == "[[":
                base = [*_with_indices(names[:-1], counts), names[-1]]
                idx = counts.get(tuple(base), -1) + 1
                counts[tuple(base)] = idx
                prefix = [*base, f"[{idx}]"]
            else:
                prefix = _with_indices(names, counts)
            path = prefix
        else:
            assign = _ASSIGN.match(line)
            if not assign:
                continue
            path = prefix + _split_key(assign.group(1))
        n = _common(path, target)
        if n == len(target) and len(path) == len(target):
            return number
        if n == len(target) and inside is None:
            inside = number  # the first line within the table the key names
        if n == len(path) and (best is None or n > best[0]):
            best = (n, number)
    if inside is not None:
        return inside
    return best[1] if best else None


def _with_indices(names: list[str], counts: dict[tuple[str, ...], int]) -> list[str]:
    """Insert the current array-of-tables index after each name that is such an array."""
    out: list[str] = []
    for name in names:
        out.append(name)
        if tuple(out) in counts:
            out.append(f"[{counts[tuple(out)]}]")
    return out


def _common(a: list[str], b: list[str]) -> int:
    n = 0
    for x, y in zip(a, b, strict=False):
        if x != y:
            break
        n += 1
    return n


# -- checking ------------------------------------------------------------------------------------------
def check_value(value: Any, spec: Field, where: Where) -> Any:
    """Check one value against its field; returns the cleaned value (a number keeps its int or float type)."""
    if value is None:
        if spec.nullable:
            return None
        raise where.error("missing value", expected=spec.expected())
    kind = spec.kind
    if kind == "bool":
        if not isinstance(value, bool):
            raise where.error("wrong type", expected=spec.expected(), found=value)
    elif kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise where.error("wrong type", expected=spec.expected(), found=value)
        _check_bounds(value, spec, where)
    elif kind == "number":
        value = _number(value, spec, where)
    elif kind == "str":
        if not isinstance(value, str):
            raise where.error("wrong type", expected=spec.expected(), found=value)
    elif kind == "range":
        if not isinstance(value, list | tuple) or len(value) != 2:
            raise where.error("need a range [low, high]", expected=spec.expected(), found=value)
        lo, hi = (_number(v, spec, where) for v in value)
        if lo > hi:
            raise where.error("low above high", expected="low <= high", found=list(value))
        value = [lo, hi]
    elif kind == "list":
        if isinstance(value, str | bytes) or not isinstance(value, list | tuple):
            raise where.error("wrong type", expected=spec.expected(), found=value)
        if len(value) < spec.min_len or (spec.max_len is not None and len(value) > spec.max_len):
            most = "" if spec.max_len is None else f" and at most {spec.max_len}"
            raise where.error(
                "wrong number of items", expected=f"at least {spec.min_len}{most} items", found=len(value)
            )
        if spec.item is not None:
            value = [check_value(v, spec.item, where.child(i)) for i, v in enumerate(value)]
        else:
            value = list(value)
    elif kind == "table":
        if not isinstance(value, Mapping):
            raise where.error("must be a table", expected=spec.expected(), found=type(value).__name__)
    if spec.choices is not None and value not in spec.choices:
        raise where.error("not an allowed value", expected=spec.expected(), found=value)
    if spec.check is not None:
        value = spec.check(value, where)
    return value


def _number(value: Any, spec: Field, where: Where) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise where.error("wrong type", expected=spec.expected(), found=value)
    if not math.isfinite(float(value)):
        raise where.error("not a finite number", expected=spec.expected(), found=value)
    _check_bounds(float(value), spec, where)
    return value


def _check_bounds(v: float, spec: Field, where: Where) -> None:
    too_low = spec.low is not None and (v <= spec.low if spec.low_open else v < spec.low)
    too_high = spec.high is not None and (v >= spec.high if spec.high_open else v > spec.high)
    if too_low or too_high:
        raise where.error("out of range", expected=spec.expected(), found=v)


def check_table(
    table: Any,
    schema: Mapping[str, Field],
    where: Where,
    *,
    renamed: str | None = None,
    open_keys: bool = False,
) -> dict[str, Any]:
    """Check a table against its schema: unknown keys (with the new name of a renamed one, from
    ``names.RENAMED[renamed]``), missing required keys, each value; returns the values with defaults filled.
    ``open_keys`` keeps keys the schema does not list (unchecked), for tables whose keys are data."""
    if not isinstance(table, Mapping):
        raise where.error("must be a table", expected="a table of " + ", ".join(schema), found=table)
    out: dict[str, Any] = {}
    for key, value in table.items():
        if key not in schema:
            if open_keys:
                out[key] = value
                continue
            new = RENAMED.get(renamed or "", {}).get(key)
            if new is not None:
                raise where.child(key).error(f"unknown key: '{key}' was renamed to '{new}'", expected=new, found=key)
            raise where.child(key).error(
                "unknown key", expected="one of " + ", ".join(schema) if schema else "no keys", found=key
            )
    for key, spec in schema.items():
        if key in table:
            out[key] = check_value(table[key], spec, where.child(key))
        elif spec.required:
            raise where.child(key).error("missing required key", expected=spec.expected())
        else:
            out[key] = _copy_default(spec.default)
    return out


def _copy_default(value: Any) -> Any:
    if isinstance(value, list):
        return [_copy_default(v) for v in value]
    if isinstance(value, dict):
        return {k: _copy_default(v) for k, v in value.items()}
    return value


def as_where(where: str | Where) -> Where:
    """A :class:`Where` from a plain label (e.g. ``"settings of explainer 'rise'"``) or as it is."""
    return where if isinstance(where, Where) else Where(str(where))


def load_config(path: str | Path) -> tuple[dict[str, Any], Where]:
    """Read a TOML config file; returns its data and the :class:`Where` of its top level (errors then
    name the file and line). A file that is not UTF-8 text is one clear error."""
    p = Path(path)
    data = load_toml(p)
    return data, Where.of_file(p)


def describe(schema: Mapping[str, Field]) -> list[tuple[str, str, str]]:
    """(key, default, what it accepts and means) rows for listings such as ``xbench explainers``."""
    rows = []
    for key, spec in schema.items():
        default = "required" if spec.required else repr(spec.default)
        rows.append((key, default, f"{spec.expected()}; {spec.doc}" if spec.doc else spec.expected()))
    return rows
