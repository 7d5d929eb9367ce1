"""From records to the numbers in the tables: per-block intervals and paired tests, ranks across blocks.

A *block* is one (task, model) pair. A *column* is one metric with one truth (planted / verified / none).

Unit of analysis. For a metric with per-tile values, each tile's value is first averaged over the model
seeds that have it, giving one value per test tile; the interval is a bootstrap over tiles and the paired
test pairs explainers by tile. A metric with one value per seed (``tile = -1``) gets its mean and interval
over seeds and is not tested.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xbench.report import stats
from xbench.report.meta import MetricInfo, family_rank, metric_info

TRUTH_ORDER = {"planted": 0, "verified": 1, "none": 2}


@dataclass(frozen=True)
class Column:
    metric: str
    truth: str
    info: MetricInfo

    @property
    def label(self) -> str:
        return self.metric if self.truth == "none" else f"{self.metric} ({self.truth})"

    @property
    def key(self) -> tuple[str, str]:
        return (self.metric, self.truth)

    @property
    def arrow(self) -> str:
        hib = self.info.higher_is_better
        return "" if hib is None else ("↑" if hib else "↓")


@dataclass
class RankTest:
    column: Column
    explainers: list[str]  # included in the rank statistics (defined in every block)
    excluded: list[str]
    blocks: list[tuple[str, str]]
    avg_ranks: np.ndarray
    friedman: stats.FriedmanResult
    q_alpha: float
    cd: float
    scores: np.ndarray  # (N blocks, k) block means


@dataclass
class Summary:
    table: pd.DataFrame
    columns: list[Column]
    explainers: list[str]
    blocks: list[tuple[str, str]]
    rank_tests: dict[tuple[str, str], RankTest]
    settings: dict[str, Any]
    seeds: dict[tuple[str, str], list[int]]
    log: list[str] = field(default_factory=list)

    def block_table(self, task: str, model: str) -> pd.DataFrame:
        t = self.table
        return t[(t["task"] == task) & (t["model"] == model)]


SUMMARY_COLUMNS = [
    "task",
    "model",
    "metric",
    "truth",
    "column",
    "family",
    "explainer",
    "unit",
    "n",
    "n_seeds",
    "mean",
    "ci_low",
    "ci_high",
    "ci_method",
    "best",
    "test_n",
    "p_value",
    "p_holm",
    "mark",
    "higher_is_better",
]


def unit_values(group: pd.DataFrame) -> tuple[str, pd.DataFrame, pd.Series]:
    """(unit, values with one row per unit and one column per explainer, seeds per explainer)."""
    per_tile = group[group["tile"] >= 0]
    if len(per_tile):
        wide = per_tile.groupby(["tile", "explainer"])["value"].mean().unstack("explainer")
        return "tile", wide, per_tile.groupby("explainer")["seed"].nunique()
    wide = group.groupby(["seed", "explainer"])["value"].mean().unstack("explainer")
    return "seed", wide, group.groupby("explainer")["seed"].nunique()


def order_explainers(records: pd.DataFrame, manifests: list[dict[str, Any]]) -> list[str]:
    present = list(dict.fromkeys(records["explainer"]))
    order: list[str] = []
    for m in manifests:
        # `explainer_order` keeps the task's order (the manifest's JSON objects are written with sorted keys)
        for key in m.get("explainer_order") or m.get("explainers", {}) or {}:
            if key in present and key not in order:
                order.append(key)
    order += sorted(e for e in present if e not in order)
    controls = ("random", "edges", "oracle")  # reference points last
    return [e for e in order if e not in controls] + [e for e in controls if e in order]


def order_columns(records: pd.DataFrame, manifests: list[dict[str, Any]]) -> list[Column]:
    metric_order: list[str] = []
    for m in manifests:
        for key in m.get("metrics", {}) or {}:
            if key not in metric_order:
                metric_order.append(key)
    pairs = records[["metric", "truth"]].drop_duplicates().itertuples(index=False)
    cols = [Column(m, t, metric_info(m)) for m, t in pairs]

    def sort_key(c: Column):
        pos = metric_order.index(c.metric) if c.metric in metric_order else len(metric_order)
        return (family_rank(c.info.family), pos, c.metric, TRUTH_ORDER.get(c.truth, 3), c.truth)

    return sorted(cols, key=sort_key)


def summarize(
    records: pd.DataFrame,
    manifests: list[dict[str, Any]] | None = None,
    *,
    confidence: float = 0.95,
    n_resamples: int = 2000,
    seed: int = 0,
    alpha: float = 0.05,
) -> Summary:
    """Every number the tables show, as one tidy frame plus the rank tests."""
    manifests = manifests or []
    log: list[str] = []
    explainers = order_explainers(records, manifests)
    columns = order_columns(records, manifests)
    for c in columns:
        if c.info.source != "registry":
            log.append(
                f"metric '{c.metric}': not in the metrics registry; "
                + (
                    "using the report's own table of directions"
                    if c.info.source == "fallback"
                    else "direction unknown, so no best value and no tests"
                )
            )
    blocks = list(dict.fromkeys(zip(records["task"], records["model"], strict=True)))
    seeds = {b: sorted(set(g["seed"])) for b, g in records.groupby(["task", "model"], sort=False)}
    rows: list[dict[str, Any]] = []
    grouped = records.groupby(["task", "model", "metric", "truth"], sort=False)
    for col in columns:
        hib = col.info.higher_is_better
        for task, model in blocks:
            key = (task, model, col.metric, col.truth)
            if key not in grouped.groups:
                continue
            group = grouped.get_group(key)
            unit, wide, n_seeds = unit_values(group)
            if unit == "tile":
                lone = sorted(set(group["explainer"]) - set(group.loc[group["tile"] >= 0, "explainer"]))
                if lone:
                    log.append(
                        f"{task}/{model} {col.label}: {', '.join(lone)} have one value per seed, "
                        "not per tile, and are left out of that column"
                    )
            names = [e for e in explainers if e in wide.columns]
            cis = {e: stats.bootstrap_ci(wide[e].to_numpy(), confidence, n_resamples, seed=seed) for e in names}
            finite = [e for e in names if np.isfinite(cis[e].mean)]
            best = None
            if hib is not None and finite:
                means = np.array([cis[e].mean for e in finite])
                best = finite[int(np.argmax(means) if hib else np.argmin(means))]
            tests: dict[str, stats.PairedTest] = {}
            if best is not None and unit == "tile":
                others = [e for e in finite if e != best]
                tests = {e: stats.wilcoxon_paired(wide[best].to_numpy(), wide[e].to_numpy()) for e in others}
            adjusted = dict(zip(tests, stats.holm([t.p_value for t in tests.values()]), strict=True))
            for e in names:
                ci, t = cis[e], tests.get(e)
                p_holm = adjusted.get(e, np.nan)
                rows.append(
                    {
                        "task": task,
                        "model": model,
                        "metric": col.metric,
                        "truth": col.truth,
                        "column": col.label,
                        "family": col.info.family,
                        "explainer": e,
                        "unit": unit,
                        "n": ci.n,
                        "n_seeds": int(n_seeds.get(e, 0)),
                        "mean": ci.mean,
                        "ci_low": ci.low,
                        "ci_high": ci.high,
                        "ci_method": ci.method,
                        "best": e == best,
                        "test_n": t.n if t else 0,
                        "p_value": t.p_value if t else np.nan,
                        "p_holm": p_holm,
                        "mark": stats.significance_mark(p_holm),
                        "higher_is_better": hib,
                    }
                )
    table = pd.DataFrame(rows, columns=SUMMARY_COLUMNS)
    rank_tests = {}
    for col in columns:
        rt = rank_test(table, col, explainers, blocks, alpha)
        if rt is not None:
            rank_tests[col.key] = rt
            if rt.excluded:
                log.append(
                    f"ranks for {col.label}: left out {', '.join(rt.excluded)} (no value in every task x model block)"
                )
    settings = {
        "confidence": confidence,
        "n_resamples": n_resamples,
        "seed": seed,
        "alpha": alpha,
        "ci_method": stats.CI_METHOD,
    }
    return Summary(table, columns, explainers, blocks, rank_tests, settings, seeds, log)


def rank_test(
    table: pd.DataFrame, col: Column, explainers: list[str], blocks: list[tuple[str, str]], alpha: float
) -> RankTest | None:
    """Average ranks, Friedman test and Nemenyi CD of one column across the task x model blocks."""
    hib = col.info.higher_is_better
    sub = table[(table["metric"] == col.metric) & (table["truth"] == col.truth)]
    if hib is None or sub.empty:
        return None
    wide = sub.pivot_table(index=["task", "model"], columns="explainer", values="mean", aggfunc="first", dropna=False)
    wide = wide.reindex(index=pd.MultiIndex.from_tuples([b for b in blocks if b in wide.index]))
    order = [e for e in explainers if e in wide.columns]
    complete = [e for e in order if wide[e].notna().all()]
    excluded = [e for e in order if e not in complete]
    if len(complete) < 2 or len(wide) < 1:
        return None
    scores = wide[complete].to_numpy(dtype=np.float64)
    n, k = scores.shape
    return RankTest(
        column=col,
        explainers=complete,
        excluded=excluded,
        blocks=list(wide.index),
        avg_ranks=stats.average_ranks(scores, hib),
        friedman=stats.friedman(scores),
        q_alpha=stats.nemenyi_q(k, alpha),
        cd=stats.nemenyi_cd(k, n, alpha),
        scores=scores,
    )
