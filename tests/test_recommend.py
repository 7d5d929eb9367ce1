"""The recommendation page: top groups (known answers, a null simulation) and the page written by the report."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from xbench.report import write_report
from xbench.report.recommend import top_group
from xbench.report.stats import holm

TILES = 30


def test_a_clearly_best_method_stands_alone():
    rng = np.random.default_rng(0)
    tile = rng.normal(0, 0.05, TILES)
    values = {
        "a": 0.8 + tile + rng.normal(0, 0.01, TILES),
        "b": 0.5 + tile + rng.normal(0, 0.01, TILES),
        "c": 0.4 + tile + rng.normal(0, 0.01, TILES),
    }
    assert top_group(values, higher_is_better=True) == ["a"]
    # lower is better: the same data make c the leader
    assert top_group(values, higher_is_better=False) == ["c"]


def test_two_tied_methods_are_both_named_and_the_group_matches_scipy():
    rng = np.random.default_rng(1)
    tile = rng.normal(0, 0.05, TILES)
    a = 0.70 + tile + rng.normal(0, 0.03, TILES)
    b = 0.70 + tile + rng.normal(0, 0.03, TILES)
    c = 0.30 + tile + rng.normal(0, 0.03, TILES)
    group = top_group({"a": a, "b": b, "c": c}, higher_is_better=True)
    assert sorted(group) == ["a", "b"]
    # The same decision computed directly: scipy's two-sided Wilcoxon on every pair, Holm over the three
    # (Holm 1979: the i-th smallest p is multiplied by m - i + 1, then made monotone).
    pairs = [("a", "b"), ("a", "c"), ("b", "c")]
    arr = {"a": a, "b": b, "c": c}
    raw = [stats.wilcoxon(arr[x] - arr[y]).pvalue for x, y in pairs]
    order = np.argsort(raw)
    adj = np.maximum.accumulate(np.minimum(1, (3 - np.arange(3)) * np.asarray(raw)[order]))
    by_pair = dict(zip([pairs[i] for i in order], adj, strict=True))
    assert np.allclose(holm(raw), [by_pair[p] for p in pairs])
    best = group[0]
    assert all((by_pair.get((best, m), by_pair.get((m, best), 1.0)) >= 0.05) == (m in group) for m in arr if m != best)


def test_nan_values_are_dropped_pairwise_and_all_nan_methods_left_out():
    a = np.array([0.9, 0.8, np.nan, 0.85, np.nan, 0.95, 0.88, np.nan])
    values = {"a": a, "b": a - 0.5, "c": np.full(8, np.nan)}
    # 5 finite pairs: the smallest exact two-sided Wilcoxon p-value is 2 / 2**5 = 0.0625 > 0.05, so b stays
    assert top_group(values, True) == ["a", "b"]
    # with 7 pairs the same consistent gap gives p = 2 / 2**7 = 0.0156 < 0.05: b is left out
    a7 = np.array([0.9, 0.8, np.nan, 0.85, 0.9, 0.95, 0.88, 0.9])
    assert top_group({"a": a7, "b": a7 - 0.5, "c": np.full(8, np.nan)}, True) == ["a"]


def test_null_simulation_keeps_the_family_wise_error_near_alpha():
    """Under the null (same distribution for every method) a method left out is a false exclusion.

    Holm over all pairs bounds the family-wise error at alpha = 0.05; tests/bench/bench_recommend_null.py
    prints the rate for more settings (0.028 for 3 methods and 12 tiles, 0.035 for 6 methods and 32 tiles).
    """
    rng = np.random.default_rng(5)
    errors, reps = 0, 120
    for _ in range(reps):
        x = rng.normal(0, 1, (16, 1)) + rng.normal(0, 1, (16, 3))
        errors += len(top_group({f"m{i}": x[:, i] for i in range(3)}, True)) < 3
    assert errors / reps <= 0.09  # alpha plus two binomial standard errors (sqrt(0.05 * 0.95 / 120) = 0.02)


# ---------------------------------------------------------------------------------- the written page
def _run(folder: Path, means: dict[str, float], seed: int = 0) -> Path:
    """A run folder (records + manifest) with one metric per aspect; explainer e has tile values means[e]."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True)
    tile = rng.normal(0, 0.05, TILES)
    rows = []
    for e, m in means.items():
        for metric, truth, sign in (
            ("mass-accuracy", "planted", 1.0),
            ("deletion-auc", "none", -1.0),
            ("randomization-spearman", "none", -1.0),
        ):
            v = 0.5 + sign * (m - 0.5) + tile + rng.normal(0, 0.01, TILES)
            rows += [("r", "upland", "cnn", 0, e, metric, truth, t, float(x)) for t, x in enumerate(v)]
    cols = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
    pd.DataFrame(rows, columns=cols).to_parquet(folder / "records.parquet", index=False)
    cells = [
        {"model": "cnn", "seed": 0, "explainer": e, "status": "ok", "cost": {"seconds": 0.01 * (i + 1), "tiles": 10}}
        for i, e in enumerate(means)
    ]
    manifest = {"task": "upland", "seeds": [0], "explainer_order": list(means), "cells": cells}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder


def test_report_names_the_clear_winner_and_both_of_a_tie(tmp_path):
    clear = _run(tmp_path / "clear", {"grad-cam": 0.9, "gradient": 0.5, "occlusion": 0.4, "random": 0.2})
    summary = write_report([clear], tmp_path / "rep1", "md,html", n_resamples=200, figures=False)
    page = (tmp_path / "rep1" / "recommendations.md").read_text()
    assert "For localization (mass-accuracy (planted), ↑) `grad-cam` leads" in page
    assert "is ahead of every other method" in page
    tables = (tmp_path / "rep1" / "tables.md").read_text()
    assert tables.startswith("# Which explainer to use")  # the page opens the Markdown report
    html = (tmp_path / "rep1" / "report.html").read_text()
    assert html.index('id="advice"') < html.index('id="results"')
    assert [a.group for a in summary.recommendations[0].aspects] == [["grad-cam"], ["grad-cam"], ["grad-cam"]]

    tied = _run(tmp_path / "tied", {"grad-cam": 0.8, "gradient": 0.8, "occlusion": 0.3, "oracle": 1.0}, seed=3)
    write_report([tied], tmp_path / "rep2", "md", n_resamples=200, figures=False)
    rec = pd.read_csv(tmp_path / "rep2" / "recommendations.csv")
    loc = rec[rec["aspect"] == "localization"]
    assert sorted(loc["explainer"]) == ["grad-cam", "gradient"]
    assert "oracle" not in set(rec["explainer"])  # controls never compete

    # the page's numbers are the tables' numbers
    table = pd.read_csv(tmp_path / "rep2" / "summary.csv")
    merged = rec.merge(table, on=["task", "model", "metric", "truth", "explainer"], suffixes=("", "_table"))
    assert len(merged) == len(rec) and np.allclose(merged["mean"], merged["mean_table"])
    page = (tmp_path / "rep2" / "recommendations.md").read_text().replace("**", "")
    for r in loc.itertuples():
        assert f"{r.explainer} {r.mean:.3g}" in page
    # cost per tile from the manifest's cells: grad-cam 0.01 s / 10 tiles = 1 ms
    assert np.isclose(loc.set_index("explainer").loc["grad-cam", "seconds_per_tile"], 0.001)
    assert "(1 ms)" in page


def test_an_aspect_whose_controls_do_not_separate_says_so():
    """The controls are anchors every metric must separate; where the oracle does not beat random (the
    randomization metrics: model-blind maps never change, so every control scores 1), the page says so."""
    from xbench.report.recommend import AspectResult, BlockRecommendation, reading

    def aspect(name: str, metric: str, hib: bool, anchors: dict[str, float]) -> AspectResult:
        return AspectResult(name, metric, "none", hib, ["gradient"], {"gradient": 0.1}, anchors, 32, "tile", 1e-4)

    block = BlockRecommendation("demo", "cnn", [0, 1])
    block.aspects = [
        aspect("sanity", "randomization-spearman", False, {"random": 1.0, "edges": 1.0, "oracle": 1.0}),
        aspect("faithfulness", "deletion-auc", False, {"random": 0.45, "oracle": 0.08}),
    ]
    _, caveats = reading(block)
    flagged = [c for c in caveats if "the controls do not separate" in c]
    assert len(flagged) == 1 and flagged[0].startswith("sanity:")
    assert "`oracle` 1, `random` 1" in flagged[0]
