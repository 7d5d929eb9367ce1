"""Concept metrics that cannot be gamed: concept-recovery's chance level and maximum (hypothesis
properties over random importance vectors), roles (a relied-on look-alike is a detection, never a false
alarm), the flagging rule's null rate for pixel methods, and the cluster figure's table."""

from __future__ import annotations

import itertools
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.metrics import roc_auc_score

from xbench.metrics import MetricInputs, compute_metric
from xbench.metrics.concepts import pixel_enrichment, recovery_auroc
from xbench.truth import type_roles

TYPES = ["road", "clearing", "river", "outcrop", "natural-gap", "building"]


def roles_of(n_relied: int) -> dict[str, str]:
    return type_roles(TYPES[:n_relied], ["river", "outcrop", "natural-gap"], TYPES)


@settings(max_examples=40, deadline=None)
@given(
    values=st.lists(st.floats(-1, 1, allow_nan=False), min_size=3, max_size=5),
    n_relied=st.integers(1, 3),
)
def test_recovery_chance_level_is_exact_over_every_assignment(values, n_relied):
    # Chance level 0.5: averaged over every assignment of a method's values to the types (what a method
    # unrelated to reliance does on average), each (relied-on, unused) pair is ordered either way equally
    # often and ties count 1/2, so the mean AUROC is exactly 0.5.
    types = TYPES[: len(values)]
    n_relied = min(n_relied, len(values) - 1)
    roles = type_roles(types[:n_relied], [], types)
    scores = [recovery_auroc(dict(zip(types, perm, strict=True)), roles) for perm in itertools.permutations(values)]
    assert np.mean(scores) == pytest.approx(0.5, abs=1e-12)
    # the oracle's ordering (relied-on types first) reaches the maximum 1, and nothing exceeds it
    ordered = sorted(values, reverse=True)
    if ordered[n_relied - 1] > ordered[n_relied]:
        assert recovery_auroc(dict(zip(types, ordered, strict=True)), roles) == 1.0
    assert max(scores) <= 1.0


def test_recovery_matches_sklearn_and_random_control_sits_at_chance():
    rng = np.random.default_rng(0)
    roles = roles_of(3)  # road, clearing, river (a relied-on look-alike) against three unused types
    labels = [roles[t] != "unused" for t in TYPES]
    values = []
    for seed in range(300):
        imp = np.random.default_rng(seed).normal(size=len(TYPES))
        v = recovery_auroc(dict(zip(TYPES, imp, strict=True)), roles)
        # reference: scikit-learn's roc_auc_score (the Mann-Whitney statistic / (n1 n2): common practice)
        if seed < 20:  # and scipy's Mann-Whitney U
            assert v == pytest.approx(roc_auc_score(labels, imp))
            pos = imp[np.array(labels)]
            neg = imp[~np.array(labels)]
            assert v == pytest.approx(stats.mannwhitneyu(pos, neg).statistic / (len(pos) * len(neg)))
        values.append(v)
    # the random control over many seeds: mean at the stated chance level (sd of one value ~0.3, of the
    # mean over 300 seeds ~0.017)
    assert np.mean(values) == pytest.approx(0.5, abs=0.05)
    oracle = {t: float(roles[t] != "unused") + 0.01 * rng.random() for t in TYPES}
    assert recovery_auroc(oracle, roles) == 1.0


def test_roles():
    roles = type_roles(["road", "river"], ["river", "outcrop"], ["road", "river", "outcrop", "field"])
    assert roles == {"road": "relied-on", "river": "relied-on look-alike", "outcrop": "unused", "field": "unused"}


# -- detection and false alarm per role ---------------------------------------------------------------------
def concept_inputs(attributions, **over):
    n, h, w = attributions.shape
    masks = np.zeros((n, 4, h, w), bool)
    masks[:, 0, 0:3, 0:3] = True  # road
    masks[:, 1, 5:8, 5:8] = True  # clearing
    masks[:, 2, 0:2, 6:9] = True  # river (look-alike)
    masks[:, 3, 7:9, 0:2] = True  # outcrop
    kw = dict(
        attributions=attributions,
        images=np.zeros((n, 3, h, w), np.float32),
        targets=np.zeros(n, int),
        type_masks=masks,
        mask_names=["road", "clearing", "river", "outcrop"],
        type_importance={"road": 0.5, "clearing": 0.2, "river": 0.1, "outcrop": -0.05},
        relied_types=["road", "river"],
        lookalike_types=["river"],
        unused_types=["clearing", "outcrop"],
    )
    kw.update(over)
    return MetricInputs(**kw)


