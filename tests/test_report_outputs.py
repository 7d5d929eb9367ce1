"""The report end to end on small fabricated run folders (fixed seed): files, figures, tables, text.

The run folders are made up (numbers drawn with a fixed seed) to exercise the report's mechanics; the
statistics in them are checked against scipy.stats computed independently from the same records.
"""

from __future__ import annotations

import html.parser
import json
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from xbench.errors import XbenchInputError
from xbench.report import write_report
from xbench.report.stats import holm

EXPLAINERS = ["gradient", "integrated-gradients", "grad-cam", "activation-clusters", "random", "oracle"]
QUALITY = {
    "gradient": 0.45,
    "integrated-gradients": 0.55,
    "grad-cam": 0.6,
    "activation-clusters": 0.5,
    "random": 0.2,
    "oracle": 0.95,
}
BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]
CLASSES = ["forest", "logged"]


def make_run(
    folder: Path,
    task: str,
    models: list[str],
    seeds: list[int],
    n_tiles: int = 24,
    rng_seed: int = 0,
    artifacts: bool = True,
    extras: bool = True,
    long_accuracy_keys: bool = False,
) -> Path:
    """A run folder following the result-store contract of DEVELOPERS.md, with made-up numbers."""
    rng = np.random.default_rng(rng_seed)
    folder.mkdir(parents=True, exist_ok=True)
    rows = []
    model_shift = {m: 0.05 * i for i, m in enumerate(models)}
    tile_effect = rng.normal(0, 0.08, n_tiles)  # tiles differ in difficulty, shared by explainers
    for model in models:
        for seed in seeds:
            for e in EXPLAINERS:
                q = QUALITY[e] - model_shift[model]
                for truth, off in (("planted", 0.0), ("verified", -0.05)):
                    v = np.clip(q + off + tile_effect + rng.normal(0, 0.06, n_tiles), 0, 1)
                    v[rng.random(n_tiles) < 0.05] = np.nan  # undefined values happen
                    rows += [
                        (f"run-{task}", task, model, seed, e, "mass-accuracy", truth, t, float(x))
                        for t, x in enumerate(v)
                    ]
                pg = (rng.random(n_tiles) < q).astype(float)
                rows += [
                    (f"run-{task}", task, model, seed, e, "pointing-game", "planted", t, float(x))
                    for t, x in enumerate(pg)
                ]
                dl = np.clip(0.6 - 0.5 * q + rng.normal(0, 0.05, n_tiles), 0, 1)
                rows += [
                    (f"run-{task}", task, model, seed, e, "deletion-auc", "none", t, float(x)) for t, x in enumerate(dl)
                ]
                sp = np.clip(0.3 + 0.4 * rng.random() + rng.normal(0, 0.05, n_tiles), 0, 1)
                rows += [(f"run-{task}", task, model, seed, e, "gini", "none", t, float(x)) for t, x in enumerate(sp)]
                rows.append(
                    (
                        f"run-{task}",
                        task,
                        model,
                        seed,
                        e,
                        "seconds",
                        "none",
                        -1,
                        float(0.001 * (1 + 50 * (e == "integrated-gradients")) * (1 + 0.1 * rng.random())),
                    )
                )
    records = pd.DataFrame(
        rows, columns=["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
    )
    records.to_parquet(folder / "records.parquet", index=False)
    records.to_csv(folder / "records.csv", index=False)
    cells = [
        {
            "cell_id": f"{m}-{s}-{e}",
            "model": m,
            "seed": s,
            "explainer": e,
            "status": "ok",
            "seconds": 1.5,
            "error": None,
            "cost": {
                "forward_calls": 10,
                "backward_calls": 10,
                "seconds": 0.02 * (1 + 20 * (e == "integrated-gradients")),
                "tiles": n_tiles,
            },
        }
        for m in models
        for s in seeds
        for e in EXPLAINERS
    ]
    manifest = {
        "run_id": f"run-{task}",
        "task": task,
        "task_hash": "abc123def456",
        "xbench_version": "0.1.0",
        "versions": {"numpy": np.__version__},
        "git_commit": "0123456789abcdef",
        "machine": {"python": "3.11"},
        "seeds": seeds,
        "data": {
            "recipe": "conifer-upland",
            "size": 32,
            "counts": {"train": 800, "val": 200, "test": 200},
            "label_rule": "logged if a road or a clearing covers at least 2 % of the tile",
            "class_names": CLASSES,
            "label_noise": 0.02,
            "cue": None,
            "driving_types": {"forest": [], "logged": ["road", "clearing"]},
            "lookalike_types": ["river"],
        },
        "models": [
            {
                "name": m,
                "kind": "resnet" if m == "resnet" else "cnn",
                "seed": s,
                "accuracy": (
                    {"train_accuracy": 0.97, "test_accuracy": 0.92 - 0.01 * s, "test_balanced_accuracy": 0.91}
                    if long_accuracy_keys  # the names `xbench run` writes
                    else {"train": 0.97, "val": 0.93, "test": 0.92 - 0.01 * s, "balanced_test": 0.91}
                ),
                "params": 12345,
            }
            for m in models
            for s in seeds
        ],
        "explainers": {e: ({"steps": 32} if e == "integrated-gradients" else {}) for e in EXPLAINERS},
        "metrics": {
            "mass-accuracy": {},
            "pointing-game": {},
            "deletion-auc": {"baseline": "blur"},
            "gini": {},
            "seconds": {},
        },
        "explain_tiles": n_tiles,
        "cells": cells,
    }
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2))
    curve_rows = []
    for model in models[:1]:  # curves for the first model only: fewer figures, faster tests
        for seed in seeds:
            for e in EXPLAINERS:
                q = QUALITY[e]
                for step in range(11):
                    x = step / 10
                    curve_rows.append(
                        (
                            task,
                            model,
                            seed,
                            e,
                            "deletion",
                            "blur",
                            step,
                            x,
                            "",
                            float(0.9 * np.exp(-4 * q * x)),
                            0.1,
                            n_tiles,
                        )
                    )
                    curve_rows.append(
                        (
                            task,
                            model,
                            seed,
                            e,
                            "insertion",
                            "blur",
                            step,
                            x,
                            "",
                            float(0.9 * (1 - np.exp(-4 * q * x))),
                            0.1,
                            n_tiles,
                        )
                    )
                for step, layer in enumerate(["fc", "conv3", "conv2", "conv1"]):
                    decay = 0.0 if e == "oracle" else 0.25 * q
                    curve_rows.append(
                        (
                            task,
                            model,
                            seed,
                            e,
                            "randomization-spearman",
                            "",
                            step,
                            float(step),
                            layer,
                            float(max(0.0, 1 - decay * (step + 1))),
                            0.05,
                            n_tiles,
                        )
                    )
                    curve_rows.append(
                        (
                            task,
                            model,
                            seed,
                            e,
                            "randomization-ssim",
                            "",
                            step,
                            float(step),
                            layer,
                            float(max(0.0, 0.9 - decay * (step + 1))),
                            0.05,
                            n_tiles,
                        )
                    )
    if not extras:  # records and manifest only
        return folder
    pd.DataFrame(
        curve_rows,
        columns=[
            "task",
            "model",
            "seed",
            "explainer",
            "curve",
            "baseline",
            "step",
            "x",
            "label",
            "mean",
            "sd",
            "n",
        ],
    ).to_parquet(folder / "curves.parquet")
    rel = [
        (task, m, s, k, d + rng.normal(0, 0.01), d - 0.03, d + 0.03, n_tiles)
        for m in models
        for s in seeds
        for k, d in (("road", 0.3), ("clearing", 0.2), ("river", 0.0), ("cue", 0.05))
    ]
    pd.DataFrame(rel, columns=["task", "model", "seed", "kind", "mean_drop", "ci_low", "ci_high", "n"]).to_parquet(
        folder / "reliance.parquet"
    )
    pd.DataFrame(
        [
            (
                task,
                models[0],
                seeds[0],
                "activation-clusters",
                "cluster 0",
                "logged",
                0.3,
                0.1,
                0.01,
                "road",
                0.4,
                0.8,
            )
        ],
        columns=[
            "task",
            "model",
            "seed",
            "explainer",
            "concept",
            "class_name",
            "score",
            "spread",
            "p_value",
            "matched_type",
            "iou",
            "purity",
        ],
    ).to_parquet(folder / "concepts.parquet")
    if artifacts:
        art = folder / "artifacts"
        art.mkdir(exist_ok=True)
        g, h = 3, 32
        yy, xx = np.mgrid[:h, :h]
        planted = np.stack([(np.abs(yy - xx - 4 * i) < 2) for i in range(g)])
        images = np.empty((g, 6, h, h), np.float32)
        veg = np.array([0.03, 0.06, 0.04, 0.40, 0.20, 0.10])
        road = np.array([0.10, 0.11, 0.12, 0.13, 0.14, 0.14])
        for i in range(g):
            images[i] = np.where(planted[i][None], road[:, None, None], veg[:, None, None])
        images += rng.normal(0, 0.005, images.shape).astype(np.float32)
        for model in models[:1]:
            seed = seeds[0]
            maps = {
                f"map__{e}": (planted * QUALITY[e] + rng.random((g, h, h)) * (1 - QUALITY[e])).astype(np.float32)
                for e in EXPLAINERS
            }
            maps["map__gradient"] = maps["map__gradient"] - 0.3  # a signed map
            np.savez_compressed(
                art / f"gallery__{task}__{model}__{seed}.npz",
                images=images,
                band_names=np.array(BANDS),
                planted=planted,
                evidence=(planted * 0.8).astype(np.float32),
                tiles=np.arange(g),
                targets=np.ones(g, np.int64),
                class_names=np.array(CLASSES),
                **maps,
            )
        np.savez_compressed(
            art / f"clusters__{task}__{models[0]}__{seeds[0]}.npz",
            images=images,
            cluster_maps=(planted[:, ::4, ::4].astype(np.int64) + (xx[::4, ::4] > 16)),
            score_changes=rng.normal(0, 0.1, (3, n_tiles, 2)) - np.array([0, 0, 0.2])[:, None, None],
            class_names=np.array(CLASSES),
        )
    return folder


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> list[Path]:
    base = tmp_path_factory.mktemp("runs")
    # Three task x model blocks; the second folder holds records and a manifest only (fewer figures: fast).
    return [
        make_run(base / "vale", "vellardine-roads", ["cnn", "resnet"], [0, 1], rng_seed=1),
        make_run(
            base / "bog",
            "vellardine-clearcuts",
            ["cnn"],
            [0, 1],
            rng_seed=2,
            artifacts=False,
            extras=False,
            long_accuracy_keys=True,
        ),
    ]


