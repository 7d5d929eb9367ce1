"""The recommendation page: per task and model, which explainers cannot be told apart from the best.

For each (task, model) block and each of three questions a user asks before choosing a method,

- *localization*: does the map point at the planted structures? (the ``overlap`` family),
- *faithfulness*: does removing what the map ranks first change the model's output? (``response``),
- *sanity*: does the map depend on the learned weights? (``model-dependence``),

one primary metric is chosen (the first of a preference list that the run has, else the family's first
column) and the *top group* is formed: the best explainer by mean and every explainer whose paired
per-tile values cannot be told apart from the best's (two-sided Wilcoxon signed-rank tests of every pair,
Wilcoxon 1945, with Holm's step-down correction over all pairs, Holm 1979; see :func:`top_group`).
Controls (``random``, ``edges``, ``oracle``) never compete: they are shown as anchors beside the group.
Every number on the page comes from the same summary table as the result tables.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xbench.report.compare import compare_column
from xbench.stats import wilcoxon_paired

CONTROLS = ("random", "edges", "oracle")

# aspect -> (family, preferred (metric, truth) columns, in order)
ASPECTS: dict[str, tuple[str, tuple[tuple[str, str], ...]]] = {
    "localization": (
        "overlap",
        (
            ("mass-accuracy", "planted"),
            ("rank-accuracy", "planted"),
            ("mask-auroc", "planted"),
            ("pointing-game", "planted"),
        ),
    ),
    "faithfulness": (
        "response",
        (("deletion-auc", "none"), ("insertion-auc", "none"), ("aopc-morf", "none"), ("subset-drop-corr", "none")),
    ),
    "sanity": (
        "model-dependence",
        (("randomization-spearman", "none"), ("randomization-ssim", "none")),
    ),
}
ASPECT_QUESTION = {
    "localization": "points at the planted structures",
    "faithfulness": "ranks first what the model's output responds to",
    "sanity": "changes when the model's weights are randomized",
}
MIN_TILES_FOR_CONFIDENCE = 20  # fewer paired tiles than this: the page says the group is wide for that reason


def top_group(values_by_method: dict[str, Any], higher_is_better: bool, alpha: float = 0.05) -> list[str]:
    """The best method by mean and every method that cannot be told apart from it, best first.

    ``values_by_method`` maps a method to its per-unit values (tiles), aligned across methods (position i is
    the same tile for every method; NaN = undefined, dropped pairwise). Every pair of methods is compared
    by a two-sided Wilcoxon signed-rank test (Wilcoxon 1945) on the pairs where both are finite (all
    differences zero: p = 1; fewer than two pairs: untestable), and the p-values of all k(k-1)/2 pairs are
    Holm-adjusted together (Holm 1979), which keeps the family-wise error rate at ``alpha`` whichever method
    the data make the leader (adjusting only the leader's k-1 comparisons does not: the leader is chosen on
    the same tiles). A method stays in the group unless its comparison with the leader is rejected. The
    group is ordered by mean (best first); methods without any finite value are left out.
    """
    arrays = {m: np.asarray(v, dtype=np.float64).ravel() for m, v in values_by_method.items()}
    shapes = {a.shape for a in arrays.values()}
    if len(shapes) > 1:
        raise ValueError(f"top_group: values are not aligned across methods (shapes {sorted(shapes)})")
    means = {m: float(np.nanmean(a)) for m, a in arrays.items() if np.isfinite(a).any()}
    if not means:
        return []
    # The same all-pairs procedure as the result tables' marks (report.compare.compare_column).
    wide = pd.DataFrame({m: arrays[m] for m in means})
    group = compare_column(wide, list(means), higher_is_better, alpha).top_group
    sign = 1.0 if higher_is_better else -1.0
    return sorted(group, key=lambda m: -sign * means[m])


@dataclass
class AspectResult:
    """One aspect of one block: the metric used, the top group, every competitor's mean and the anchors."""

    aspect: str
    metric: str
    truth: str
    higher_is_better: bool
    group: list[str]
    means: dict[str, float]  # competitors (no controls), from the summary table
    anchors: dict[str, float]  # controls present in the block
    n_tiles: int  # paired units (tiles) behind the test
    unit: str  # "tile" or "seed"
    best_vs_random_p: float = float("nan")  # Wilcoxon of the best against the random control

    @property
    def label(self) -> str:
        return self.metric if self.truth == "none" else f"{self.metric} ({self.truth})"

    @property
    def arrow(self) -> str:
        return "↑" if self.higher_is_better else "↓"


