"""The report's comparisons on small made-up run folders: controls as anchors, rankings per model family,
columns that stay with their reasons, direction of the randomization metrics, and the methods text."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xbench.report import write_report
from xbench.report.compare import CONTROLS, summarize

GRADIENT_METHODS = ["gradient", "integrated-gradients", "grad-cam"]
BLACK_BOX_METHODS = ["occlusion", "rise"]
COLUMNS = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]


def fake_run(
    folder: Path,
    models: dict[str, str],
    quality: dict[str, float],
    *,
    seeds=(0, 1),
    n_tiles: int = 24,
    metrics=(("mass-accuracy", "planted"), ("mass-accuracy", "verified")),
    no_verified: tuple[str, ...] = (),
    metric_settings: dict | None = None,
    pack: str | None = None,
) -> Path:
    """A run folder (records + manifest). ``models``: name -> kind; black boxes get no gradient methods,
    as the grid skips them; ``no_verified`` models have NaN verified values with the runner's note."""
    rng = np.random.default_rng(0)
    rows, cells, skipped = [], [], []
    tile_effect = rng.normal(0, 0.05, n_tiles)
    for model, kind in models.items():
        black_box = kind in ("forest", "user-callable")
        for e in quality:
            if black_box and e in GRADIENT_METHODS:
                skipped.append({"model": model, "explainer": e, "reason": "needs gradients (black-box model)"})
                continue
            for seed in seeds:
                notes = {}
                for metric, truth in metrics:
                    v = quality[e] + tile_effect + rng.normal(0, 0.05, n_tiles)
                    if truth == "verified" and model in no_verified:
                        v[:] = np.nan
                        notes[f"{metric}/{truth}"] = "no model-verified evidence: a user's tile pack has no twins"
                    rows += [("r", "t", model, seed, e, metric, truth, i, float(x)) for i, x in enumerate(v)]
                cells.append({"model": model, "seed": seed, "explainer": e, "status": "ok", "notes": notes})
    folder.mkdir(parents=True, exist_ok=True)
    pd.DataFrame(rows, columns=COLUMNS).to_parquet(folder / "records.parquet", index=False)
    manifest = {
        "task": "t",
        "seeds": list(seeds),
        "data": {"recipe": None if pack else "conifer-upland", "pack": pack, "size": 32, "counts": {"test": 50}},
        "models": [
            {"name": m, "kind": k, "seed": s, "accuracy": {"test": 0.9}} for m, k in models.items() for s in seeds
        ],
        "explainers": {e: {} for e in quality},
        "explainer_order": list(quality),
        "metrics": metric_settings or {m: {} for m, _ in metrics},
        "skipped": skipped,
        "cells": cells,
    }
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return folder


QUALITY = {
    "gradient": 0.40,
    "integrated-gradients": 0.50,
    "grad-cam": 0.55,
    "occlusion": 0.45,
    "rise": 0.35,
    "random": 0.20,
    "edges": 0.42,  # beats gradient and rise: the column must say so
    "oracle": 0.95,
}


def _load(folder: Path) -> tuple[pd.DataFrame, list[dict]]:
    return pd.read_parquet(folder / "records.parquet"), [json.loads((folder / "manifest.json").read_text())]


def test_controls_never_compete_and_anchor_their_columns(tmp_path):
    records, manifests = _load(fake_run(tmp_path / "r", {"cnn": "cnn", "resnet": "resnet"}, QUALITY))
    s = summarize(records, manifests, n_resamples=200)
    for rt in s.rank_tests.values():
        assert not set(rt.explainers) & set(CONTROLS)  # never in the Friedman inputs
        assert rt.scores.shape[1] == len(rt.explainers) == 5
    col = s.table[(s.table.model == "cnn") & (s.table.metric == "mass-accuracy") & (s.table.truth == "planted")]
    col = col.set_index("explainer")
    assert col.loc["grad-cam", "best"] and not col[col.role == "control"]["best"].any()
    assert col.loc[list(CONTROLS), "p_holm"].isna().all() and (col.loc[list(CONTROLS), "mark"] == "").all()
    # Anchor score by construction: 0 at the random control's mean, 1 at the oracle's.
    r, o = col.loc["random", "mean"], col.loc["oracle", "mean"]
    assert np.isclose((r - r) / (o - r), 0) and np.isclose(col.loc["random", "anchor"], 0.0)
    assert np.isclose(col.loc["oracle", "anchor"], 1.0)
    note = s.control_notes[("t", "cnn", "mass-accuracy", "planted")]
    assert "`edges` beats 2 of 5 methods on this column: the metric rewards edge-like maps" in note


