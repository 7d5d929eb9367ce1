"""Faithfulness regression gates: compare a run folder with a baseline run folder under declared gates.

A *gate file* (TOML, data only) says what must hold for every (task, model, explainer, metric, truth)
group of a run::

    [settings]                 # optional
    alpha = 0.05               # significance level of the paired tests
    correction = "none"        # or "holm": Holm step-down over all paired tests of one check
    min_pairs = 8              # fewer paired values than this: the paired test is skipped
    tolerance = 1e-9           # changes this small count as no change (float noise)

    [default]                  # applies to every metric unless a [[gate]] says otherwise
    max_drop = 0.02            # largest allowed worsening of the mean, in the metric's units
    paired_test = true         # per-tile values must not be significantly worse than the baseline's

    [[gate]]                   # a rule for some groups; selectors are a string or a list of strings
    metric = "pointing-game"   # selectors: task, model, explainer, metric, truth (omitted = any)
    explainer = "oracle"
    truth = "planted"
    at_least = 0.9             # the current mean must be >= 0.9

Rule keys (in ``[default]`` and ``[[gate]]``): ``at_least``, ``at_most`` (absolute bounds on the current
mean), ``max_drop`` (absolute worsening allowed), ``max_relative_drop`` (worsening as a fraction of
``|baseline mean|``), ``paired_test`` (bool), ``alpha`` (overrides the setting), ``higher_is_better``
(for metrics the registry does not know), ``allow_missing`` (a group in the baseline may be absent from
the current run), ``skip`` (no gates at all). A threshold set to ``false`` switches it off. Rules merge in
order: ``[default]``, then the matching ``[[gate]]`` tables from the least to the most specific (the
number of selectors given), file order among equals; later keys win.

"Worse" follows each metric's own direction (``higher_is_better`` from :func:`xbench.metrics.get_metric`):
a drop for higher-is-better metrics, a rise for lower-is-better ones, and any change in either direction
for metrics without a preferred direction. Means are taken over tiles within each seed, then over seeds
(NaN values ignored). The paired test is the Wilcoxon signed-rank test (scipy.stats.wilcoxon), one-sided
in the worsening direction, on per-tile values paired by (model, seed, tile).

Core functions are pure on data frames; :func:`load_records` and :func:`load_gates` are the I/O edge.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xbench.api import make_module_callable
from xbench.errors import XbenchInputError

RECORD_COLUMNS = ("run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value")
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


# ----------------------------------------------------------------------------------------- gate files
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


# ------------------------------------------------------------------------------------------ records
def load_records(run_dir: str | Path, role: str = "run") -> pd.DataFrame:
    """Read a run folder's ``records.parquet`` (or ``records.csv``); errors name the folder and file."""
    run_dir = Path(run_dir)
    if not run_dir.exists():
        raise XbenchInputError(str(run_dir), f"{role} run folder not found")
    if not run_dir.is_dir():
        raise XbenchInputError(str(run_dir), f"{role} run folder is not a folder")
    parquet, csv = run_dir / "records.parquet", run_dir / "records.csv"
    if parquet.is_file():
        try:
            frame = pd.read_parquet(parquet)
        except Exception as exc:  # noqa: BLE001 - any reader failure is bad input here
            problem = f"cannot read records ({type(exc).__name__}: {exc})"
            raise XbenchInputError(str(parquet), problem) from None
        source = parquet
    elif csv.is_file():
        try:
            frame = pd.read_csv(csv, keep_default_na=True, dtype={"truth": str, "run_id": str})
        except Exception as exc:  # noqa: BLE001
            raise XbenchInputError(str(csv), f"cannot read records ({type(exc).__name__}: {exc})") from None
        source = csv
    else:
        raise XbenchInputError(str(run_dir), f"no records.parquet (or records.csv) in the {role} run folder")
    return validate_records(frame, str(source))


