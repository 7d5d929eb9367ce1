"""The shipped demo task behaves as the literature says controls and plain gradients should.

- The `oracle` control (the planted mask) is an upper bound on localization, `random` a lower bound.
- Adebayo et al. (NeurIPS 2018), "Sanity checks for saliency maps": under cascading model-parameter
  randomization, plain gradients change, while an edge detector (model-independent) does not; so an edge
  detector can localize structures well while failing the randomization check.
"""

from __future__ import annotations

import pytest

from xbench.runs import load_records, run_task

EXPLAINERS = ["gradient", "random", "edges", "oracle"]
METRICS = ["mass-accuracy", "mask-auroc", "randomization-spearman"]


@pytest.fixture(scope="module")
def demo_means(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo-run")
    summary = run_task("demo", out, explainers=EXPLAINERS, metrics=METRICS)
    assert summary.ok, summary.failures
    records = load_records(out)
    return records.groupby(["metric", "truth", "explainer"])["value"].mean()


def test_oracle_first_and_random_last_on_planted_mass_accuracy(demo_means):
    scores = demo_means.loc[("mass-accuracy", "planted")].sort_values(ascending=False)
    assert scores.index[0] == "oracle" and scores.iloc[0] == pytest.approx(1.0)
    assert scores.index[-1] == "random"


def test_edges_localize_but_fail_the_randomization_check(demo_means):
    auroc = demo_means.loc[("mask-auroc", "planted")]
    randomization = demo_means.loc[("randomization-spearman", "none")]
    # A random map has an expected per-pixel AUROC of 0.5 (definition of ROC AUC); edges do clearly better.
    assert auroc["random"] == pytest.approx(0.5, abs=0.05)
    assert auroc["edges"] > auroc["random"] + 0.1
    # Edges ignore the model: their maps after full randomization equal the originals (Spearman 1).
    assert randomization["edges"] > 0.99
    # Gradients of the randomized model differ from the trained model's (Adebayo et al. 2018, Fig. 2).
    assert randomization["gradient"] < 0.5
