"""Apply the gates: one :class:`GateOutcome` per (group, check), gathered in a :class:`CheckResult`."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypedDict, TypeGuard

import numpy as np
import pandas as pd

from xbench.check.gates import (
    CHECK_LABEL,
    CHECK_ORDER,
    GROUP_KEYS,
    PAIR_KEYS,
    RELATIVE_CHECKS,
    GateSpec,
    Settings,
    load_gates,
)
from xbench.check.manifests import ManifestChange, manifest_changes, read_manifest
from xbench.check.records import _as_records
from xbench.errors import XbenchInputError
from xbench.stats import holm, wilcoxon_paired


class _Figures(TypedDict):
    """The numbers every gate outcome of one group reports (keyword arguments of GateOutcome)."""

    limit: float | None
    baseline: float | None
    current: float | None
    difference: float | None


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
    changes: list[ManifestChange] = field(default_factory=list)  # baseline -> current manifest differences
    manifests_compared: bool = False
    skipped_missing: dict[str, list[str]] = field(default_factory=dict)  # explainers / metrics absent, allowed

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
        from xbench.check.output import format_table

        return format_table(self, only_failures=only_failures)

    def to_json(self) -> dict[str, Any]:
        from xbench.check.output import summary_json

        return summary_json(self)

    def to_junit(self) -> str:
        from xbench.check.output import junit_xml

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


def _is_on(value: Any) -> TypeGuard[float]:
    """A rule value that asks for a check: a threshold (0 included) or true; not None or false.

    Narrows to ``float`` for the type checker: a threshold is a number and ``true`` is an int (bool)."""
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
    cur: pd.DataFrame, base: pd.DataFrame, hib: bool | None, tolerance: float, margin: float = 0.0
) -> tuple[float | None, int, str]:
    """One-sided Wilcoxon signed-rank p-value for "current is worse by more than ``margin``", pairs by (seed, tile).

    With a margin this is a non-inferiority test read the other way round: the per-tile worsening is
    shifted by the declared margin before the test, so the null hypothesis is "worse by at most the margin"
    and a consistent worsening inside the margin can never be significant (all shifted differences are then
    on the good side). Without a direction the test stays two-sided on the unshifted differences.
    """
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
    if hib is not None and margin > 0:
        d = d + margin if hib else d - margin  # worsening beyond the margin keeps its sign, inside it flips
        d[np.abs(d) <= tolerance] = 0.0
    # worsening direction: current < baseline for higher-is-better, current > baseline for lower-is-better
    alternative = "two-sided" if hib is None else ("less" if hib else "greater")
    p = wilcoxon_paired(d, np.zeros_like(d), alternative=alternative, zero_method="wilcox").p_value
    return p, n, ""


def compare(
    current: str | Path | pd.DataFrame,
    baseline: str | Path | pd.DataFrame | None = None,
    gates: str | Path | dict | GateSpec | None = None,
    *,
    explainers: list[str] | None = None,
    metrics: list[str] | None = None,
    allow_missing: bool = False,
) -> CheckResult:
    """Apply gates to ``current`` (a run folder or records frame), against ``baseline`` when given.

    Without a baseline only the absolute gates (``at_least``, ``at_most``) are applied. ``explainers`` and
    ``metrics`` restrict the check to those keys (an unknown key is an error); ``allow_missing`` lets groups
    of the baseline be absent from the current run (they are skipped and listed). When both are run folders
    with manifests, their differences are in ``CheckResult.changes``.
    """
    spec = load_gates(gates)
    cur_or_none = _as_records(current, "current")
    assert cur_or_none is not None  # a current run is always given
    cur: pd.DataFrame = cur_or_none
    base = _as_records(baseline, "baseline")
    settings = spec.settings
    tol = settings.tolerance
    both = cur if base is None else pd.concat([cur, base], ignore_index=True)
    _check_metric_selectors(spec, set(both["metric"]))
    for name, wanted in (("explainer", explainers), ("metric", metrics)):
        if wanted:
            present = set(both[name])
            unknown = [w for w in wanted if w not in present]
            if unknown:
                raise XbenchInputError(
                    f"--{name}s",
                    f"{name} {unknown[0]!r} is in neither run",
                    expected="one of " + ", ".join(sorted(present)),
                    found=",".join(wanted),
                )
            cur = cur[cur[name].isin(wanted)]
            base = base[base[name].isin(wanted)] if base is not None else None
    skipped_missing: dict[str, list[str]] = {}
    if base is not None:
        for name in ("explainer", "metric", "model"):
            gone = sorted(set(base[name]) - set(cur[name]))
            if gone:
                skipped_missing[name] = gone
    changes: list[ManifestChange] = []
    compared = False
    if isinstance(current, str | Path) and isinstance(baseline, str | Path):
        bm, cm = read_manifest(baseline), read_manifest(current)
        compared = bm is not None and cm is not None
        changes = manifest_changes(bm, cm)

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
            if allow_missing or rule.get("allow_missing"):
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
            kw: _Figures = dict(limit=limit, current=c_mean, baseline=b_mean if has_base else None, difference=diff)
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
            kw = _Figures(limit=limit, baseline=b_mean, current=c_mean, difference=diff)
            if both_undefined:
                row(check, "skip", "undefined (NaN) in both runs", **kw)
            elif c_n == 0:
                row(check, "fail", "no finite value in the current run (the baseline has some)", **kw)
            elif not np.isfinite(b_mean):
                row(check, "skip", "undefined (NaN) in the baseline", **kw)
            else:
                assert diff is not None  # has_base holds here (checked above), so the difference exists
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
            kw = _Figures(limit=alpha, baseline=b_mean, current=c_mean, difference=diff)
            margin = 0.0
            if _is_on(rule.get("max_drop")):
                margin = float(rule["max_drop"])
            elif _is_on(rule.get("max_relative_drop")) and np.isfinite(b_mean):
                margin = float(rule["max_relative_drop"]) * abs(b_mean)
            p, n, note = _paired_test(g_cur, g_base, hib, tol, margin if hib is not None else 0.0)
            sided = "two-sided" if hib is None else "one-sided"
            if margin > 0 and hib is not None:
                sided = f"one-sided, beyond the margin {_fmt(margin)}"
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
                    note or sided,
                    n_pairs=n,
                    p_value=p,
                    **kw,
                )
                if note == "":
                    tests.append((o, alpha, hib))

    if settings.correction == "holm" and tests:
        adjusted = holm([o.p_value for o, _, _ in tests])
        for (o, _, _), p in zip(tests, adjusted, strict=True):
            o.p_value = p
            o.message += ", Holm-adjusted"
    for o, alpha, hib in tests:
        assert o.p_value is not None  # only outcomes with a p-value are in `tests`
        if o.p_value < alpha:
            way = "lower" if hib else ("higher" if hib is False else "different")
            if "margin" in o.message:
                way = "worse" + " than the margin allows: " + ("lower" if hib else "higher")
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
        changes=changes,
        manifests_compared=compared,
        skipped_missing=skipped_missing if (allow_missing and skipped_missing) else {},
    )


def _check_metric_selectors(spec: GateSpec, in_records: set[str]) -> None:
    """A [[gate]] naming a metric that neither the registry nor the records know is a typo: an error."""
    for rule in spec.rules:
        for name in rule.selectors.get("metric", ()):
            if name in in_records:
                continue
            _, _, known = _metric_info(name)
            if not known:
                raise rule.where.child("metric").error(
                    f"unknown metric {name!r}",
                    expected="a metric of the registry or of the records: " + ", ".join(sorted(in_records)),
                    found=name,
                )