def validate_records(frame: pd.DataFrame, where: str = "records") -> pd.DataFrame:
    """Check the record columns and normalise their types (a copy)."""
    missing = [c for c in RECORD_COLUMNS if c not in frame.columns and c != "run_id"]
    if missing:
        raise XbenchInputError(
            where, "missing record columns", expected=", ".join(RECORD_COLUMNS), found=sorted(frame.columns)
        )
    out = frame.loc[:, [c for c in RECORD_COLUMNS if c in frame.columns]].copy()
    for c in GROUP_KEYS:
        out[c] = out[c].fillna("none").astype(str)
    try:
        out["seed"] = pd.to_numeric(out["seed"]).astype("int64")
        out["tile"] = pd.to_numeric(out["tile"]).astype("int64")
        out["value"] = pd.to_numeric(out["value"]).astype("float64")
    except (ValueError, TypeError) as exc:
        raise XbenchInputError(where, f"seed, tile and value must be numeric ({exc})") from None
    return out


def _as_records(run: str | Path | pd.DataFrame | None, role: str) -> pd.DataFrame | None:
    if run is None:
        return None
    if isinstance(run, pd.DataFrame):
        return validate_records(run, f"{role} records")
    return load_records(run, role)


# --------------------------------------------------------------------------------------- comparison
@dataclass
class GateOutcome:
    """One gate applied to one group: a row of the table, a testcase in JUnit."""

    task: str
    model: str
    explainer: str
    metric: str
    truth: str
    check: str  # one of CHECK_ORDER
    status: str  # "pass" | "fail" | "skip"
    limit: float | None = None
    baseline: float | None = None
    current: float | None = None
    difference: float | None = None  # current - baseline
    p_value: float | None = None
    n_pairs: int | None = None
    message: str = ""

    @property
    def group(self) -> tuple[str, ...]:
        return (self.task, self.model, self.explainer, self.metric, self.truth)

    @property
    def name(self) -> str:
        where = f"{self.task}/{self.model}/{self.explainer}/{self.metric}[{self.truth}]"
        return f"{where} {CHECK_LABEL[self.check]}"


@dataclass
class CheckResult:
    outcomes: list[GateOutcome]
    baseline: str | None
    current: str
    gates: str
    settings: Settings
    warnings: list[str] = field(default_factory=list)

    @property
    def failures(self) -> list[GateOutcome]:
        return [o for o in self.outcomes if o.status == "fail"]

    @property
    def passed(self) -> bool:
        return not self.failures

    def counts(self) -> dict[str, int]:
        c = {"gates": len(self.outcomes), "passed": 0, "failed": 0, "skipped": 0}
        for o in self.outcomes:
            c[{"pass": "passed", "fail": "failed", "skip": "skipped"}[o.status]] += 1
        return c

    def summary_line(self) -> str:
        c = self.counts()
        verdict = "all gates pass" if self.passed else f"{c['failed']} FAILED"
        return (
            f"xbench check: {verdict} ({c['gates']} gates: {c['passed']} passed, {c['failed']} failed, "
            f"{c['skipped']} skipped)"
        )

    def table(self, only_failures: bool = False) -> str:
        return format_table(self, only_failures=only_failures)

    def to_json(self) -> dict[str, Any]:
        return summary_json(self)

    def to_junit(self) -> str:
        return junit_xml(self)


def _metric_info(metric: str) -> tuple[bool | None, tuple[float, float] | None, bool]:
    """(higher_is_better, value_range, known) from the metric registry; unknown -> (None, None, False)."""
    try:
        from xbench.metrics import get_metric
    except Exception:  # noqa: BLE001 - the registry may be absent in a minimal install
        return None, None, False
    try:
        m = get_metric(metric)
    except Exception:  # noqa: BLE001 - unknown key (XbenchInputError, KeyError...)
        return None, None, False
    hib = getattr(m, "higher_is_better", None)
    rng = getattr(m, "value_range", None)
    try:
        rng = (float(rng[0]), float(rng[1])) if rng is not None else None
    except (TypeError, ValueError, IndexError):
        rng = None
    return (None if hib is None else bool(hib)), rng, True