@pytest.fixture(scope="module")
def report(runs, tmp_path_factory):
    out = tmp_path_factory.mktemp("report")
    # 500 resamples: the table test reproduces them with scipy; 2 gallery tiles keep the figure quick.
    return write_report(runs, out, n_resamples=500, gallery_tiles=2)


def test_write_report_returns_summary_and_prints_nothing(runs, tmp_path, capsys):
    s = write_report(runs[:1], tmp_path / "r", formats="md", n_resamples=200, figures=False)
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
    assert (tmp_path / "r" / "tables.md").is_file() and not (tmp_path / "r" / "report.html").exists()
    assert all(p.is_file() for p in s.paths)


def test_every_file_exists_and_figures_are_png_and_pdf(report):
    out = report.out_dir
    for name in (
        "tables.md",
        "tables.tex",
        "report.html",
        "methods.md",
        "refs.bib",
        "summary.csv",
        "ranks.csv",
    ):
        assert (out / name).stat().st_size > 0, name
    for p in report.paths:
        assert p.is_file() and p.stat().st_size > 0, p
    pngs = sorted((out / "figures").glob("*.png"))
    assert len(pngs) == report.n_figures
    for png in pngs:
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        pdf = png.with_suffix(".pdf")
        assert pdf.read_bytes()[:5] == b"%PDF-"
    stems = {p.stem.split("__")[0] for p in pngs}
    assert stems == {"gallery", "curves", "randomization", "cd", "clusters", "reliance", "cost_quality"}


