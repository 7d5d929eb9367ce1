"""Protocol variants: a task file declares them, the runner runs each into OUT/variants/NAME, the report
compares the rankings (Kendall's tau) and flags the flips."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xbench.errors import XbenchInputError
from xbench.report import write_report
from xbench.report.compare import variant_sensitivity
from xbench.runs import run_task
from xbench.tasks import apply_variant, load_task

TINY = Path(__file__).parent / "data" / "tiny_task.toml"

VARIANTS = """
[[variants]]
name = "zero-baseline"
description = "deletion and insertion from a zero image instead of the twin"
explainers = ["gradient", "grad-cam", "random", "oracle"]
metrics = ["deletion-auc", "mass-accuracy"]
[variants.metric_settings.deletion-auc]
baseline = "zero"
steps = 10
[variants.explainer_settings.gradient]
reduce = "sum-abs"
"""


def tiny_with_variants(tmp_path: Path, extra: str = VARIANTS) -> Path:
    path = tmp_path / "tiny_variants.toml"
    path.write_text(TINY.read_text() + extra)
    return path


def test_variants_parse_merge_and_fail_clearly(tmp_path):
    task = load_task(tiny_with_variants(tmp_path))
    (v,) = task.variants
    assert v.name == "zero-baseline" and v.metrics == ["deletion-auc", "mass-accuracy"] and v.models is None
    merged = apply_variant(task, "zero-baseline")
    assert merged.metric_settings["deletion-auc"] == {"baseline": "zero", "steps": 10}
    assert merged.explainer_settings["occlusion"] == task.explainer_settings["occlusion"]  # untouched
    assert merged.explainer_settings["gradient"] == {"reduce": "sum-abs"} and merged.variant == "zero-baseline"
    bad = tiny_with_variants(tmp_path, '\n[[variants]]\nname = "x"\nmetrics = ["nope"]\n')
    with pytest.raises(XbenchInputError, match=r"variants\[0\]\.metrics"):
        load_task(bad)
    bad = tiny_with_variants(tmp_path, '\n[[variants]]\nname = "a b"\n')
    with pytest.raises(XbenchInputError, match="bad variant name"):
        load_task(bad)


def test_run_writes_each_variant_and_the_report_compares_rankings(tmp_path, one_torch_thread):
    task = tiny_with_variants(tmp_path)
    out = tmp_path / "run"
    summary = run_task(
        task, out, explainers=["gradient", "grad-cam", "random", "oracle"], metrics=["deletion-auc", "mass-accuracy"]
    )
    assert summary.ok and summary.variants["zero-baseline"].ok
    vdir = out / "variants" / "zero-baseline"
    rec = pd.read_parquet(vdir / "records.parquet")
    assert set(rec["metric"]) == {"deletion-auc", "mass-accuracy"}
    assert set(rec["explainer"]) == {"gradient", "grad-cam", "random", "oracle"}  # the variant's subset
    manifest = json.loads((vdir / "manifest.json").read_text())
    assert manifest["variant"] == "zero-baseline" and manifest["metrics"]["deletion-auc"]["baseline"] == "zero"
    base = pd.read_parquet(out / "records.parquet")
    key = ["explainer", "tile"]
    b = base[(base.metric == "deletion-auc") & base.explainer.isin(["grad-cam"])].set_index(key)["value"]
    v = rec[(rec.metric == "deletion-auc") & rec.explainer.isin(["grad-cam"])].set_index(key)["value"]
    assert not b.equals(v)  # a different baseline gives different values
    m_b = base[(base.metric == "mass-accuracy") & (base.explainer == "grad-cam")]["value"].to_numpy()
    m_v = rec[(rec.metric == "mass-accuracy") & (rec.explainer == "grad-cam")]["value"].to_numpy()
    np.testing.assert_array_equal(m_b, m_v)  # same explainer settings, same maps, same localization (NaN too)

    report = write_report([out], tmp_path / "rep", formats="md", n_resamples=200, figures=False)
    sens = pd.read_csv(report.out_dir / "variants.csv")
    assert set(sens["column"]) >= {"deletion-auc", "mass-accuracy (planted)"}
    row = sens[sens.column == "mass-accuracy (planted)"].iloc[0]
    # grad-cam's maps are the same in both; gradient's are |.|-summed in the variant: tau is defined.
    assert -1 <= row.kendall_tau <= 1 and row.pairs == 1
    md = (report.out_dir / "tables.md").read_text()
    assert "protocol sensitivity" in md and "Kendall's tau" in md
    methods = (report.out_dir / "methods.md").read_text()
    assert "`zero-baseline`" in methods and "baseline = zero" in methods and "reduce = sum-abs" in methods


def test_kendall_tau_and_flip_flags_by_hand():
    rows = []
    for variant, vals in (("base", [0.5, 0.4, 0.3]), ("swap", [0.3, 0.4, 0.5])):
        for e, x in zip(["gradient", "grad-cam", "occlusion"], vals, strict=True):
            rows.append(("r", "t", "cnn", 0, e, "mass-accuracy", "planted", 0, x))
        rows.append(("r", "t", "cnn", 0, "oracle", "mass-accuracy", "planted", 0, 0.9 if variant == "base" else 0.1))
        rows.append(("r", "t", "cnn", 0, "random", "mass-accuracy", "planted", 0, 0.2))
    cols = ["run_id", "task", "model", "seed", "explainer", "metric", "truth", "tile", "value"]
    frame = pd.DataFrame(rows, columns=cols)
    base, swapped = frame.iloc[:5], frame.iloc[5:]
    table, flags = variant_sensitivity(base, {"swap": swapped}, ["gradient", "grad-cam", "occlusion"])
    (row,) = table.itertuples()
    # Fully reversed order of 3 methods: all 3 pairs discordant, tau = -1 (scipy.stats.kendalltau).
    assert row.kendall_tau == pytest.approx(-1.0) and row.swapped_pairs == 3 and row.flipped
    assert row.top_run == "gradient" and row.top_variant == "occlusion"
    assert any("flips" in f for f in flags) and any("oracle no longer beats random" in f for f in flags)
    same, flags = variant_sensitivity(base, {"same": base}, ["gradient", "grad-cam", "occlusion"])
    assert same.iloc[0].kendall_tau == pytest.approx(1.0) and not same.iloc[0].flipped and not flags


def test_variant_cells_reuse_the_main_runs_maps_and_record_what_they_would_compute(tmp_path, one_torch_thread):
    # A variant that changes only metric settings scores the maps the main run made (same model, seed, explainer
    # and settings): its cells must not explain again, and its records must equal those of the variant run alone
    # in a process that has nothing kept (the reference: every map computed afresh). A variant that changes an
    # explainer's settings (gradient's reduce) explains again.
    import xbench.explainers as explainers_module
    from xbench.runs.execute import release_process_caches

    task = tiny_with_variants(tmp_path)
    chosen = {"explainers": ["gradient", "grad-cam", "random", "oracle"], "metrics": ["deletion-auc", "mass-accuracy"]}
    explained: list[str] = []
    original = explainers_module.explain

    def counting_explain(key, *args, **kwargs):
        explained.append(key)
        return original(key, *args, **kwargs)

    release_process_caches()
    explainers_module.explain = counting_explain
    try:
        run_task(task, tmp_path / "main", variant=None, **chosen)
    finally:
        explainers_module.explain = original
    # main run: each explainer once; the variant: only gradient again (its settings changed), nothing else
    assert sorted(explained) == sorted(chosen["explainers"] + ["gradient"])
    release_process_caches()
    run_task(task, tmp_path / "alone", variant="zero-baseline", **chosen)
    reused = pd.read_parquet(tmp_path / "main" / "variants" / "zero-baseline" / "records.parquet")
    fresh = pd.read_parquet(tmp_path / "alone" / "records.parquet")
    keep = ["model", "seed", "explainer", "metric", "truth", "tile", "value"]
    pd.testing.assert_frame_equal(
        reused[reused.metric != "seconds"][keep].reset_index(drop=True),
        fresh[fresh.metric != "seconds"][keep].reset_index(drop=True),
    )