def _group_mean(values: pd.DataFrame) -> tuple[float, int]:
    """Mean over tiles within each seed, then over seeds; NaN ignored. Returns (mean, finite count)."""
    finite = values[np.isfinite(values["value"].to_numpy())]
    if finite.empty:
        return float("nan"), 0
    per_seed = finite.groupby("seed")["value"].mean()
    return float(per_seed.mean()), int(len(finite))


def _is_on(value: Any) -> bool:
    """A rule value that asks for a check: a threshold (0 included) or true; not None or false."""
    return value is not None and value is not False


def _worsening(diff: float, hib: bool | None) -> float:
    """How much worse current is than baseline (negative = better); any change when no direction."""
    if hib is None:
        return abs(diff)
    return -diff if hib else diff


def _fmt(v: float | None) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "-"
    if isinstance(v, float) and math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.4g}"


def _paired_test(
    cur: pd.DataFrame, base: pd.DataFrame, hib: bool | None, tolerance: float
) -> tuple[float | None, int, str]:
    """One-sided Wilcoxon signed-rank p-value for "current is worse", pairs by (seed, tile)."""
    a = cur.groupby(list(PAIR_KEYS))["value"].mean()
    b = base.groupby(list(PAIR_KEYS))["value"].mean()
    joined = pd.concat([a.rename("cur"), b.rename("base")], axis=1, join="inner")
    joined = joined[np.isfinite(joined["cur"].to_numpy()) & np.isfinite(joined["base"].to_numpy())]
    n = len(joined)
    if n == 0:
        return None, 0, "no paired finite values"
    d = (joined["cur"] - joined["base"]).to_numpy(dtype=float, copy=True)
    d[np.abs(d) <= tolerance] = 0.0
    if not np.any(d):
        return 1.0, n, "identical per-tile values"
    # worsening direction: current < baseline for higher-is-better, current > baseline for lower-is-better
    alternative = "two-sided" if hib is None else ("less" if hib else "greater")
    from scipy.stats import wilcoxon

    res = wilcoxon(d, alternative=alternative, zero_method="wilcox")
    p = float(res.pvalue)
    return p, n, ""


def _holm(pvalues: list[float]) -> list[float]:
    """Holm step-down adjusted p-values (Holm 1979), monotone and capped at 1."""
    m = len(pvalues)
    order = sorted(range(m), key=lambda i: pvalues[i])
    adjusted = [0.0] * m
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (m - rank) * pvalues[i]))
        adjusted[i] = running
    return adjusted