def test_figures_drawn_on_two_cores_are_the_same_files_and_notes(runs, report, tmp_path):
    # the module's report was drawn with the default jobs (2 here: forked); one process must give the same
    # bytes of every figure, the same list of figures and the same report.log
    serial = write_report(runs, tmp_path / "serial", n_resamples=500, gallery_tiles=2, jobs=1)
    names = sorted(p.name for p in (report.out_dir / "figures").iterdir())
    assert names == sorted(p.name for p in (serial.out_dir / "figures").iterdir())
    for name in names:
        assert (report.out_dir / "figures" / name).read_bytes() == (serial.out_dir / "figures" / name).read_bytes()
    assert (report.out_dir / "report.log").read_text() == (serial.out_dir / "report.log").read_text()


def _pid_unit(i: int, seconds: float):
    """A drawing unit that takes ``seconds``, notes its index and returns (index, the drawing process's id)."""
    import os
    import time

    def run(notes):
        time.sleep(seconds)
        notes.append(f"note {i}")
        return [(i, os.getpid())]

    return run


def test_draw_units_keeps_order_and_redraws_what_a_dead_child_left():
    import os
    import time

    from xbench.report.drawing import can_fork, draw_units

    parent = os.getpid()
    out = draw_units([_pid_unit(i, 0.02) for i in range(8)], jobs=2)
    assert [files[0][0] for files, _ in out] == list(range(8))
    assert [notes for _, notes in out] == [[f"note {i}"] for i in range(8)]
    if can_fork():  # both processes drew some
        pids = {files[0][1] for files, _ in out}
        assert parent in pids and len(pids) == 2

    def dies_in_child(notes):
        if os.getpid() != parent:
            os._exit(3)  # the child ends without sending anything back
        time.sleep(0.05)
        return ["drawn here"]

    out = draw_units([dies_in_child] * 4, jobs=2)
    assert [files for files, _ in out] == [["drawn here"]] * 4
    assert draw_units([], jobs=2) == [] and draw_units([_pid_unit(0, 0.0)], jobs=2)[0][0][0][0] == 0