def values(inputs) -> dict[str, float]:
    keys = ("concept-recovery", "concept-detection", "concept-false-alarm")
    return {k: compute_metric(k, inputs)[0].values[0] for k in keys}


def test_a_relied_on_lookalike_is_a_detection_never_a_false_alarm():
    rng = np.random.default_rng(1)
    a = rng.normal(0, 0.05, (8, 10, 10)).astype(np.float32)
    a[:, 0:3, 0:3] += 2.0  # on the road
    a[:, 0:2, 6:9] += 2.0  # on the river, which the model relies on
    v = values(concept_inputs(a))
    assert v["concept-detection"] == 1.0  # road and river: both relied on, both flagged
    assert v["concept-false-alarm"] == 0.0  # the river is not counted against the method
    assert v["concept-recovery"] == 1.0
    # the same river flag when the model does NOT rely on the river: now a false alarm (1 of 2 unused)
    v2 = values(concept_inputs(a, relied_types=["road"], unused_types=["clearing", "outcrop", "river"]))
    assert v2["concept-detection"] == 1.0 and v2["concept-false-alarm"] == pytest.approx(1 / 3)
    # a concept method: the same rule through its report
    report = SimpleNamespace(
        type_importance={"road": 0.3, "river": 0.2, "clearing": 0.0, "outcrop": -0.1},
        flagged={"road": True, "river": True, "clearing": False, "outcrop": False},
    )
    v3 = values(concept_inputs(a, concept_report=report))
    assert v3 == {"concept-recovery": 1.0, "concept-detection": 1.0, "concept-false-alarm": 0.0}


def test_pixel_flag_rule_null_rate_and_area_independence():
    # Null simulation of the shared flagging rule for pixel methods: noise attributions flag a type in at
    # most a few percent of trials (two-sided t-test at 5%, Bonferroni over four types: nominal <= 5%
    # family-wise); and enrichment does not grow with a type's area (a noise map is not "on" large types).
    flags = 0
    trials = 200
    for seed in range(trials):
        a = np.random.default_rng(seed).random((12, 10, 10)).astype(np.float32)
        res = compute_metric("concept-false-alarm", concept_inputs(a, relied_types=[], unused_types=None))
        flags += res[0].values[0] > 0
    assert flags / trials <= 0.08, flags
    big = np.zeros((1, 1, 10, 10), bool)
    big[..., :8, :] = True
    e = [pixel_enrichment(np.random.default_rng(s).random((1, 10, 10)), big, None)[0][0, 0] for s in range(300)]
    assert abs(np.mean(e)) < 0.05


def test_a_mask_covering_the_whole_tile_has_no_enrichment_at_any_scale():
    # known answer: a mask over every pixel has inside mean = tile mean, so enrichment (a standard score of
    # the mask's mean, common practice) is 0 by definition;
    # float rounding left ~1e-17 that differed between tiles and between scalings of the same map, and the
    # t-test flagged that noise as an effect (found by the property test of scale invariance)
    a = np.zeros((2, 5, 6), np.float32)
    a[0, 4, 3:] = [2.0, 4.0, 0.25]
    a[1, 4, 3:] = [0.75, 4.0, 0.75]
    everywhere = np.ones((2, 1, 5, 6), bool)
    for c in (1.0, 0.125, 0.37, 3.0, 1024.0):
        enrichment, used = pixel_enrichment(a.astype(np.float64) * c, everywhere, None)
        assert used.all() and (enrichment == 0.0).all(), c


def test_tiles_scored_per_type_follow_the_class_it_drives():
    # road drives class 1 (planted = road mask on class-1 tiles); the river drives nothing, so it is
    # scored on the tiles of classes some type drives (non-empty planted mask): the class-1 tiles.
    a = np.zeros((4, 10, 10), np.float32)
    inputs = concept_inputs(a)
    planted = np.zeros((4, 10, 10), bool)
    planted[2:, 0:3, 0:3] = True
    _, used = pixel_enrichment(np.random.default_rng(0).random((4, 10, 10)), inputs.type_masks, planted)
    assert used[:, 0].tolist() == [False, False, True, True]  # road: its class's tiles
    assert used[:, 2].tolist() == [False, False, True, True]  # river: tiles of a driven class