def compare(
    current: str | Path | pd.DataFrame,
    baseline: str | Path | pd.DataFrame | None = None,
    gates: str | Path | dict | GateSpec | None = None,
) -> CheckResult:
    """Apply gates to ``current`` (a run folder or records frame), against ``baseline`` when given.

    Without a baseline only the absolute gates (``at_least``, ``at_most``) are applied.
    """
    spec = load_gates(gates)
    cur = _as_records(current, "current")
    base = _as_records(baseline, "baseline")
    settings = spec.settings
    tol = settings.tolerance

    cur_groups = {k: g for k, g in cur.groupby(list(GROUP_KEYS), sort=True)}
    base_groups = {k: g for k, g in base.groupby(list(GROUP_KEYS), sort=True)} if base is not None else {}
    keys = sorted(set(cur_groups) | set(base_groups))

    outcomes: list[GateOutcome] = []
    warnings: list[str] = []
    used_rules: set[int] = set()
    tests: list[tuple[GateOutcome, float, bool | None]] = []  # paired tests run: alpha, direction

    for key in keys:
        group = dict(zip(GROUP_KEYS, key, strict=True))
        for r in spec.rules:
            if r.matches(group):
                used_rules.add(r.index)
        rule = spec.rule_for(group)
        if rule.get("skip"):
            continue
        hib_rule = rule.get("higher_is_better")
        hib, vrange, known = _metric_info(group["metric"])
        if hib_rule is not None:
            hib = hib_rule

        def row(check: str, status: str, message: str = "", **kw: Any) -> GateOutcome:
            o = GateOutcome(**group, check=check, status=status, message=message, **kw)  # noqa: B023
            outcomes.append(o)
            return o

        g_cur, g_base = cur_groups.get(key), base_groups.get(key)
        if base is not None and g_cur is None:
            if rule.get("allow_missing"):
                row("present", "skip", "in the baseline, not in the current run (allowed)")
            else:
                row("present", "fail", "in the baseline, missing from the current run")
            continue
        c_mean, c_n = _group_mean(g_cur)
        b_mean, _ = _group_mean(g_base) if g_base is not None else (float("nan"), 0)
        has_base = g_base is not None
        diff = c_mean - b_mean if has_base else None

        for check, key_name in (("at-least", "at_least"), ("at-most", "at_most")):
            limit = rule.get(key_name)
            if not _is_on(limit):
                continue
            if vrange is not None and not (vrange[0] <= limit <= vrange[1]):
                raise XbenchInputError(
                    f"{spec.source}, gate '{key_name}' for metric '{group['metric']}'",
                    "threshold outside the metric's value range",
                    expected=f"a value in [{vrange[0]}, {vrange[1]}]",
                    found=limit,
                )
            kw = dict(limit=limit, current=c_mean, baseline=b_mean if has_base else None, difference=diff)
            if c_n == 0:
                row(check, "fail", "no finite value in the current run", **kw)
            elif (c_mean >= limit - tol) if check == "at-least" else (c_mean <= limit + tol):
                row(check, "pass", **kw)
            else:
                rel = "below" if check == "at-least" else "above"
                row(check, "fail", f"mean {_fmt(c_mean)} is {rel} {_fmt(limit)}", **kw)

        relative_checks = [c for c, k in RELATIVE_CHECKS if _is_on(rule.get(k))]
        if not has_base:
            if base is not None:  # without any baseline, only absolute gates apply
                for check in relative_checks:
                    row(check, "skip", "not in the baseline (new in the current run)", current=c_mean)
            continue

        needs_direction = bool(relative_checks)
        if needs_direction and hib is None and not known and hib_rule is None:
            raise XbenchInputError(
                f"{spec.source}, metric '{group['metric']}'",
                "the metric registry does not know this metric, so 'worse' is undefined; "
                "set higher_is_better in a [[gate]] for it (or skip = true)",
            )
        direction = "higher is better" if hib else ("lower is better" if hib is False else "no direction")

        both_undefined = c_n == 0 and not np.isfinite(b_mean)
        for check, key_name in (("max-drop", "max_drop"), ("max-relative-drop", "max_relative_drop")):
            limit = rule.get(key_name)
            if not _is_on(limit):
                continue
            kw = dict(limit=limit, baseline=b_mean, current=c_mean, difference=diff)
            if both_undefined:
                row(check, "skip", "undefined (NaN) in both runs", **kw)
            elif c_n == 0:
                row(check, "fail", "no finite value in the current run (the baseline has some)", **kw)
            elif not np.isfinite(b_mean):
                row(check, "skip", "undefined (NaN) in the baseline", **kw)
            else:
                worse = _worsening(diff, hib)
                if check == "max-drop":
                    amount = worse
                else:
                    amount = worse / abs(b_mean) if abs(b_mean) > tol else (math.inf if worse > tol else 0.0)
                if amount <= limit + tol:
                    row(check, "pass", **kw)
                else:
                    unit = "" if check == "max-drop" else f" ({amount:.1%} of the baseline)"
                    row(
                        check,
                        "fail",
                        f"worse by {_fmt(worse)}{unit}, more than the allowed "
                        f"{_fmt(limit) if check == 'max-drop' else f'{limit:.1%}'} ({direction})",
                        **kw,
                    )

        if rule.get("paired_test"):
            alpha = rule.get("alpha", settings.alpha)
            kw = dict(limit=alpha, baseline=b_mean, current=c_mean, difference=diff)
            p, n, note = _paired_test(g_cur, g_base, hib, tol)
            if p is None:
                row("paired-test", "skip", note, n_pairs=n, **kw)
            elif n < settings.min_pairs and note == "":
                row(
                    "paired-test",
                    "skip",
                    f"only {n} pairs (min_pairs = {settings.min_pairs})",
                    n_pairs=n,
                    p_value=p,
                    **kw,
                )
            else:
                o = row(
                    "paired-test",
                    "pass",
                    note or ("one-sided" if hib is not None else "two-sided"),
                    n_pairs=n,
                    p_value=p,
                    **kw,
                )
                if note == "":
                    tests.append((o, alpha, hib))

    if settings.correction == "holm" and tests:
        adjusted = _holm([o.p_value for o, _, _ in tests])
        for (o, _, _), p in zip(tests, adjusted, strict=True):
            o.p_value = p
            o.message += ", Holm-adjusted"
    for o, alpha, hib in tests:
        if o.p_value < alpha:
            way = "lower" if hib else ("higher" if hib is False else "different")
            o.status = "fail"
            o.message = (
                f"per-tile values significantly {way} than the baseline's "
                f"(Wilcoxon, {o.message}, p = {_fmt(o.p_value)} < {_fmt(alpha)})"
            )

    for r in spec.rules:
        if r.selectors and r.index not in used_rules:
            sel = ", ".join(f"{k} = {'|'.join(v)}" for k, v in r.selectors.items())
            warnings.append(f"{spec.source}: {r.label} ({sel}) matched no records")

    order = {c: i for i, c in enumerate(CHECK_ORDER)}
    outcomes.sort(key=lambda o: (o.group, order[o.check]))
    return CheckResult(
        outcomes=outcomes,
        baseline=None
        if baseline is None
        else (str(baseline) if not isinstance(baseline, pd.DataFrame) else "<records>"),
        current=str(current) if not isinstance(current, pd.DataFrame) else "<records>",
        gates=spec.source,
        settings=settings,
        warnings=warnings,
    )