def test_a_drawing_started_early_draws_while_the_caller_works_and_can_be_stopped(tmp_path):
    # The report starts the gallery pages in a forked child before its statistics: the child draws while this
    # process does other work, finish() joins in on what is left and returns the units' results in order; on an
    # error path close() stops a child still drawing (its unit never finishes).
    import os
    import time

    from xbench.report.drawing import Drawing, can_fork

    if not can_fork():
        pytest.skip("forks only on Linux")
    parent = os.getpid()
    drawing = Drawing([_pid_unit(i, 0.05) for i in range(6)], jobs=2)
    time.sleep(0.2)  # the caller's own work: the child has drawn some units meanwhile
    out = drawing.finish()
    assert [files[0][0] for files, _ in out] == list(range(6))
    assert [notes for _, notes in out] == [[f"note {i}"] for i in range(6)]
    pids = [files[0][1] for files, _ in out]
    assert pids[0] != parent and parent in pids  # the child started first, this process joined in
    flag = tmp_path / "finished"

    def slow(notes):
        time.sleep(30)
        flag.write_text("done")
        return []

    drawing = Drawing([slow], jobs=2)
    started = time.perf_counter()
    drawing.close()
    assert time.perf_counter() - started < 10 and not flag.exists() and drawing.process is None


def test_figures_use_the_agg_canvas():
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from xbench.report.figures import new_figure

    assert isinstance(new_figure(2, 2).canvas, FigureCanvasAgg)


def test_html_page_is_well_formed_and_self_contained(report):
    text = (report.out_dir / "report.html").read_text(encoding="utf-8")
    ET.fromstring(text.split("\n", 1)[1])  # XML parser: every element closed, attributes quoted

    class Balance(html.parser.HTMLParser):  # html.parser: open/close tags balance
        VOID = {"meta", "img", "br", "hr", "link", "input"}

        def __init__(self):
            super().__init__()
            self.stack: list[str] = []

        def handle_starttag(self, tag, attrs):
            if tag not in self.VOID:
                self.stack.append(tag)

        def handle_startendtag(self, tag, attrs):  # <meta .../>: opens and closes at once
            pass

        def handle_endtag(self, tag):
            assert self.stack and self.stack[-1] == tag, (tag, self.stack[-5:])
            self.stack.pop()

    p = Balance()
    p.feed(text)
    p.close()
    assert p.stack == []
    assert text.count("data:image/png;base64,") == report.n_figures
    assert 'src="http' not in text and "<link" not in text


def test_latex_table_structure(report):
    tex = (report.out_dir / "tables.tex").read_text()
    n_tex = report.n_tables  # concept tables included (tests/test_latex.py compiles the file)
    assert tex.count("\\begin{table*}") == tex.count("\\end{table*}") == n_tex
    assert tex.count("\\toprule") == tex.count("\\bottomrule") == n_tex
    assert "\\textbf{" in tex and "Wilcoxon signed-rank" in tex and "hierarchical bootstrap" in tex
    assert "2 model seeds (0, 1)" in tex


def _seed_averaged(records: pd.DataFrame, task, model, metric, truth) -> pd.DataFrame:
    r = records[
        (records.task == task)
        & (records.model == model)
        & (records.metric == metric)
        & (records.truth == truth)
        & (records.tile >= 0)
    ]
    return r.groupby(["tile", "explainer"])["value"].mean().unstack()