def test_black_box_model_does_not_shrink_the_torch_ranking(tmp_path):
    run = fake_run(tmp_path / "r", {"cnn": "cnn", "resnet": "resnet", "forest": "forest"}, QUALITY)
    records, manifests = _load(run)
    s = summarize(records, manifests, n_resamples=200)
    torch = s.rank_tests[("torch models", "mass-accuracy", "planted")]
    black = s.rank_tests[("black-box models", "mass-accuracy", "planted")]
    assert torch.explainers == GRADIENT_METHODS + BLACK_BOX_METHODS  # all real methods for the torch models
    assert black.explainers == BLACK_BOX_METHODS and {b[1] for b in black.blocks} == {"forest"}
    assert len(torch.blocks) == 4  # cnn and resnet x 2 seeds
    text = " ".join(s.left_out)
    assert "Not run on model `forest`" in text and "gradient" in text and "needs gradients" in text
    out = write_report([run], tmp_path / "rep", formats="md", n_resamples=200, figures=False)
    md = (out.out_dir / "tables.md").read_text()
    assert "Left out of the rankings, and why" in md and "Not run on model `forest`" in md
    # Choosing the blocks: only the forest.
    s2 = summarize(records, manifests, n_resamples=200, models=["forest"])
    assert {g for g, _, _ in s2.rank_tests} == {"black-box models"}
    assert any("--models" in x and "cnn" in x for x in s2.left_out)


def test_model_without_verified_evidence_keeps_its_verified_columns_with_the_reason(tmp_path):
    run = fake_run(tmp_path / "r", {"cnn": "cnn", "user": "user-torch"}, QUALITY, no_verified=("user",))
    out = write_report([run], tmp_path / "rep", formats="md", n_resamples=200, figures=False)
    md = (out.out_dir / "tables.md").read_text()
    user_table = md.split("### Table")[2]
    assert "t, model user" in user_table and "mass-accuracy verified" in user_table
    assert "mass-accuracy (verified) has no value for model user: no model-verified evidence" in user_table
    ranks = md.split("Average ranks across tasks, torch models: overlap metrics")[1]
    assert "| mass-accuracy | verified |" not in ranks  # the verified ranking keeps its column
    assert "verified" in ranks.split("\n")[2]
    methods = (out.out_dir / "methods.md").read_text()
    assert "block t/user left out (no model-verified evidence" in methods


def test_randomization_metrics_rank_by_magnitude(tmp_path):
    q = {"gradient": -0.8, "integrated-gradients": 0.05, "grad-cam": 0.3, "random": 0.0, "edges": 0.95, "oracle": 1.0}
    run = fake_run(tmp_path / "r", {"cnn": "cnn"}, q, metrics=(("randomization-spearman", "none"),))
    records, manifests = _load(run)
    s = summarize(records, manifests, n_resamples=200)
    col = s.table.set_index("explainer")
    # |rho| toward 0 is better: an anti-correlated map (-0.8) moved no further than one at +0.8.
    assert col.loc["integrated-gradients", "best"] and not col.loc["gradient", "best"]
    assert col.loc["gradient", "mean"] > 0.7  # the table shows mean |rho|
    assert np.isnan(col.loc["grad-cam", "anchor"])  # the oracle (a fixed mask) never moves: anchor undefined


def test_too_few_tiles_for_a_test_is_said_in_the_column(tmp_path):
    run = fake_run(tmp_path / "r", {"cnn": "cnn"}, QUALITY, n_tiles=8, metrics=(("mass-accuracy", "planted"),))
    out = write_report([run], tmp_path / "rep", formats="md", n_resamples=200, figures=False)
    md = (out.out_dir / "tables.md").read_text()
    assert "No test is possible at its n in mass-accuracy (planted) (n = 8; the exact test needs n ≥ 9" in md
    summary = pd.read_csv(out.out_dir / "summary.csv")
    assert summary["mark"].isna().all()


def test_declared_comparator(tmp_path):
    run = fake_run(tmp_path / "r", {"cnn": "cnn"}, QUALITY, metrics=(("mass-accuracy", "planted"),))
    records, manifests = _load(run)
    s = summarize(records, manifests, n_resamples=200, against="rise")
    col = s.table.set_index("explainer")
    assert (col.loc[["gradient", "grad-cam"], "comparator"] == "rise").all()
    assert col.loc["grad-cam", "n_comparisons"] == 4
    assert np.isnan(col.loc["rise", "p_holm"])