# ------------------------------------------------------------------------------------------ outputs
def format_table(result: CheckResult, only_failures: bool = False) -> str:
    """A plain-text table, one block per (task, model), failures marked FAIL."""
    lines = [result.summary_line()]
    src = f"current {result.current}"
    if result.baseline is not None:
        src = f"baseline {result.baseline}  ·  " + src
    lines.append(f"{src}  ·  gates {result.gates}")
    rows = [o for o in result.outcomes if o.status == "fail" or not only_failures]
    header = (
        "result",
        "explainer",
        "metric",
        "truth",
        "gate",
        "limit",
        "baseline",
        "current",
        "change",
        "p",
        "n",
        "note",
    )
    blocks: dict[tuple[str, str], list[tuple[str, ...]]] = {}
    for o in rows:
        limit = o.limit
        limit_s = (
            f"{limit:.1%}"
            if o.check == "max-relative-drop" and limit is not None
            else (f"p<{_fmt(limit)}" if o.check == "paired-test" else _fmt(limit))
        )
        change = "-" if o.difference is None or not np.isfinite(o.difference) else f"{o.difference:+.4g}"
        blocks.setdefault((o.task, o.model), []).append(
            (
                {"pass": "ok", "fail": "FAIL", "skip": "skip"}[o.status],
                o.explainer,
                o.metric,
                o.truth,
                CHECK_LABEL[o.check],
                limit_s,
                _fmt(o.baseline),
                _fmt(o.current),
                change,
                _fmt(o.p_value),
                "-" if o.n_pairs is None else str(o.n_pairs),
                o.message,
            )
        )
    all_rows = [header] + [r for b in blocks.values() for r in b]
    widths = [max(len(r[i]) for r in all_rows) for i in range(len(header) - 1)]
    numeric = {5, 6, 7, 8, 9, 10}

    def fmt_row(r: tuple[str, ...]) -> str:
        cells = [r[i].rjust(widths[i]) if i in numeric else r[i].ljust(widths[i]) for i in range(len(r) - 1)]
        return ("  ".join(cells) + ("  " + r[-1] if r[-1] else "")).rstrip()

    for (task, model), block in blocks.items():
        lines.append("")
        lines.append(f"task {task} · model {model}")
        lines.append("  " + fmt_row(header))
        lines.extend("  " + fmt_row(r) for r in block)
    if not rows:
        lines.append("")
        lines.append("(no failing gates)" if only_failures and result.outcomes else "(no gates applied)")
    for w in result.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)