def test_table_numbers_equal_scipy_on_the_records(runs, report):
    records = pd.concat([pd.read_parquet(r / "records.parquet") for r in runs])
    summary = pd.read_csv(report.out_dir / "summary.csv")
    task, model, metric, truth = "vellardine-roads", "cnn", "mass-accuracy", "planted"
    wide = _seed_averaged(records, task, model, metric, truth)
    block = summary[
        (summary.task == task) & (summary.model == model) & (summary.metric == metric) & (summary.truth == truth)
    ].set_index("explainer")
    methods = [e for e in EXPLAINERS if e not in ("random", "oracle")]
    best = wide[methods].mean().idxmax()  # controls never compete: the oracle is not "best"
    assert best == "grad-cam" and bool(block.loc[best, "best"]) and not block.loc["oracle", "best"]
    sub = records[(records.task == task) & (records.model == model) & (records.metric == metric)]
    sub = sub[sub.truth == truth]
    for e in EXPLAINERS:
        seed_means = sub[sub.explainer == e].groupby("seed")["value"].mean()  # NaN dropped per seed
        assert block.loc[e, "mean"] == pytest.approx(seed_means.mean(), rel=1e-9)
    # All pairs of real methods, Holm over all 6 pairs (Holm 1979); reference: scipy.stats.wilcoxon paired by
    # tile on the seed-averaged values.
    pairs = [(a, b) for i, a in enumerate(methods) for b in methods[i + 1 :]]
    raw = []
    for a, b in pairs:
        pair = wide[[a, b]].dropna()
        raw.append(stats.wilcoxon(pair[a], pair[b]).pvalue)
    adj = dict(zip(pairs, holm(raw), strict=True))
    for e in methods:
        if e == best:
            continue
        key = (best, e) if (best, e) in adj else (e, best)
        assert block.loc[e, "p_holm"] == pytest.approx(adj[key], rel=1e-6)
        assert block.loc[e, "p_value"] == pytest.approx(raw[pairs.index(key)], rel=1e-6)
    assert pd.isna(block.loc["random", "mark"]) or block.loc["random", "mark"] == ""
    assert np.isnan(block.loc["random", "p_holm"]) and np.isnan(block.loc["oracle", "p_holm"])
    # Anchor: (x - random) / (oracle - random) with the table's own means.
    r, o = block.loc["random", "mean"], block.loc["oracle", "mean"]
    assert block.loc["gradient", "anchor"] == pytest.approx((block.loc["gradient", "mean"] - r) / (o - r))


def test_one_seed_interval_equals_scipy_bootstrap(tmp_path):
    run = make_run(tmp_path / "one", "t", ["cnn"], [0], n_tiles=20, artifacts=False, extras=False)
    write_report([run], tmp_path / "out", formats="md", n_resamples=500, figures=False)
    summary = pd.read_csv(tmp_path / "out" / "summary.csv")
    rec = pd.read_parquet(run / "records.parquet")
    row = summary[(summary.metric == "deletion-auc") & (summary.explainer == "gradient")].iloc[0]
    v = rec[(rec.metric == "deletion-auc") & (rec.explainer == "gradient")]["value"].dropna().to_numpy()
    # Reference: scipy.stats.bootstrap, BCa, same resamples and seed as the report used.
    ci = stats.bootstrap((v,), np.mean, n_resamples=500, method="BCa", rng=np.random.default_rng(0))
    assert (row.ci_low, row.ci_high) == pytest.approx((ci.confidence_interval.low, ci.confidence_interval.high))


def test_rank_statistics_equal_scipy_friedman(runs, report):
    records = pd.concat([pd.read_parquet(r / "records.parquet") for r in runs])
    ranks = pd.read_csv(report.out_dir / "ranks.csv")
    r = ranks[(ranks.metric == "deletion-auc")]
    methods = [e for e in EXPLAINERS if e not in ("random", "oracle")]
    assert set(r["explainer"]) == set(methods)  # controls never enter the Friedman inputs
    sub = records[(records.metric == "deletion-auc")]
    blocks = sub.groupby(["task", "model", "seed", "explainer"])["value"].mean().unstack()[methods]
    scores = blocks.to_numpy()
    assert scores.shape == (6, 4)  # task x model x seed blocks
    # Reference: scipy.stats.friedmanchisquare over the 6 task x model x seed blocks.
    ref = stats.friedmanchisquare(*scores.T)
    assert r["friedman_chi2"].iloc[0] == pytest.approx(ref.statistic, rel=1e-5)
    assert r["friedman_p"].iloc[0] == pytest.approx(ref.pvalue, rel=1e-4)
    # Average ranks (lower deletion AUC is better, rank 1 = best), scipy.stats.rankdata.
    avg = stats.rankdata(scores, axis=1).mean(axis=0)
    got = r.set_index("explainer").loc[methods, "avg_rank"].to_numpy()
    np.testing.assert_allclose(got, avg, rtol=1e-5)
    k, n = len(methods), 6
    q = stats.studentized_range.ppf(0.95, k, np.inf) / np.sqrt(2)
    assert r["cd"].iloc[0] == pytest.approx(q * np.sqrt(k * (k + 1) / (6 * n)), rel=1e-4)