@dataclass
class BlockRecommendation:
    task: str
    model: str
    seeds: list[int]
    aspects: list[AspectResult] = field(default_factory=list)
    seconds_per_tile: dict[str, float] = field(default_factory=dict)
    reading: list[str] = field(default_factory=list)  # plain-language sentences
    caveats: list[str] = field(default_factory=list)

    @property
    def title(self) -> str:
        return f"{self.task}, model {self.model}"


def _choose_column(table: pd.DataFrame, family: str, preferred: tuple[tuple[str, str], ...]) -> tuple[str, str] | None:
    have = set(zip(table["metric"], table["truth"], strict=True))
    for col in preferred:
        if col in have:
            return col
    fam = table[(table["family"] == family) & table["higher_is_better"].notna()]
    if fam.empty:
        return None
    first = fam.iloc[0]
    return str(first["metric"]), str(first["truth"])


def _unit_wide(records: pd.DataFrame, task: str, model: str, metric: str, truth: str) -> tuple[str, pd.DataFrame]:
    """Per-unit values (tiles averaged over seeds, as in the result tables) with one column per explainer."""
    g = records[
        (records["task"] == task)
        & (records["model"] == model)
        & (records["metric"] == metric)
        & (records["truth"] == truth)
    ]
    per_tile = g[g["tile"] >= 0]
    if len(per_tile):
        return "tile", per_tile.groupby(["tile", "explainer"])["value"].mean().unstack("explainer")
    return "seed", g.groupby(["seed", "explainer"])["value"].mean().unstack("explainer")


def _fmt(v: float) -> str:
    return "–" if not np.isfinite(v) else f"{v:.3g}"


def fmt_seconds(s: float | None) -> str:
    """Seconds per tile in a unit a person reads at a glance."""
    if s is None or not np.isfinite(s):
        return "–"
    if s < 1e-3:
        return f"{s * 1e6:.0f} µs"
    if s < 1:
        return f"{s * 1e3:.3g} ms"
    return f"{s:.3g} s"


def recommend(
    table: pd.DataFrame,
    records: pd.DataFrame,
    costs: pd.DataFrame | None = None,
    seeds: dict[tuple[str, str], list[int]] | None = None,
    alpha: float = 0.05,
) -> list[BlockRecommendation]:
    """One :class:`BlockRecommendation` per (task, model) block of the summary ``table``.

    ``table`` is the report's summary table (``xbench.report.compare.Summary.table``), ``records`` the tidy
    records behind it, ``costs`` a frame with ``task, model, explainer, seconds`` (explainer seconds per tile).
    """
    out: list[BlockRecommendation] = []
    blocks = list(dict.fromkeys(zip(table["task"], table["model"], strict=True)))
    for task, model in blocks:
        block = table[(table["task"] == task) & (table["model"] == model)]
        rec = BlockRecommendation(str(task), str(model), list((seeds or {}).get((task, model), [])))
        if costs is not None and len(costs):
            c = costs[(costs["task"] == task) & (costs["model"] == model)]
            rec.seconds_per_tile = {str(e): float(s) for e, s in c.groupby("explainer")["seconds"].mean().items()}
        for aspect, (family, preferred) in ASPECTS.items():
            col = _choose_column(block, family, preferred)
            if col is None:
                continue
            metric, truth = col
            rows = block[(block["metric"] == metric) & (block["truth"] == truth)]
            hib = bool(rows["higher_is_better"].iloc[0])
            means_all = {str(r.explainer): float(r.mean) for r in rows.itertuples()}
            means = {e: v for e, v in means_all.items() if e not in CONTROLS and np.isfinite(v)}
            anchors = {e: means_all[e] for e in CONTROLS if e in means_all}
            if not means:
                continue
            unit, wide = _unit_wide(records, task, model, metric, truth)
            competitors = [e for e in means if e in wide.columns]
            group = top_group({e: wide[e].to_numpy() for e in competitors}, hib, alpha)
            best = group[0] if group else max(means, key=lambda e: means[e] if hib else -means[e])
            n_tiles = int(wide[competitors].notna().all(axis=1).sum()) if competitors else 0
            p_random = float("nan")
            if "random" in wide.columns and best in wide.columns:
                a, b = wide[best].to_numpy(), wide["random"].to_numpy()
                ok = np.isfinite(a) & np.isfinite(b)
                d = a[ok] - b[ok]
                if d.size >= 2 and np.any(d):
                    p_random = wilcoxon_paired(d, np.zeros_like(d), alternative="greater" if hib else "less").p_value
            rec.aspects.append(AspectResult(aspect, metric, truth, hib, group, means, anchors, n_tiles, unit, p_random))
        rec.reading, rec.caveats = reading(rec, alpha)
        out.append(rec)
    return out