def test_methods_text_names_settings_and_provenance(tmp_path):
    run = fake_run(
        tmp_path / "r",
        {"mine": "user-torch"},
        QUALITY,
        metrics=(("deletion-auc", "none"),),
        metric_settings={"deletion-auc": {"steps": 20}},
        pack="tiles.npz",
    )
    out = write_report([run], tmp_path / "rep", formats="md", n_resamples=200, figures=False)
    text = (out.out_dir / "methods.md").read_text()
    assert "baseline = twin" in text and "steps = 20" in text  # the registry default is a setting too
    assert "loaded 1 user model" in text and "we trained" not in text
    assert "conditional on the trained network" in text and "hierarchical bootstrap" in text
    assert "Wilcoxon" in text and "all pairs" in text
    mass = fake_run(tmp_path / "m", {"mine": "user-torch"}, QUALITY, pack="tiles.npz")
    text = write_report([mass], tmp_path / "m2", formats="md", n_resamples=200, figures=False).out_dir / "methods.md"
    text = text.read_text()
    assert "the user's tile pack" in text and "what the scene generator drew" not in text


def test_enough_seeds_make_the_seeds_the_units(tmp_path):
    from scipy import stats

    q = {k: QUALITY[k] for k in ("gradient", "grad-cam", "occlusion", "random", "oracle")}
    many = fake_run(
        tmp_path / "r", {"cnn": "cnn"}, q, seeds=range(8), n_tiles=10, metrics=(("mass-accuracy", "planted"),)
    )
    records, manifests = _load(many)
    col = summarize(records, manifests, n_resamples=200).table.set_index("explainer")
    # 3 methods, 3 pairs: the exact test can reject after Holm from 7 units on; 8 seeds are enough.
    assert (col.loc[["gradient", "occlusion"], "test_unit"] == "seed").all()
    seed_means = records.groupby(["seed", "explainer"])["value"].mean().unstack()
    # Reference: scipy.stats.wilcoxon on the seeds' means (independent training runs as units).
    ref = stats.wilcoxon(seed_means["grad-cam"], seed_means["gradient"]).pvalue
    assert col.loc["gradient", "p_value"] == pytest.approx(ref, rel=1e-12) and col.loc["gradient", "test_n"] == 8
    few = fake_run(
        tmp_path / "f", {"cnn": "cnn"}, q, seeds=range(3), n_tiles=10, metrics=(("mass-accuracy", "planted"),)
    )
    records, manifests = _load(few)
    assert (summarize(records, manifests, n_resamples=200).table.query("role == 'method'")["test_unit"] == "tile").all()


def test_two_models_one_black_box(tmp_path):
    # The forest cannot run gradient methods; the torch model's ranking still holds all five real methods.
    run = fake_run(tmp_path / "r", {"cnn": "cnn", "forest": "forest"}, QUALITY, seeds=(0, 1, 2))
    records, manifests = _load(run)
    s = summarize(records, manifests, n_resamples=200)
    torch = s.rank_tests[("torch models", "mass-accuracy", "planted")]
    assert torch.explainers == GRADIENT_METHODS + BLACK_BOX_METHODS and not torch.excluded
    assert len(torch.blocks) == 3 and np.isfinite(torch.friedman.p_value)
    assert s.rank_tests[("black-box models", "mass-accuracy", "planted")].explainers == BLACK_BOX_METHODS


def test_seed_tile_matrices_give_each_explainers_bootstrap_as_its_own_pivot():
    # One reshaping per column for all explainers (rows and columns of any explainer) instead of one pandas
    # pivot per explainer: the extra seeds and tiles are NaN, which the hierarchical bootstrap drops, so each
    # explainer's interval must equal the one from its own pivot table (pandas' pivot_table, the reference).
    from xbench import stats
    from xbench.report.compare import seed_tile_matrices

    rng = np.random.default_rng(4)
    rows = []
    for explainer, seeds, tiles in (("a", [0, 1, 2], range(12)), ("b", [1, 2], range(3, 12)), ("c", [0], range(8))):
        for seed in seeds:
            for tile in tiles:
                value = np.nan if rng.random() < 0.1 else rng.normal(seed * 0.1, 1.0)
                rows.append({"explainer": explainer, "seed": seed, "tile": tile, "value": value})
    rows.append({"explainer": "a", "seed": 0, "tile": -1, "value": 5.0})  # a per-seed value: not a tile's
    group = pd.DataFrame(rows)
    matrices = seed_tile_matrices(group)
    assert sorted(matrices) == ["a", "b", "c"]
    for explainer, matrix in matrices.items():
        g = group[(group["explainer"] == explainer) & (group["tile"] >= 0)]
        own = g.pivot_table(index="seed", columns="tile", values="value", aggfunc="mean", dropna=False)
        got = stats.hierarchical_bootstrap_ci(matrix, n_resamples=300, seed=1)
        want = stats.hierarchical_bootstrap_ci(own.to_numpy(dtype=np.float64), n_resamples=300, seed=1)
        assert got == want