def test_markdown_tables_mark_best_and_significance(report):
    md = (report.out_dir / "tables.md").read_text()
    assert "| Explainer |" in md and "**" in md
    gradcam = next(line for line in md.splitlines() if line.startswith("| grad-cam |"))
    assert gradcam.split("|")[2].strip().startswith("**")  # best real method at mass-accuracy (planted)
    gradient = next(line for line in md.splitlines() if line.startswith("| gradient |"))
    assert "\\*\\*\\*" in gradient
    for control in ("random", "oracle"):  # anchors: never bold, never marked, no anchor score
        line = next(x for x in md.splitlines() if x.startswith(f"| {control} |"))
        assert "**" not in line and "\\*" not in line and "(a " not in line
    assert "(a 0." in gradcam
    assert "per seed†" in md  # 'seconds' has one value per seed


def test_methods_text_names_the_concept_example_sets():
    from xbench.report.methods import concept_sets_sentences

    manifest = {
        "explainers": {"tcav": {}, "activation-clusters": {}},
        "run_settings": {"concept_set_size": 80, "random_sets": 20, "fit_tiles": 150},
    }
    text = " ".join(concept_sets_sentences(manifest))
    assert "example sets of 80 synthetic tiles" in text and "20 random sets" in text and "150 correctly" in text
    assert concept_sets_sentences({"explainers": {"gradient": {}}, "run_settings": manifest["run_settings"]}) == []
    # the TCAV test the verdicts come from is named, with the explainer's evidence setting (default: both tests)
    assert "every ReLU layer" in text and "Bonferroni over the two tests" in text
    single = dict(manifest, explainers={"tcav": {"evidence": "layer"}})
    assert "at the explainer's layer alone" in " ".join(concept_sets_sentences(single))


def test_methods_text_and_bibliography(report):
    text = (report.out_dir / "methods.md").read_text()
    bib = (report.out_dir / "refs.bib").read_text()
    for expected in (
        "800 training, 200 validation and 200 test tiles",
        "conifer-upland",
        "24 test tiles",
        "steps = 32",
        "Holm",
        "Friedman",
        "BCa",
        "500 resamples",
    ):
        assert expected in text, expected
    models = text.split("## Models")[1].split("## Explainers")[0]
    assert "n/a" not in models and models.count("test accuracy 0.915 ± 0.007") == 3
    cited = set(re.findall(r"@([a-z0-9]+)", text))
    entries = set(re.findall(r"@\w+\{([a-z0-9]+),", bib))
    assert cited == entries
    for key in (
        "demsar2006statistical",
        "wilcoxon1945individual",
        "holm1979simple",
        "efron1993introduction",
        "simonyan2014deep",
        "sundararajan2017axiomatic",
        "selvaraju2017gradcam",
        "ghorbani2019towards",
        "arras2022clevrxai",
        "petsiuk2018rise",
        "chalasani2020concise",
        "he2016deep",
    ):
        assert key in entries, key
    assert "Dem{\\v{s}}ar, Janez" in bib and "Journal of Machine Learning Research" in bib
    # Arras et al. 2022 is the CLEVR-XAI paper (Information Fusion 81); the header names no other document
    assert "{CLEVR-XAI}: A benchmark dataset for the ground truth evaluation of neural network explanations" in bib
    assert "10.1016/j.inffus.2021.11.008" in bib and "{81}" in bib
    assert "REFERENCES" not in bib and "memory" not in bib.lower()


def test_bibliography_entries_are_complete():
    """Every catalogue entry: full author names (surname, given names), a title, a year; journal articles
    also a volume and pages."""
    from xbench.report.bib import CATALOGUE

    for key, entry in CATALOGUE.items():
        fields = dict(entry.fields)
        authors = fields["author"].split(" and ")
        assert all("," in a and len(a.split(",")[1].strip()) > 1 for a in authors), key
        assert "others" not in fields["author"] and fields["title"] and fields["year"], key
        if entry.kind == "article":
            assert "volume" in fields and "pages" in fields, key