def _names(items: list[str]) -> str:
    items = [f"`{i}`" for i in items]
    if len(items) <= 1:
        return "".join(items)
    return ", ".join(items[:-1]) + " and " + items[-1]


def reading(rec: BlockRecommendation, alpha: float = 0.05) -> tuple[list[str], list[str]]:
    """Plain-language sentences and caveats for one block, from its aspect results only."""
    sentences: list[str] = []
    caveats: list[str] = []
    for a in rec.aspects:
        best = a.group[0]
        others = a.group[1:]
        s = f"For {a.aspect} ({a.label}, {a.arrow}) `{best}` leads with {_fmt(a.means[best])}"
        if others:
            s += f"; {_names(others)} cannot be told apart from it"
        else:
            s += " and is ahead of every other method"
        s += f" ({a.n_tiles} paired {a.unit}s)."
        sentences.append(s)
        if a.unit != "tile":
            caveats.append(f"{a.aspect}: one value per seed, so the group rests on {a.n_tiles} seed(s) only.")
        elif a.n_tiles < MIN_TILES_FOR_CONFIDENCE:
            caveats.append(f"{a.aspect}: only {a.n_tiles} paired tiles; a wide group may mean too few tiles.")
        if "random" in a.anchors:
            if not (np.isfinite(a.best_vs_random_p) and a.best_vs_random_p < alpha):
                caveats.append(
                    f"{a.aspect}: the leader `{best}` is not significantly better than the `random` control "
                    f"({_fmt(a.means[best])} vs {_fmt(a.anchors['random'])}); treat this aspect as undecided."
                )
        if "oracle" in a.anchors and "random" in a.anchors:
            oracle, rnd = a.anchors["oracle"], a.anchors["random"]
            sign = 1.0 if a.higher_is_better else -1.0
            if np.isfinite(oracle) and np.isfinite(rnd) and not sign * (oracle - rnd) > 1e-9:
                # the anchors must bracket the methods; a metric that cannot separate them says so
                why = (
                    "maps that ignore the model (the controls) do not change when its weights are randomized, "
                    "so they all score alike by construction; the metric tells model-dependent methods from "
                    "model-blind ones, not evidence from noise"
                    if a.aspect == "sanity"
                    else "the metric does not tell the planted evidence from a random map here"
                )
                caveats.append(
                    f"{a.aspect}: the controls do not separate on {a.label} (`oracle` {_fmt(oracle)}, `random` "
                    f"{_fmt(rnd)}): {why}."
                )
        if "oracle" in a.anchors and "random" in a.anchors and a.aspect == "localization":
            span = a.anchors["oracle"] - a.anchors["random"]
            if np.isfinite(span) and abs(span) > 1e-9:
                share = (a.means[best] - a.anchors["random"]) / span
                if share < 0.5:
                    caveats.append(
                        f"localization: the leader covers {share:.0%} of the way from the `random` control "
                        f"({_fmt(a.anchors['random'])}) to the `oracle` ({_fmt(a.anchors['oracle'])}); no method "
                        "recovers the planted structures well here."
                    )
    groups = [set(a.group) for a in rec.aspects]
    if len(groups) >= 2:
        common = set.intersection(*groups)
        order = [e for e in rec.aspects[0].group if e in common]
        if order:
            cheap = sorted(order, key=lambda e: rec.seconds_per_tile.get(e, np.inf))
            s = f"{_names(order)} {'is' if len(order) == 1 else 'are'} in every top group"
            if cheap and cheap[0] in rec.seconds_per_tile and len(order) > 1:
                s += f"; the cheapest of them is `{cheap[0]}` ({fmt_seconds(rec.seconds_per_tile[cheap[0]])} per tile)"
            sentences.insert(0, s + ".")
        else:
            sentences.insert(0, "No method is in every top group: choose by the aspect that matters to you.")
    if len(rec.seeds) == 1:
        caveats.append("One model seed: the groups say nothing about retraining variance.")
    caveats.append("Synthetic tiles with planted structures: the ranking holds for data and models like these.")
    return sentences, caveats


