"""From records to the numbers in the tables: per-block intervals and paired tests, ranks across blocks.

A *block* is one (task, model) pair. A *column* is one metric with one truth (planted / verified / none).

Controls (``random``, ``edges``, ``oracle``) are anchors, not contestants: they get a mean and an interval,
but never enter the best-selection, the paired tests or the rank statistics. Every method's mean is placed
between them, (x - random) / (oracle - random), and a column says when a control beats real methods.

Units of analysis. Intervals: a hierarchical bootstrap that resamples model seeds and then tiles within each
drawn seed (with one seed, the BCa bootstrap over tiles). Paired tests within a column: with enough model
seeds for the exact test to reject after Holm, the seeds' means are the units (independent training runs);
otherwise each tile's value is averaged over the seeds and tiles are the units, so a p-value is conditional on
the trained network(s) of that block (a handful of seeds is too few units for a signed-rank test). All pairs
of real methods are tested with the Wilcoxon signed-rank test and Holm's correction over all pairs (Benavoli,
Corani, Mangili 2016), or, with a comparator declared before the run (``against``), that method against each
other one with Holm over those comparisons. Ranks across blocks: one ranking per model family (torch models,
black boxes), over task x model x seed blocks (independently trained networks; blocks of one task share its
test tiles).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xbench import stats
from xbench.errors import XbenchInputError
from xbench.report.meta import MetricInfo, family_rank, metric_info

TRUTH_ORDER = {"planted": 0, "verified": 1, "none": 2}
CONTROLS = ("random", "edges", "oracle")
BLACK_BOX_KINDS = frozenset({"forest", "user-callable"})
TORCH_GROUP, BLACK_BOX_GROUP = "torch models", "black-box models"


@dataclass(frozen=True)
class Column:
    metric: str
    truth: str
    info: MetricInfo

    @property
    def label(self) -> str:
        name = f"|{self.metric}|" if self.info.by_magnitude else self.metric
        return name if self.truth == "none" else f"{name} ({self.truth})"

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
    group: str  # model family: TORCH_GROUP or BLACK_BOX_GROUP
    explainers: list[str]  # real methods with a value in every block of the group
    excluded: dict[str, str]  # real method -> why it is left out
    blocks: list[tuple[str, str, int]]  # (task, model, seed)
    dropped_blocks: dict[str, str]  # "task/model" -> why it is left out of this column
    avg_ranks: np.ndarray
    friedman: stats.FriedmanResult
    q_alpha: float
    cd: float
    scores: np.ndarray  # (N blocks, k) per-seed means

    @property
    def rejects(self) -> bool:
        return bool(np.isfinite(self.friedman.p_value) and self.friedman.p_value < self.alpha)

    alpha: float = 0.05


@dataclass
class Summary:
    table: pd.DataFrame
    columns: list[Column]
    explainers: list[str]
    blocks: list[tuple[str, str]]
    rank_tests: dict[tuple[str, str, str], RankTest]  # (group, metric, truth)
    settings: dict[str, Any]
    seeds: dict[tuple[str, str], list[int]]
    log: list[str] = field(default_factory=list)
    column_notes: dict[tuple[str, str, str, str], str] = field(default_factory=dict)  # block x column: no value, why
    control_notes: dict[tuple[str, str, str, str], str] = field(default_factory=dict)  # controls beating methods
    model_groups: dict[str, str] = field(default_factory=dict)  # model -> group
    left_out: list[str] = field(default_factory=list)  # sentences for the document: what is left out, why

    def block_table(self, task: str, model: str) -> pd.DataFrame:
        t = self.table
        return t[(t["task"] == task) & (t["model"] == model)]

    def rank_tests_for(self, metric: str, truth: str) -> list[RankTest]:
        return [rt for (g, m, t), rt in self.rank_tests.items() if (m, t) == (metric, truth)]


SUMMARY_COLUMNS = [
    "task",
    "model",
    "metric",
    "truth",
    "column",
    "family",
    "explainer",
    "role",
    "unit",
    "test_unit",
    "n",
    "n_seeds",
    "mean",
    "ci_low",
    "ci_high",
    "ci_method",
    "anchor",
    "best",
    "top_group",
    "comparator",
    "test_n",
    "p_value",
    "p_holm",
    "mark",
    "n_comparisons",
    "min_n_for_test",
    "higher_is_better",
]


def unit_values(group: pd.DataFrame) -> tuple[str, pd.DataFrame, pd.Series]:
    """(unit, values with one row per unit and one column per explainer, seeds per explainer).

    Per-tile metrics: each tile's value averaged over the seeds that have it (the units of the paired tests).
    """
    per_tile = group[group["tile"] >= 0]
    if len(per_tile):
        wide = per_tile.groupby(["tile", "explainer"])["value"].mean().unstack("explainer")
        return "tile", wide, per_tile.groupby("explainer")["seed"].nunique()
    wide = group.groupby(["seed", "explainer"])["value"].mean().unstack("explainer")
    return "seed", wide, group.groupby("explainer")["seed"].nunique()


def seed_tile_matrices(group: pd.DataFrame) -> dict[str, np.ndarray]:
    """Per explainer, its (seeds, tiles) values (NaN where undefined): the input of the hierarchical bootstrap.

    One reshaping for the whole group: rows and columns are the seeds and tiles of any explainer, so an
    explainer's matrix may hold NaN for seeds or tiles it lacks, which the bootstrap drops like undefined values
    (its resamples do not depend on them)."""
    per_tile = group[group["tile"] >= 0]
    wide = per_tile.groupby(["explainer", "seed", "tile"])["value"].mean().unstack("tile")
    return {str(e): wide.xs(e, level="explainer").to_numpy(dtype=np.float64) for e in wide.index.unique("explainer")}


@dataclass(frozen=True)
class ColumnComparison:
    """The tests of one column in one block (real methods only)."""

    top: str | None  # best real method by mean
    comparator: str | None  # the method each p-value is against (top, or the declared one)
    p_value: dict[str, float]
    p_holm: dict[str, float]
    test_n: dict[str, int]
    top_group: list[str]  # real methods that cannot be told apart from the top one
    n_comparisons: int
    min_n: int  # smallest n at which the exact test can reject after Holm
    testable: bool  # some pair has at least min_n units


def compare_column(
    wide: pd.DataFrame, methods: list[str], higher_is_better: bool | None, alpha: float, against: str | None = None
) -> ColumnComparison:
    """Pairwise Wilcoxon signed-rank tests between real methods (units = rows of ``wide``) with Holm.

    Without ``against``: all k(k-1)/2 pairs form one family (Holm over all of them; strong control of the
    family-wise error, Benavoli, Corani, Mangili 2016); each method's p is its pair with the top method (best
    mean), and the top group is the top method with every method whose pair with it is not rejected. With
    ``against`` (declared before the run): the k - 1 comparisons with that method form the family.
    """
    block = wide[methods].to_numpy(dtype=np.float64) if methods else np.empty((0, 0))
    # np.asarray (no copy): numpy's stubs type a reduction with an axis as "scalar or array"
    defined = np.asarray(np.isfinite(block).any(axis=0)) if block.size else np.zeros(len(methods), dtype=bool)
    with warnings.catch_warnings():  # an all-NaN column: "mean of empty slice"; it is left out just below
        warnings.simplefilter("ignore", RuntimeWarning)
        col_means = np.nanmean(np.where(np.isfinite(block), block, np.nan), axis=0) if block.size else []
    means = {e: float(v) for e, v, ok in zip(methods, col_means, defined, strict=False) if ok}
    names = [e for e in methods if e in means]
    top = None
    if higher_is_better is not None and names:
        vals = np.array([means[e] for e in names])
        top = names[int(np.argmax(vals) if higher_is_better else np.argmin(vals))]
    empty = ColumnComparison(top, None, {}, {}, {}, [top] if top else [], 0, 0, False)
    if top is None or len(names) < 2:
        return empty
    x = wide[names].to_numpy(dtype=np.float64)
    comparator = against if against in names else top
    ci = names.index(comparator)
    if against in names:
        others = [j for j in range(len(names)) if j != ci]
        pv, nv = stats.paired_wilcoxon_many(x, [(ci, j) for j in others])
        p_value = {names[j]: float(v) for j, v in zip(others, pv, strict=True)}
        test_n = {names[j]: int(v) for j, v in zip(others, nv, strict=True)}
        adj = {names[j]: float(v) for j, v in zip(others, stats.holm(pv), strict=True)}
        m = len(others)
    else:
        p, npairs = stats.pairwise_wilcoxon(x)
        padj = stats.holm_matrix(p)
        others = [j for j in range(len(names)) if j != ci]
        p_value = {names[j]: float(p[ci, j]) for j in others}
        test_n = {names[j]: int(npairs[ci, j]) for j in others}
        adj = {names[j]: float(padj[ci, j]) for j in others}
        m = len(names) * (len(names) - 1) // 2
    min_n = stats.min_pairs_for_test(m, alpha)
    testable = max(test_n.values(), default=0) >= min_n
    if comparator == top:
        group = [top] + [e for e in names if e != top and not (np.isfinite(adj[e]) and adj[e] < alpha)]
    else:  # the top group is about the top method; with a declared comparator only that pair is tested
        group = []
    return ColumnComparison(top, comparator, p_value, adj, test_n, group, m, min_n, testable)


def control_flags(means: dict[str, float], higher_is_better: bool | None) -> list[str]:
    """Sentences for a column where `random` or `edges` beats real methods, or `oracle` does not beat them."""
    if higher_is_better is None:
        return []
    real = {e: v for e, v in means.items() if e not in CONTROLS and np.isfinite(v)}
    if not real:
        return []
    sign = 1.0 if higher_is_better else -1.0
    out = []
    why = {
        "edges": "the metric rewards edge-like maps on this task",
        "random": "the metric does not separate these methods from a random map",
    }
    for c in ("edges", "random"):
        v = means.get(c, np.nan)
        if not np.isfinite(v):
            continue
        beaten = [e for e, x in real.items() if sign * (v - x) > 0]
        if beaten:
            out.append(f"`{c}` beats {len(beaten)} of {len(real)} methods on this column: {why[c]}")
    v = means.get("oracle", np.nan)
    if np.isfinite(v):
        above = [e for e, x in real.items() if sign * (x - v) > 0]
        if above:
            out.append(
                f"{len(above)} of {len(real)} methods beat `oracle` on this column ({', '.join(above[:4])}"
                + (", ..." if len(above) > 4 else "")
                + "): the planted mask is not the best map by this metric"
            )
    return out


def model_groups(manifests: list[dict[str, Any]], models: list[str]) -> dict[str, str]:
    """Model name -> family of the rankings: black boxes (kind forest or user-callable) or torch models."""
    kinds: dict[str, str] = {}
    for m in manifests:
        for row in m.get("models") or []:
            kinds.setdefault(str(row.get("name")), str(row.get("kind", "")))
    return {name: BLACK_BOX_GROUP if kinds.get(name) in BLACK_BOX_KINDS else TORCH_GROUP for name in models}


def _cell_notes(manifests: list[dict[str, Any]]) -> dict[tuple[str, str, str], str]:
    """(task, model, 'metric/truth') -> the reason a cell recorded for undefined values."""
    out: dict[tuple[str, str, str], str] = {}
    for m in manifests:
        for c in m.get("cells") or []:
            for tag, text in (c.get("notes") or {}).items():
                out.setdefault((str(m.get("task")), str(c.get("model")), str(tag)), str(text))
    return out


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
    against: str | None = None,
    models: list[str] | None = None,
) -> Summary:
    """Every number the tables show, as one tidy frame plus the rank tests.

    ``against``: a real method declared before the run as the comparator of every paired test (else all
    pairs with Holm). ``models``: the models whose blocks enter (default: all).
    """
    manifests = manifests or []
    log: list[str] = []
    left_out: list[str] = []
    present_models = list(dict.fromkeys(records["model"]))
    if models:
        unknown = [m for m in models if m not in present_models]
        if unknown:
            raise XbenchInputError(
                "--models", f"no records for model {unknown[0]!r}", expected=", ".join(present_models), found=unknown
            )
        dropped = [m for m in present_models if m not in models]
        if dropped:
            left_out.append(f"Models left out by choice (--models): {', '.join(dropped)}.")
        records = records[records["model"].isin(models)]
    explainers = order_explainers(records, manifests)
    if against is not None and (against not in explainers or against in CONTROLS):
        raise XbenchInputError(
            "--against",
            "must name a real method of the run (controls are anchors, not comparators)",
            expected=", ".join(e for e in explainers if e not in CONTROLS),
            found=against,
        )
    columns = order_columns(records, manifests)
    for c in columns:
        if c.info.source != "registry":
            left_out.append(
                f"Metric `{c.metric}` is not in the metrics registry: no direction, so no best value, tests or ranks."
            )
    magnitude = [c.metric for c in columns if c.info.by_magnitude]
    if magnitude:
        records = records.copy()
        sel = records["metric"].isin(magnitude)
        records.loc[sel, "value"] = records.loc[sel, "value"].abs()
    blocks = list(dict.fromkeys(zip(records["task"], records["model"], strict=True)))
    seeds = {b: sorted(set(g["seed"])) for b, g in records.groupby(["task", "model"], sort=False)}
    groups = model_groups(manifests, [m for _, m in blocks])
    notes = _cell_notes(manifests)
    column_notes: dict[tuple[str, str, str, str], str] = {}
    control_notes: dict[tuple[str, str, str, str], str] = {}
    undefined_anchor: dict[str, list[str]] = {}
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
            cis = {}
            matrices = seed_tile_matrices(group) if unit == "tile" else {}
            for e in names:
                if unit == "tile":
                    cis[e] = stats.hierarchical_bootstrap_ci(matrices[e], confidence, n_resamples, seed=seed)
                else:
                    cis[e] = stats.bootstrap_ci(wide[e].to_numpy(), confidence, n_resamples, seed=seed)
            if not any(np.isfinite(cis[e].mean) for e in names):
                reason = notes.get((task, model, f"{col.metric}/{col.truth}"), "no defined value was recorded")
                column_notes[key] = f"{col.label} has no value for model {model}: {reason}"
            methods = [e for e in names if e not in CONTROLS]
            test_unit = "tile"
            if unit == "tile":
                # Independent training runs are the better unit: used when there are enough seeds for the
                # exact test to reject after Holm; else tiles, and the p-value is conditional on the networks.
                k = len(methods)
                m = k - 1 if against in methods else k * (k - 1) // 2
                per_seed = group[group["tile"] >= 0].groupby(["seed", "explainer"])["value"].mean().unstack()
                if k >= 2 and len(per_seed) >= stats.min_pairs_for_test(m, alpha):
                    test_unit = "seed"
                    cmp = compare_column(per_seed, methods, hib, alpha, against)
                else:
                    cmp = compare_column(wide, methods, hib, alpha, against)
            else:
                cmp = compare_column(wide.iloc[:0], [], None, alpha)
            means = {e: cis[e].mean for e in names}
            anchors, anchor_why = stats.anchor_score(
                np.array([means[e] for e in names]),
                means.get("random", np.nan),
                means.get("oracle", np.nan),
                None if col.info.family == "cost" else hib,  # controls cost next to nothing: no anchor for cost
            )
            flags = control_flags(means, hib) if col.info.family != "cost" else []
            if anchor_why and any(e not in CONTROLS for e in names) and hib is not None and col.info.family != "cost":
                undefined_anchor.setdefault(f"{col.label} ({anchor_why})", []).append(f"{task}/{model}")
                flags.insert(0, f"a undefined: {anchor_why}")
            if flags:
                control_notes[key] = " ".join(f + "." for f in flags)
            for e, anchor in zip(names, anchors, strict=True):
                ci = cis[e]
                p_holm = cmp.p_holm.get(e, np.nan)
                rows.append(
                    {
                        "task": task,
                        "model": model,
                        "metric": col.metric,
                        "truth": col.truth,
                        "column": col.label,
                        "family": col.info.family,
                        "explainer": e,
                        "role": "control" if e in CONTROLS else "method",
                        "unit": unit,
                        "test_unit": test_unit if unit == "tile" else "",
                        "n": ci.n,
                        "n_seeds": int(n_seeds.get(e, 0)),
                        "mean": ci.mean,
                        "ci_low": ci.low,
                        "ci_high": ci.high,
                        "ci_method": ci.method,
                        "anchor": float(anchor),
                        "best": e == cmp.top,
                        "top_group": e in cmp.top_group,
                        "comparator": cmp.comparator or "",
                        "test_n": cmp.test_n.get(e, 0),
                        "p_value": cmp.p_value.get(e, np.nan),
                        "p_holm": p_holm,
                        "mark": stats.significance_mark(p_holm) if cmp.testable else "",
                        "n_comparisons": cmp.n_comparisons,
                        "min_n_for_test": cmp.min_n,
                        "higher_is_better": hib,
                    }
                )
    for what, where in undefined_anchor.items():
        log.append(f"anchor score undefined for {what} on {', '.join(where)}")
    table = pd.DataFrame(rows, columns=SUMMARY_COLUMNS)
    rank_tests: dict[tuple[str, str, str], RankTest] = {}
    for group_name in (TORCH_GROUP, BLACK_BOX_GROUP):
        members = [b for b in blocks if groups.get(b[1]) == group_name]
        if not members:
            continue
        for col in columns:
            rt = rank_test(records, table, col, explainers, members, alpha, group_name, notes)
            if rt is not None:
                rank_tests[(group_name, col.metric, col.truth)] = rt
    left_out += exclusion_sentences(manifests, rank_tests, groups)
    settings = {
        "confidence": confidence,
        "n_resamples": n_resamples,
        "seed": seed,
        "alpha": alpha,
        "ci_method": stats.CI_METHOD,
        "against": against,
        "models": list(models) if models else None,
    }
    summary = Summary(table, columns, explainers, blocks, rank_tests, settings, seeds, log)
    summary.column_notes = column_notes
    summary.control_notes = control_notes
    summary.model_groups = groups
    summary.left_out = left_out
    return summary


def rank_test(
    records: pd.DataFrame,
    table: pd.DataFrame,
    col: Column,
    explainers: list[str],
    blocks: list[tuple[str, str]],
    alpha: float,
    group: str,
    notes: dict[tuple[str, str, str], str] | None = None,
) -> RankTest | None:
    """Average ranks, Friedman test and Nemenyi CD of one column over the task x model x seed blocks of one
    model family; real methods only (controls never compete)."""
    hib = col.info.higher_is_better
    if hib is None:
        return None
    sub = records[(records["metric"] == col.metric) & (records["truth"] == col.truth)]
    sub = sub[[(t, m) in set(blocks) for t, m in zip(sub["task"], sub["model"], strict=True)]]
    sub = sub[~sub["explainer"].isin(CONTROLS)]
    if sub.empty:
        return None
    per_tile = sub[sub["tile"] >= 0]
    source = per_tile if len(per_tile) else sub
    means = source.groupby(["task", "model", "seed", "explainer"])["value"].mean().unstack("explainer")
    dropped: dict[str, str] = {}
    keep = []
    for idx, row in means.iterrows():
        if row.notna().any():
            keep.append(idx)
        else:
            tag = f"{idx[0]}/{idx[1]}"
            reason = (notes or {}).get((idx[0], idx[1], f"{col.metric}/{col.truth}"), "no defined value")
            dropped.setdefault(tag, reason)
    means = means.loc[keep] if keep else means.iloc[:0]
    order = [e for e in explainers if e in means.columns]
    complete = [e for e in order if len(means) and means[e].notna().all()]
    excluded = {}
    for e in order:
        if e not in complete:
            missing = sorted({f"{t}/{m}" for (t, m, _), v in means[e].items() if not np.isfinite(v)})
            excluded[e] = "no value on " + ", ".join(missing[:4]) + (", ..." if len(missing) > 4 else "")
    if len(complete) < 2 or len(means) < 1:
        return None
    scores = means[complete].to_numpy(dtype=np.float64)
    n, k = scores.shape
    return RankTest(
        column=col,
        group=group,
        explainers=complete,
        excluded=excluded,
        blocks=[tuple(i) for i in means.index],
        dropped_blocks=dropped,
        avg_ranks=stats.average_ranks(scores, hib),
        friedman=stats.friedman(scores),
        q_alpha=stats.nemenyi_q(k, alpha),
        cd=stats.nemenyi_cd(k, n, alpha),
        scores=scores,
        alpha=alpha,
    )


def exclusion_sentences(
    manifests: list[dict[str, Any]], rank_tests: dict[tuple[str, str, str], RankTest], groups: dict[str, str]
) -> list[str]:
    """What the rankings leave out and why, as sentences for the document."""
    out = []
    skipped: dict[tuple[str, str], list[str]] = {}
    for m in manifests:
        for row in m.get("skipped") or []:
            skipped.setdefault((str(row.get("model")), str(row.get("reason"))), []).append(str(row.get("explainer")))
    for (model, reason), keys in skipped.items():
        if model in groups:
            out.append(
                f"Not run on model `{model}` ({groups[model]}): {', '.join(dict.fromkeys(keys))} ({reason}); "
                f"the ranking of the {groups[model]} leaves them out, the ranking of the other family keeps them."
            )
    seen: set[str] = set()
    for rt in rank_tests.values():
        for e, why in rt.excluded.items():
            text = f"Ranking of the {rt.group}, {rt.column.label}: `{e}` left out ({why})."
            if text not in seen:
                seen.add(text)
                out.append(text)
        for blk, why in rt.dropped_blocks.items():
            text = f"Ranking of the {rt.group}, {rt.column.label}: block {blk} left out ({why})."
            if text not in seen:
                seen.add(text)
                out.append(text)
    return out


def variant_sensitivity(
    base: pd.DataFrame, variants: dict[str, pd.DataFrame], explainers: list[str]
) -> tuple[pd.DataFrame, list[str]]:
    """Kendall's tau between the ranking of the real methods in the run and in each protocol variant.

    For every variant, (task, model) block and column both hold, the methods' means (over seeds and tiles)
    are compared: tau (``scipy.stats.kendalltau``), the pairs whose order swapped, the top method in each. A
    ranking is flagged as flipped when its top method changes or tau <= 0 (as many pairs reversed as kept);
    a variant where the oracle no longer beats random is flagged too. Returns the table and the flag sentences.
    """
    rows, flags = [], []

    def means(records: pd.DataFrame) -> pd.DataFrame:
        r = records[~records["explainer"].isin(CONTROLS)]
        return r.groupby(["task", "model", "metric", "truth", "explainer"])["value"].mean()

    def control_gap(control_means: pd.Series, key: tuple, hib: bool) -> float:
        """(oracle - random) in the metric's direction, NaN when a control is missing."""
        try:
            oracle, rnd = control_means.loc[(*key, "oracle")], control_means.loc[(*key, "random")]
        except KeyError:
            return np.nan
        return float((oracle - rnd) * (1 if hib else -1))

    def prepared(records: pd.DataFrame) -> pd.DataFrame:
        mag = [m for m in records["metric"].unique() if metric_info(m).by_magnitude]
        if not mag:
            return records
        records = records.copy()
        sel = records["metric"].isin(mag)
        records.loc[sel, "value"] = records.loc[sel, "value"].abs()
        return records

    base = prepared(base)
    base_means = means(base)
    for name, records in variants.items():
        records = prepared(records)
        var_means = means(records)
        controls = records[records["explainer"].isin(("oracle", "random"))]
        control_means = controls.groupby(["task", "model", "metric", "truth", "explainer"])["value"].mean()
        keys = var_means.index.droplevel("explainer").unique()
        for key in keys:
            info = metric_info(key[2])
            hib = info.higher_is_better
            if hib is None or key not in base_means.index.droplevel("explainer"):
                continue
            a, b = base_means.loc[key], var_means.loc[key]
            common = [
                e for e in explainers if e in a.index and e in b.index and np.isfinite(a[e]) and np.isfinite(b[e])
            ]
            if len(common) < 2:
                continue
            x, y = a[common].to_numpy(), b[common].to_numpy()
            sign = 1.0 if hib else -1.0
            tau = stats.kendall_tau(x, y)
            ii, jj = np.triu_indices(len(common), 1)
            swapped = int(np.sum(np.sign(x[ii] - x[jj]) * np.sign(y[ii] - y[jj]) < 0))
            top_a, top_b = common[int(np.argmax(sign * x))], common[int(np.argmax(sign * y))]
            gap = control_gap(control_means, key, hib)
            flipped = bool(top_a != top_b or not (np.isfinite(tau) and tau > 0))
            label = Column(key[2], key[3], info).label
            rows.append(
                {
                    "variant": name,
                    "task": key[0],
                    "model": key[1],
                    "metric": key[2],
                    "truth": key[3],
                    "column": label,
                    "k": len(common),
                    "kendall_tau": tau,
                    "swapped_pairs": swapped,
                    "pairs": len(ii),
                    "top_run": top_a,
                    "top_variant": top_b,
                    "flipped": flipped,
                    "oracle_beats_random": bool(gap > 0) if np.isfinite(gap) else None,
                }
            )
            where = f"variant `{name}`, {key[0]}/{key[1]}, {label}"
            if flipped:
                flags.append(
                    f"{where}: the ranking flips (top {top_a} in the run, {top_b} in the variant; Kendall's tau = "
                    f"{tau:.2f}, {swapped} of {len(ii)} pairs swapped)."
                )
            if np.isfinite(gap) and gap <= 0:
                flags.append(f"{where}: the oracle no longer beats random: the metric's protocol fails its anchor.")
    columns = [
        "variant", "task", "model", "metric", "truth", "column", "k", "kendall_tau", "swapped_pairs", "pairs",
        "top_run", "top_variant", "flipped", "oracle_beats_random",
    ]  # fmt: skip
    return pd.DataFrame(rows, columns=columns), flags