def test_missing_optional_files_are_logged_not_fatal(tmp_path):
    run = make_run(tmp_path / "run", "vellardine-roads", ["cnn"], [0], artifacts=False)
    for name in (
        "curves.parquet",
        "reliance.parquet",
        "concepts.parquet",
        "records.parquet",
        "manifest.json",
    ):
        (run / name).unlink()
    s = write_report([run], tmp_path / "out", n_resamples=200, figures=False)
    notes = "\n".join(s.warnings)
    for name in ("curves.parquet", "reliance.parquet", "manifest.json", "artifacts"):
        assert name in notes, name
    assert (tmp_path / "out" / "tables.md").is_file()
    assert s.n_figures == 0 or all(p.stat().st_size > 0 for p in s.paths)


def test_bad_input_raises_clear_errors(tmp_path):
    with pytest.raises(XbenchInputError, match="not found"):
        write_report([tmp_path / "nowhere"], tmp_path / "out")
    (tmp_path / "empty").mkdir()
    with pytest.raises(XbenchInputError, match="records"):
        write_report([tmp_path / "empty"], tmp_path / "out")
    run = make_run(tmp_path / "run", "t", ["cnn"], [0], n_tiles=6, artifacts=False)
    with pytest.raises(XbenchInputError, match="unknown format"):
        write_report([run], tmp_path / "out", formats="md,docx")
    pd.read_parquet(run / "records.parquet").drop(columns=["truth"]).to_parquet(run / "records.parquet")
    with pytest.raises(XbenchInputError, match="records.parquet: records lack columns"):
        write_report([run], tmp_path / "out")