# ---------------------------------------------------------------- rendering


def recommendation_rows(recs: list[BlockRecommendation]) -> pd.DataFrame:
    """The page as a tidy frame: one row per (block, aspect, explainer in the top group)."""
    rows = []
    for r in recs:
        for a in r.aspects:
            for rank, e in enumerate(a.group):
                rows.append(
                    {
                        "task": r.task,
                        "model": r.model,
                        "aspect": a.aspect,
                        "metric": a.metric,
                        "truth": a.truth,
                        "explainer": e,
                        "leader": rank == 0,
                        "mean": a.means[e],
                        "seconds_per_tile": r.seconds_per_tile.get(e, np.nan),
                        "n_units": a.n_tiles,
                    }
                )
    return pd.DataFrame(
        rows,
        columns=[
            "task",
            "model",
            "aspect",
            "metric",
            "truth",
            "explainer",
            "leader",
            "mean",
            "seconds_per_tile",
            "n_units",
        ],
    )


def to_markdown(recs: list[BlockRecommendation], alpha: float = 0.05) -> str:
    """The recommendation page in Markdown (the top of ``tables.md``)."""
    lines = ["# Which explainer to use", ""]
    lines.append(
        "Per task and model: the explainers that cannot be told apart from the best (paired Wilcoxon tests "
        f"of every pair of methods, Holm-adjusted, α = {alpha:g}) on each question, with their cost per tile. "
        "Controls (`random`, `edges`, `oracle`) are anchors, not candidates."
    )
    if not recs:
        lines += ["", "No block has a localization, faithfulness or sanity metric: nothing to recommend."]
    for r in recs:
        lines += ["", f"## {r.title}", ""]
        lines += [f"- {s}" for s in r.reading]
        lines += ["", "| question | metric | top group (mean, cost per tile) | anchors |", "|---|---|---|---|"]
        for a in r.aspects:
            group = "; ".join(
                f"{'**' + e + '**' if i == 0 else e} {_fmt(a.means[e])} ({fmt_seconds(r.seconds_per_tile.get(e))})"
                for i, e in enumerate(a.group)
            )
            anchors = "; ".join(f"{e} {_fmt(v)}" for e, v in a.anchors.items()) or "–"
            lines.append(f"| {a.aspect}: {ASPECT_QUESTION[a.aspect]} | {a.label} {a.arrow} | {group} | {anchors} |")
        if r.caveats:
            lines += ["", "Caveats:"]
            lines += [f"- {c}" for c in r.caveats]
    return "\n".join(lines) + "\n"


def console_lines(recs: list[BlockRecommendation]) -> list[str]:
    """A few lines for ``xbench report``'s console summary."""
    lines = []
    for r in recs:
        lines.append(f"{r.title}:")
        for a in r.aspects:
            names = ", ".join(f"{e} ({fmt_seconds(r.seconds_per_tile.get(e))}/tile)" for e in a.group)
            lines.append(f"  {a.aspect:<12} {a.label}: {names}")
    return lines