# -- the cluster figure -----------------------------------------------------------------------------------
def test_cluster_figure_table_and_render():
    from xbench.report.concept_figures import cluster_drop_figure, cluster_labels, drop_table

    rng = np.random.default_rng(0)
    changes = np.full((3, 10, 2), np.nan)
    changes[0, :6, 1] = rng.normal(0.3, 0.05, 6)
    changes[1, 6:, 0] = rng.normal(-0.1, 0.02, 4)
    changes[2, 3, 1] = 0.05
    mean, lo, hi, n = drop_table(changes)
    d = changes[0, :6, 1]
    # reference: scipy's t interval (stats.t.interval; common practice)
    ref = stats.t.interval(0.95, 5, loc=d.mean(), scale=stats.sem(d))
    assert (lo[0, 1], hi[0, 1]) == pytest.approx(ref)
    assert n.tolist() == [[0, 6], [4, 0], [0, 1]] and np.isnan(lo[2, 1]) and np.isnan(mean[0, 0])
    rows = pd.DataFrame(
        {
            "concept": ["cluster-0", "cluster-1", "cluster-2"],
            "matched_type": ["road", None, None],
            "iou": [0.41, 0.05, float("nan")],
        }
    )
    assert cluster_labels(3, rows) == [
        "cluster 0: road (IoU 0.41)",
        "cluster 1: no type (best IoU 0.05)",
        "cluster 2: no type (best IoU n/a)",
    ]
    data = {
        "score_changes": changes,
        "cluster_maps": rng.integers(0, 3, (4, 4, 4)),
        "images": rng.random((4, 6, 16, 16)).astype(np.float32),
        "class_names": np.array(["intact", "road"]),
        "band_names": np.array(["blue", "green", "red", "nir", "swir1", "swir2"]),
    }
    fig = cluster_drop_figure(data, rows, "demo, model cnn, seed 0")
    texts = [t.get_text() for ax in fig.get_axes() for t in ax.texts]
    assert any("+0.3" in t for t in texts) and "no tiles" in texts
    labels = [a.get_ylabel() for a in fig.get_axes()] + [a.get_xlabel() for a in fig.get_axes()]
    assert "mean probability drop (original - replaced)" in labels
    assert not any("change in class probability" in x for x in labels)


def test_the_oracle_is_the_top_anchor_of_the_concept_metrics():
    # The model relies on road and on the river look-alike, not on the clearing the labels are made of. The
    # oracle's planted map covers the driving types (road, clearing): as a pixel map it would flag clearing (a
    # false alarm) and miss the river. With the measured reliance in its context it reports that reliance as its
    # concept evidence, so it sits at the top of every concept metric by construction (an anchor, like the
    # planted mask for localization): recovery 1, detection 1, false alarm 0.
    from xbench.explainers import ExplainContext, explain
    from xbench.models.base import ModelHandle

    black_box = ModelHandle("bb", 2, predict_fn=lambda x: np.tile([0.5, 0.5], (len(x), 1)))
    n, h, w = 6, 10, 10
    importance = {"road": 0.5, "clearing": 0.02, "river": 0.3, "outcrop": -0.05}  # measured mean drops
    inputs = concept_inputs(np.zeros((n, h, w), np.float32), targets=np.ones(n, int), type_importance=importance)
    ctx = ExplainContext(
        masks=inputs.type_masks,
        mask_names=list(inputs.mask_names),
        driving_types={1: ["road", "clearing"]},
        reliance=importance,
        relied_types=["road", "river"],
    )
    exp = explain("oracle", black_box, inputs.images, inputs.targets, ctx)
    assert exp.concepts.flagged == {"road": True, "clearing": False, "river": True, "outcrop": False}
    np.testing.assert_array_equal(exp.attributions > 0, inputs.type_masks[:, 0] | inputs.type_masks[:, 1])
    inputs.attributions, inputs.concept_report = exp.attributions, exp.concepts
    assert values(inputs) == {"concept-recovery": 1.0, "concept-detection": 1.0, "concept-false-alarm": 0.0}
    # the same planted map read as a pixel method: clearing is flagged (a false alarm) and the river missed
    inputs.concept_report = None
    pixel = values(inputs)
    assert pixel["concept-false-alarm"] > 0 and pixel["concept-detection"] < 1
    # without measured reliance (a user's tile pack) the oracle is a plain map
    plain = explain(
        "oracle", black_box, inputs.images, inputs.targets, ExplainContext(**{**ctx.__dict__, "reliance": None})
    )
    assert plain.concepts is None