def test_cli_report_prints_paths(runs, tmp_path, capsys):
    from xbench.cli import main

    assert (
        main(
            [
                "report",
                str(runs[0]),
                "--out",
                str(tmp_path / "r"),
                "--format",
                "md,html",
                "--resamples",
                "200",
                "--no-figures",
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    assert "tables.md" in out and "report.html" in out and "methods.md" in out
    assert main(["report", str(tmp_path / "missing")]) == 2
    assert "xbench report: error:" in capsys.readouterr().err


def test_figures_of_an_earlier_report_are_replaced(tmp_path):
    run = make_run(tmp_path / "run", "t", ["cnn"], [0], n_tiles=8, artifacts=False, extras=False)
    figs = tmp_path / "out" / "figures"
    figs.mkdir(parents=True)
    (figs / "cd__old-metric__none.png").write_bytes(b"old")
    (figs / "my-own-figure.png").write_bytes(b"mine")  # not a report name: left alone
    s = write_report([run], tmp_path / "out", formats="md", n_resamples=200)
    assert not (figs / "cd__old-metric__none.png").exists() and (figs / "my-own-figure.png").exists()
    assert sorted(p.name for p in figs.glob("*.png")) == ["cost_quality.png", "my-own-figure.png"]
    assert any("earlier report" in w for w in s.warnings)


def test_breakdowns_by_class_type_and_coverage_and_models_side_by_side(tmp_path):
    run = make_run(tmp_path / "run", "vellardine-roads", ["cnn", "resnet"], [0, 1], artifacts=False)
    tiles = pd.DataFrame(
        {
            "task": "vellardine-roads",
            "tile": np.arange(24),
            "class_name": np.where(np.arange(24) % 2 == 0, "road", "clearing"),
            "main_type": np.where(np.arange(24) % 3 == 0, "road", "clearing"),
            "coverage": np.linspace(0.0, 0.2, 24),
        }
    )
    tiles.to_parquet(run / "tiles.parquet", index=False)
    s = write_report([run], tmp_path / "out", "md,tex", n_resamples=200, figures=False)
    md = (tmp_path / "out" / "tables.md").read_text()
    assert "# Breakdowns" in md
    assert "vellardine-roads, model cnn: mass-accuracy (planted) by class" in md
    assert "vellardine-roads, model cnn: mass-accuracy (planted) by structure type" in md
    assert "vellardine-roads, model cnn: mass-accuracy (planted) by coverage" in md
    assert "vellardine-roads: models side by side" in md
    # Known answer: the by-class mean of grad-cam on road tiles, computed here with pandas from the records
    # (tiles averaged over seeds first, then over the class's tiles).
    rec = pd.read_parquet(run / "records.parquet")
    r = rec[(rec.model == "cnn") & (rec.metric == "mass-accuracy") & (rec.truth == "planted")]
    r = r[r.explainer == "grad-cam"]
    per_tile = r.groupby("tile")["value"].mean()
    expected = per_tile[per_tile.index % 2 == 0].mean()
    table = md.split("mass-accuracy (planted) by class")[1].split("\n\n")[1]
    row = next(line for line in table.splitlines() if line.startswith("| grad-cam"))
    assert f"{expected:.3f}" in row
    assert s.n_tables == len(re.findall(r"\\begin\{table\*\}", (tmp_path / "out" / "tables.tex").read_text()))


def test_skipped_metrics_and_their_reasons_are_in_the_report(tmp_path):
    run = make_run(tmp_path / "run", "vellardine-roads", ["cnn"], [0], artifacts=False)
    manifest = json.loads((run / "manifest.json").read_text())
    manifest["cells"][0]["notes"] = {"deletion-auc/none": "the pack has no twins: needs counterfactual twins"}
    (run / "manifest.json").write_text(json.dumps(manifest))
    write_report([run], tmp_path / "a", "md,html", n_resamples=200, figures=False)
    md = (tmp_path / "a" / "tables.md").read_text()
    assert "# Skipped metrics and undefined values" in md
    line = next(x for x in md.splitlines() if "needs counterfactual twins" in x)
    assert "deletion-auc" in line and manifest["cells"][0]["explainer"] in line
    assert "needs counterfactual twins" in (tmp_path / "a" / "report.html").read_text()
    # a reasons table written by the run takes precedence over the manifest's notes
    cols = ["task", "model", "seed", "explainer", "metric", "truth", "reason"]
    pd.DataFrame(
        [("vellardine-roads", "cnn", 0, "", "insertion-auc", "none", "skipped: no twins")], columns=cols
    ).to_parquet(run / "reasons.parquet", index=False)
    write_report([run], tmp_path / "b", "md", n_resamples=200, figures=False)
    md = (tmp_path / "b" / "tables.md").read_text()
    assert "skipped: no twins" in md and "needs counterfactual twins" not in md
    assert "| vellardine-roads / cnn | insertion-auc | all | skipped: no twins |" in md


def test_draw_units_inside_a_pool_worker_draws_everything_there():
    # a daemonic process (a multiprocessing pool's worker) may not start children: the units run in it
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(1) as pool:
        out = pool.apply(_draw_in_worker)
    assert out == [[0], [1], [2]]


def _draw_in_worker():
    from xbench.report.drawing import draw_units

    return [files for files, _ in draw_units([lambda notes, i=i: [i] for i in range(3)], jobs=2)]


def test_draw_units_raises_the_units_warnings_again_in_the_caller():
    # a warning raised while a figure is drawn (in the forked child or here) reaches the caller's own
    # warning filters, in the units' order: write_report logs them as it logs any other warning
    import warnings

    from xbench.report.drawing import draw_units

    def unit(i):
        def run(notes):
            warnings.warn(f"unit {i} warns", UserWarning, stacklevel=1)
            return [i]

        return run

    for jobs in (1, 2):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            out = draw_units([unit(i) for i in range(4)], jobs=jobs)
        assert [files for files, _ in out] == [[0], [1], [2], [3]]
        assert [str(w.message) for w in caught] == [f"unit {i} warns" for i in range(4)], jobs


def test_gallery_pages_drawn_one_at_a_time_are_the_pages_drawn_together(tmp_path):
    # The report draws each gallery page as a unit of its own (two processes share a long gallery): a page made
    # alone must be the same figure, byte for byte, as that page made with the others.
    from xbench.report import figures as F

    rng = np.random.default_rng(2)
    n, h = 4, 12
    names = [f"method-{k}" for k in range(F.GALLERY_MAPS_PER_PART + 2)]  # two pages
    data = {
        "images": rng.random((n, 4, h, h)).astype(np.float32),
        "band_names": np.array(["blue", "green", "red", "nir"]),
        "planted": rng.random((n, h, h)) > 0.7,
        "targets": np.array([0, 1, 0, 1]),
        "class_names": np.array(["intact", "road"]),
        **{f"map__{e}": rng.normal(size=(n, h, h)).astype(np.float32) for e in names},
    }
    assert F.gallery_part_count(data, names) == 2
    together, notes = F.gallery_figures(data, names, "t", max_tiles=4)
    assert len(together) == 2
    for part, fig in enumerate(together, start=1):
        (alone,), alone_notes = F.gallery_figures(data, names, "t", max_tiles=4, parts=[part])
        assert alone_notes == notes
        a, _ = F.save(fig, tmp_path / "together", f"p{part}")
        b, _ = F.save(alone, tmp_path / "alone", f"p{part}")
        assert a.read_bytes() == b.read_bytes()
