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

from pathlib import Path

import pandas as pd

from xbench.api import make_module_callable
from xbench.check.apply import CheckResult, GateOutcome, compare
from xbench.check.gates import (
    BUILTIN_GATES,
    CHECK_LABEL,
    CHECK_ORDER,
    GROUP_KEYS,
    GateSpec,
    Rule,
    Settings,
    load_gates,
    parse_gates,
)
from xbench.check.manifests import ManifestChange, manifest_changes, read_manifest
from xbench.check.output import format_table, junit_xml, summary_json, write_outputs
from xbench.check.records import load_records, validate_records
from xbench.runs.store import RECORD_COLUMNS

__all__ = [
    "BUILTIN_GATES",
    "CHECK_LABEL",
    "CHECK_ORDER",
    "GROUP_KEYS",
    "RECORD_COLUMNS",
    "CheckResult",
    "GateOutcome",
    "GateSpec",
    "ManifestChange",
    "Rule",
    "Settings",
    "assert_faithful",
    "compare",
    "format_table",
    "junit_xml",
    "load_gates",
    "load_records",
    "manifest_changes",
    "parse_gates",
    "read_manifest",
    "summary_json",
    "validate_records",
    "write_outputs",
]


def assert_faithful(
    run_dir: str | Path | pd.DataFrame,
    gates: str | Path | dict | GateSpec | None = None,
    baseline: str | Path | pd.DataFrame | None = None,
    *,
    explainers: list[str] | None = None,
    metrics: list[str] | None = None,
    allow_missing: bool = False,
) -> CheckResult:
    """Apply gates to a run (absolute gates only without a baseline); raise AssertionError with the table.

    ``gates`` is a gate file path, gate data shaped like the TOML (``{"default": {...}, "gate": [...]}``)
    or None for the built-in gates; ``explainers``, ``metrics`` and ``allow_missing`` act as the command's
    options of the same names. Returns the :class:`CheckResult` when every gate passes.
    """
    __tracebackhide__ = True
    result = compare(
        run_dir, baseline=baseline, gates=gates, explainers=explainers, metrics=metrics, allow_missing=allow_missing
    )
    if not result.outcomes:
        raise AssertionError("xbench: no gate applied to this run (check the gate selectors)\n" + result.table())
    if not result.passed:
        raise AssertionError(result.table())
    return result


# `xbench.check(...)` is also the front door's verb (see xbench.api.make_module_callable).
make_module_callable(__name__, "check")