def _json_number(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def summary_json(result: CheckResult) -> dict[str, Any]:
    """A JSON-serialisable summary (NaN and infinities become null)."""
    gates = []
    for o in result.outcomes:
        d = {k: v for k, v in asdict(o).items()}
        for k in ("limit", "baseline", "current", "difference", "p_value"):
            d[k] = _json_number(d[k])
        d["name"] = o.name
        gates.append(d)
    return {
        "passed": result.passed,
        "counts": result.counts(),
        "baseline": result.baseline,
        "current": result.current,
        "gates_file": result.gates,
        "settings": asdict(result.settings),
        "warnings": list(result.warnings),
        "failures": [o.name for o in result.failures],
        "gates": gates,
    }


def junit_xml(result: CheckResult, suite_name: str = "xbench check") -> str:
    """JUnit XML: one testcase per gate; failing gates carry a <failure>, skipped ones a <skipped>."""
    import xml.etree.ElementTree as ET

    c = result.counts()
    suites = ET.Element(
        "testsuites",
        name=suite_name,
        tests=str(c["gates"]),
        failures=str(c["failed"]),
        errors="0",
        skipped=str(c["skipped"]),
    )
    suite = ET.SubElement(
        suites,
        "testsuite",
        name=suite_name,
        tests=str(c["gates"]),
        failures=str(c["failed"]),
        errors="0",
        skipped=str(c["skipped"]),
    )
    props = ET.SubElement(suite, "properties")
    for k, v in (("baseline", result.baseline), ("current", result.current), ("gates", result.gates)):
        ET.SubElement(props, "property", name=k, value=str(v))
    for o in result.outcomes:
        case = ET.SubElement(
            suite,
            "testcase",
            classname=f"xbench.{o.task}.{o.model}.{o.explainer}",
            name=f"{o.metric}[{o.truth}] {CHECK_LABEL[o.check]}",
        )
        detail = (
            f"limit {_fmt(o.limit)}, baseline {_fmt(o.baseline)}, current {_fmt(o.current)}, "
            f"change {_fmt(o.difference)}, p {_fmt(o.p_value)}, pairs {o.n_pairs}"
        )
        if o.status == "fail":
            f = ET.SubElement(case, "failure", message=o.message, type=o.check)
            f.text = detail
        elif o.status == "skip":
            ET.SubElement(case, "skipped", message=o.message)
    ET.indent(suites)
    return ET.tostring(suites, encoding="unicode", xml_declaration=True) + "\n"


def write_outputs(
    result: CheckResult, json_path: str | Path | None = None, junit_path: str | Path | None = None
) -> None:
    """Write the JSON summary and/or JUnit XML files (folders are created)."""
    if json_path is not None:
        p = Path(json_path)
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(json.dumps(summary_json(result), indent=2) + "\n", encoding="utf-8")
    if junit_path is not None:
        p = Path(junit_path)
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(junit_xml(result), encoding="utf-8")


# -------------------------------------------------------------------------------- assertion helper
def assert_faithful(
    run_dir: str | Path | pd.DataFrame,
    gates: str | Path | dict | GateSpec | None = None,
    baseline: str | Path | pd.DataFrame | None = None,
) -> CheckResult:
    """Apply gates to a run (absolute gates only without a baseline); raise AssertionError with the table.

    ``gates`` is a gate file path, gate data shaped like the TOML (``{"default": {...}, "gate": [...]}``)
    or None for the built-in gates. Returns the :class:`CheckResult` when every gate passes.
    """
    __tracebackhide__ = True
    result = compare(run_dir, baseline=baseline, gates=gates)
    if not result.outcomes:
        raise AssertionError("xbench: no gate applied to this run (check the gate selectors)\n" + result.table())
    if not result.passed:
        raise AssertionError(result.table())
    return result


# `xbench.check(...)` is also the front door's verb (see xbench.api.make_module_callable).
make_module_callable(__name__, "check")
