"""Metric engine: reference implementations, registry, settings, skips and degenerate inputs.

Each check against an outside source names it in a comment beside the assertion.
"""

from __future__ import annotations

import io
from contextlib import redirect_stdout
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from scipy.stats import spearmanr
from skimage.metrics import structural_similarity
from sklearn.metrics import average_precision_score, roc_auc_score
from torch import nn

from xbench.errors import XbenchInputError
from xbench.explainers.base import make_baseline
from xbench.metrics import METRIC_KEYS, MetricInputs, compute_metric, get_metric, list_metrics
from xbench.metrics.model_dependence import spearman_rows, ssim_rows
from xbench.metrics.overlap import (
    mask_ap,
    mask_auroc,
    mass_accuracy,
    pointing_game,
    rank_accuracy,
    topk_iou,
)
from xbench.metrics.response import (
    aopc,
    curve_auc,
    perturbation_curves,
    perturbation_curves_loop,
    pixel_order,
)
from xbench.metrics.spread import gini_index, normalised_entropy
from xbench.models.base import ModelHandle

EXPECTED_KEYS = [
    "mass-accuracy",
    "rank-accuracy",
    "pointing-game",
    "mask-auroc",
    "mask-ap",
    "topk-iou",
    "deletion-auc",
    "insertion-auc",
    "aopc-morf",
    "aopc-lerf",
    "subset-drop-corr",
    "completeness-gap",
    "randomization-spearman",
    "randomization-ssim",
    "max-sensitivity",
    "infidelity",
    "gini",
    "entropy",
    "concept-recovery",
    "concept-detection",
    "concept-false-alarm",
    "model-calls",
    "seconds",
]


class Tiny(nn.Module):
    def __init__(self, c: int = 3, k: int = 2):
        super().__init__()
        self.conv1 = nn.Conv2d(c, 6, 3, padding=1)
        self.relu1 = nn.ReLU()
        self.conv2 = nn.Conv2d(6, 6, 3, padding=1)
        self.relu2 = nn.ReLU()
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flat = nn.Flatten()
        self.head = nn.Linear(6, k)

    def forward(self, x):
        return self.head(self.flat(self.gap(self.relu2(self.conv2(self.relu1(self.conv1(x)))))))


def tiny_handle(seed: int = 0, c: int = 3, k: int = 2) -> ModelHandle:
    torch.manual_seed(seed)
    return ModelHandle("tiny", k, module=Tiny(c, k).eval())


def quantised(rng, shape, levels=6):
    """Random maps with many ties (and negative values)."""
    return (rng.integers(0, levels, size=shape) - 2).astype(np.float32)


def full_inputs(n=4, h=10, w=10, seed=0, **over):
    rng = np.random.default_rng(seed)
    images = rng.random((n, 3, h, w)).astype(np.float32)
    planted = np.zeros((n, h, w), dtype=bool)
    planted[:, 2:5, 3:7] = True
    kw = dict(
        attributions=rng.normal(size=(n, h, w)).astype(np.float32),
        images=images,
        targets=rng.integers(0, 2, n),
        model=tiny_handle(),
        planted=planted,
        verified=planted.copy(),
        twins=(images * 0.5).astype(np.float32),
        rerun_explainer=lambda model, im, t: np.asarray(im).mean(axis=1) ** 2,
    )
    kw.update(over)
    return MetricInputs(**kw)


# -- references ------------------------------------------------------------------------------------------
def test_mask_auroc_and_ap_equal_sklearn():
    rng = np.random.default_rng(1)
    for trial in range(6):
        a = quantised(rng, (5, 9, 11)) if trial % 2 else rng.normal(size=(5, 9, 11))
        m = rng.random((5, 9, 11)) < rng.uniform(0.05, 0.6)
        auc, ap = mask_auroc(a, m), mask_ap(a, m)
        for i in range(5):
            # reference: sklearn.metrics.roc_auc_score / average_precision_score
            assert auc[i] == pytest.approx(roc_auc_score(m[i].ravel(), a[i].ravel()), abs=1e-12)
            assert ap[i] == pytest.approx(average_precision_score(m[i].ravel(), a[i].ravel()), abs=1e-12)


def test_spearman_equals_scipy():
    rng = np.random.default_rng(2)
    x = np.concatenate([quantised(rng, (4, 8, 8)), rng.normal(size=(4, 8, 8))])
    y = np.concatenate([rng.normal(size=(4, 8, 8)), quantised(rng, (4, 8, 8))])
    got = spearman_rows(x, y)
    for i in range(len(x)):
        # reference: scipy.stats.spearmanr (mid-ranks for ties)
        assert got[i] == pytest.approx(spearmanr(x[i].ravel(), y[i].ravel()).statistic, abs=1e-12)


def test_ssim_equals_skimage():
    rng = np.random.default_rng(3)
    x = rng.random((5, 16, 20))
    y = np.clip(x + rng.normal(0, 0.2, x.shape), 0, 1)
    got = ssim_rows(x, y, data_range=1.0)
    for i in range(5):
        # reference: skimage.metrics.structural_similarity, defaults (Wang et al. 2004)
        assert got[i] == pytest.approx(structural_similarity(x[i], y[i], data_range=1.0), abs=1e-10)
    z = rng.uniform(-1, 1, (2, 12, 12))
    got2 = ssim_rows(z, -z, data_range=2.0)
    for i in range(2):
        # reference: skimage.metrics.structural_similarity with data_range 2 for maps in [-1, 1]
        assert got2[i] == pytest.approx(structural_similarity(z[i], -z[i], data_range=2.0), abs=1e-10)


def test_localization_hand_values():
    a = np.zeros((1, 4, 4))
    a[0, 0, 0], a[0, 0, 1], a[0, 3, 3] = 3.0, 1.0, -5.0
    m = np.zeros((1, 4, 4), bool)
    m[0, 0, 0] = m[0, 1, 1] = True
    # From the definitions (Arras et al. 2022): positive mass 3 of 4 inside; top-2 = {(0,0), (0,1)}, one hit.
    assert mass_accuracy(a, m)[0] == pytest.approx(0.75)
    assert rank_accuracy(a, m)[0] == pytest.approx(0.5)
    assert pointing_game(a, m, tolerance=0)[0] == 1.0
    a2 = a.copy()
    a2[0, 0, 0] = 0.0  # the maximum is now (0, 1), one pixel from the mask pixel (0, 0)
    assert pointing_game(a2, m, tolerance=0)[0] == 0.0
    assert pointing_game(a2, m, tolerance=1)[0] == 1.0
    # top 2 of 16 pixels (fraction 1/8) = {(0,0), (0,1)}: intersection 1, union 3.
    assert topk_iou(a, m, fraction=0.125)[0] == pytest.approx(1 / 3)


def test_gini_and_entropy_hand_values():
    one_hot = np.zeros((1, 5, 5))
    one_hot[0, 2, 2] = -4.0
    flat = np.full((1, 5, 5), 0.3)
    # Gini (Hurley & Rickard; Chalasani et al. 2020): 1 - 1/n for one non-zero entry, 0 for a uniform map.
    assert gini_index(one_hot)[0] == pytest.approx(1 - 1 / 25)
    assert gini_index(flat)[0] == pytest.approx(0.0, abs=1e-12)
    assert normalised_entropy(one_hot)[0] == pytest.approx(0.0)
    assert normalised_entropy(flat)[0] == pytest.approx(1.0)


# -- the batched perturbation engine --------------------------------------------------------------------
def numpy_model(c: int, h: int, w: int, seed: int = 0) -> ModelHandle:
    """A fast black box (softmax of a fixed random projection of tanh(x)) for engine-vs-loop checks."""
    proj = np.random.default_rng(seed).normal(size=(c * h * w, 2))

    def predict(x):
        z = np.tanh(4 * x.reshape(len(x), -1)) @ proj
        e = np.exp(z - z.max(axis=1, keepdims=True))
        return e / e.sum(axis=1, keepdims=True)

    return ModelHandle("numpy", 2, predict_fn=predict)


def test_batched_curves_equal_the_per_tile_loop_and_do_not_depend_on_chunking():
    rng = np.random.default_rng(4)
    handle = numpy_model(3, 12, 12)
    x = rng.random((3, 3, 12, 12)).astype(np.float32)
    a = quantised(rng, (3, 12, 12))
    t = rng.integers(0, 2, 3)
    for kind in ("zero", "mean", "blur"):
        base = make_baseline(x, kind)
        order = pixel_order(a, seed=3)
        for mode in ("deletion", "insertion"):
            fast = perturbation_curves(handle.probabilities, x, t, base, order, 5, mode)
            slow = perturbation_curves_loop(handle.probabilities, x, t, base, order, 5, mode)
            tiny_chunks = perturbation_curves(handle.probabilities, x, t, base, order, 5, mode, chunk_bytes=1)
            np.testing.assert_allclose(fast, slow, atol=1e-6)
            np.testing.assert_allclose(fast, tiny_chunks, atol=1e-6)
    # endpoints: deletion starts at the tile and ends at the baseline; insertion the reverse
    base = make_baseline(x, "zero")
    d = perturbation_curves(handle.probabilities, x, t, base, pixel_order(a, 0), 4, "deletion")
    i = perturbation_curves(handle.probabilities, x, t, base, pixel_order(a, 0), 4, "insertion")
    p_x = handle.probabilities(x)[np.arange(3), t]
    p_b = handle.probabilities(base)[np.arange(3), t]
    np.testing.assert_allclose(d[:, 0], p_x, atol=1e-6)
    np.testing.assert_allclose(d[:, -1], p_b, atol=1e-6)
    np.testing.assert_allclose(i[:, 0], p_b, atol=1e-6)
    np.testing.assert_allclose(i[:, -1], p_x, atol=1e-6)


def test_repeated_steps_are_not_rescored_and_curves_stay_exact():
    rng = np.random.default_rng(8)
    handle = numpy_model(3, 12, 12, seed=1)
    x = rng.random((3, 3, 12, 12)).astype(np.float32)
    twin = x.copy()
    twin[:, :, 2:5, 2:6] = 0.9  # like a structure-free twin: differs from the tile on 12 pixels only
    region = np.zeros((3, 12, 12), np.float32)
    region[:, 2:5, 2:6] = 1.0
    t = rng.integers(0, 2, 3)
    for attr, saves in ((region, True), (rng.random((3, 12, 12)), False)):
        order = pixel_order(attr, seed=1)
        for mode in ("deletion", "insertion"):
            with handle.counting() as calls:
                fast = perturbation_curves(handle.probabilities, x, t, twin, order, 12, mode)
            np.testing.assert_allclose(
                fast, perturbation_curves_loop(handle.probabilities, x, t, twin, order, 12, mode), atol=1e-6
            )
            if saves:  # the region enters within the first step: steps 2..12 repeat step 1
                assert calls.forward == 3 * 2


def test_auc_and_aopc_by_hand():
    curve = np.array([[1.0, 0.5, 0.0]])
    assert curve_auc(curve)[0] == pytest.approx(0.5)  # trapezoid rule (Petsiuk et al. 2018)
    assert aopc(curve)[0] == pytest.approx(1.0 - 0.5)  # mean of f(x0) - f(xk), k = 0..2 (Samek et al. 2017)


def test_curves_reach_the_model_in_large_batches():
    inputs = full_inputs(n=6, h=8, w=8)
    sizes = []
    inputs.model.module.register_forward_hook(lambda _m, args, _o: sizes.append(len(args[0])))
    compute_metric("deletion-auc", inputs, steps=10)
    assert sizes == [6 * 11]  # every tile and every step in one model call


def test_fast_scorer_gives_the_handle_probabilities_and_counts_calls():
    from xbench.metrics.base import model_scorer

    inputs = full_inputs(n=5)
    x = np.random.default_rng(0).random((300, 3, 10, 10)).astype(np.float32)
    with inputs.model.counting() as calls:
        fast = model_scorer(inputs.model, chunk=64)(x)
    assert calls.forward == 300
    np.testing.assert_allclose(fast, inputs.model.probabilities(x), atol=1e-6)

    class Viewing(nn.Module):  # rejects channels-last input (.view on a spatial tensor)
        def forward(self, x):
            return x.view(x.shape[0], -1)[:, :2] * 0 + torch.tensor([0.0, 1.0])

    handle = ModelHandle("viewing", 2, module=Viewing().eval())
    np.testing.assert_allclose(model_scorer(handle)(x[:4]), handle.probabilities(x[:4]))


def test_curves_are_shared_between_deletion_auc_and_aopc_morf():
    inputs = full_inputs()
    with inputs.model.counting() as calls:
        compute_metric("deletion-auc", inputs)
        compute_metric("aopc-morf", inputs)
    assert calls.forward == inputs.n_tiles * 21


# -- registry, settings, skips ------------------------------------------------------------------------------
def test_registry_has_exactly_the_design_keys_with_metadata():
    assert METRIC_KEYS == EXPECTED_KEYS
    for spec in list_metrics():
        assert spec.definition and spec.citation and spec.family
        assert spec.value_range[0] < spec.value_range[1]


def test_unknown_key_and_setting_errors_list_the_valid_ones():
    inputs = full_inputs()
    with pytest.raises(XbenchInputError, match="mass-accuracy"):
        compute_metric("mass-acc", inputs)
    with pytest.raises(XbenchInputError, match=r"key stepz: unknown setting \(expected one of baseline, steps"):
        compute_metric("deletion-auc", inputs, stepz=3)
    with pytest.raises(XbenchInputError, match="baseline"):
        compute_metric("deletion-auc", inputs, baseline="grey")
    with pytest.raises(XbenchInputError, match="attributions"):
        compute_metric("gini", MetricInputs(np.zeros((2, 3)), np.zeros((2, 1, 3, 3)), np.zeros(2, int)))


def test_localization_reports_planted_and_verified_separately():
    inputs = full_inputs(verified=None)
    res = compute_metric("mask-auroc", inputs)
    assert [r.truth for r in res] == ["planted", "verified"]
    assert res[0].skipped is None and np.isfinite(res[0].values).all()
    assert res[1].skipped and "verified" in res[1].skipped and np.isnan(res[1].values).all()
    assert -1 in res[1].reasons


@pytest.mark.parametrize("key", ["deletion-auc", "insertion-auc", "aopc-morf", "aopc-lerf", "subset-drop-corr"])
def test_faithfulness_without_twins_skips_with_a_reason_and_other_baselines_run(key):
    inputs = full_inputs(twins=None)
    (res,) = compute_metric(key, inputs)
    assert res.skipped and "twins" in res.skipped and np.isnan(res.values).all()
    extra = {"runs": 5} if key == "subset-drop-corr" else {}
    (res,) = compute_metric(key, inputs, baseline="mean", **extra)
    assert res.skipped is None and np.isfinite(res.values).all()


def test_missing_needs_skip_with_reasons():
    black_box = ModelHandle("bb", 2, predict_fn=lambda x: np.tile([0.3, 0.7], (len(x), 1)))
    inputs = full_inputs(model=black_box, rerun_explainer=None, cost=None)
    for key in ("randomization-spearman", "randomization-ssim"):
        (res,) = compute_metric(key, inputs)
        assert res.skipped and "torch model" in res.skipped
    inputs.model = tiny_handle()
    (res,) = compute_metric("randomization-ssim", inputs)
    assert res.skipped and "rerun_explainer" in res.skipped
    (res,) = compute_metric("max-sensitivity", inputs)
    assert res.skipped and "rerun_explainer" in res.skipped
    for key in ("model-calls", "seconds"):
        (res,) = compute_metric(key, inputs)
        assert res.skipped and "cost" in res.skipped and res.values.shape == (1,)
    inputs.model = None
    (res,) = compute_metric("infidelity", inputs)
    assert res.skipped == "needs a model"


def test_black_box_models_run_the_perturbation_metrics():
    black_box = ModelHandle("bb", 2, predict_fn=lambda x: np.stack([x.mean((1, 2, 3)), 1 - x.mean((1, 2, 3))], 1))
    inputs = full_inputs(model=black_box)
    for key in ("deletion-auc", "insertion-auc", "infidelity"):
        (res,) = compute_metric(key, inputs)
        assert np.isfinite(res.values).all()


def test_cost_per_tile():
    cost = SimpleNamespace(forward_calls=40, backward_calls=8, seconds=2.0)
    inputs = full_inputs(n=4, cost=cost)
    assert compute_metric("model-calls", inputs)[0].values[0] == 12.0
    assert compute_metric("seconds", inputs)[0].values[0] == 0.5
    inputs.cost = SimpleNamespace(forward_calls=1, backward_calls=0, seconds=float("nan"))
    (res,) = compute_metric("seconds", inputs)
    assert np.isnan(res.values[0]) and -1 in res.reasons


def test_same_seed_same_values():
    a = compute_metric("subset-drop-corr", full_inputs(seed=5), runs=6)[0].values
    b = compute_metric("subset-drop-corr", full_inputs(seed=5), runs=6)[0].values
    np.testing.assert_array_equal(a, b)


# -- concepts ------------------------------------------------------------------------------------------------
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
        type_importance={"road": 0.5, "clearing": 0.2, "river": 0.01, "outcrop": -0.05},
        relied_types=["road", "clearing"],
        lookalike_types=["river"],
        unused_types=["outcrop"],
    )
    kw.update(over)
    return MetricInputs(**kw)


def test_concept_metrics_for_a_pixel_method():
    a = np.zeros((3, 10, 10), np.float32)
    a[:, 0:3, 0:3] = 5.0  # strongest on road
    a[:, 5:8, 5:8] = 2.0  # then clearing
    a[:, 0:2, 6:9] = 0.2  # a little on the river (below the tile mean)
    a[:, 7:9, 0:2] = -0.5  # negative on the outcrop
    inputs = concept_inputs(a)
    # relied-on road and clearing are enriched above the unused river and outcrop: AUROC 1
    assert compute_metric("concept-recovery", inputs)[0].values[0] == pytest.approx(1.0)
    assert compute_metric("concept-detection", inputs)[0].values[0] == 1.0
    assert compute_metric("concept-false-alarm", inputs)[0].values[0] == 0.0


def test_concept_metrics_for_a_concept_method_and_missing_pieces():
    report = SimpleNamespace(
        type_importance={"road": 0.1, "clearing": 0.3, "river": 0.0, "outcrop": 0.2},
        flagged={"road": True, "clearing": False, "river": True},
    )
    inputs = concept_inputs(np.zeros((2, 10, 10), np.float32), concept_report=report, type_masks=None, mask_names=None)
    auc = compute_metric("concept-recovery", inputs)[0].values[0]
    types = ["road", "clearing", "river", "outcrop"]
    # reference: sklearn.metrics.roc_auc_score, relied-on (road, clearing) against unused (river, outcrop)
    assert auc == pytest.approx(roc_auc_score([1, 1, 0, 0], [report.type_importance[t] for t in types]))
    assert compute_metric("concept-detection", inputs)[0].values[0] == 0.5
    # outcrop is not flagged in the report: only river is assessed
    assert compute_metric("concept-false-alarm", inputs)[0].values[0] == 1.0
    bare = concept_inputs(
        np.ones((2, 10, 10), np.float32),
        type_masks=None,
        mask_names=None,
        type_importance=None,
        relied_types=None,
        lookalike_types=None,
        unused_types=None,
    )
    for key in ("concept-recovery", "concept-detection", "concept-false-alarm"):
        (res,) = compute_metric(key, bare)
        assert np.isnan(res.values[0]) and res.reasons[-1].startswith("needs")


# -- degenerate inputs ---------------------------------------------------------------------------------
ARRAY_ONLY = ["mass-accuracy", "rank-accuracy", "pointing-game", "mask-auroc", "mask-ap", "topk-iou", "gini", "entropy"]


def _all_results(inputs, fast=True):
    out = {}
    small = {
        "deletion-auc": {"steps": 4},
        "insertion-auc": {"steps": 4},
        "aopc-morf": {"steps": 4},
        "aopc-lerf": {"steps": 4},
        "subset-drop-corr": {"runs": 4},
        "max-sensitivity": {"samples": 2},
        "infidelity": {"samples": 3},
    }
    for key in METRIC_KEYS:
        out[key] = compute_metric(key, inputs, **(small.get(key, {}) if fast else {}))
    return out


def _assert_no_silent_values(results):
    for key, rs in results.items():
        for r in rs:
            for i in np.flatnonzero(np.isnan(r.values)):
                assert int(i) in r.reasons or -1 in r.reasons, (key, r.truth, i)
                reason = r.reasons.get(int(i), r.reasons.get(-1))
                assert reason and "no specific reason" not in reason, (key, reason)


def test_degenerate_inputs_give_values_or_reasons_never_crashes():
    n, h, w = 4, 10, 10
    a = np.zeros((n, h, w), np.float32)
    a[1] = 0.7  # constant
    a[2] = np.nan  # NaN
    a[3, 4, 4] = 1.0  # ordinary, one hot
    planted = np.zeros((n, h, w), bool)
    planted[:, 4:6, 4:6] = True
    planted[3] = False  # empty mask on tile 3
    verified = np.ones((n, h, w), bool)  # whole-tile mask
    inputs = full_inputs(
        n=n,
        h=h,
        w=w,
        attributions=a,
        planted=planted,
        verified=verified,
        cost=SimpleNamespace(forward_calls=0, backward_calls=0, seconds=0.0),
        type_masks=planted[:, None],
        mask_names=["road"],
        type_importance={"road": 0.3},
        relied_types=["road"],
        lookalike_types=[],
        unused_types=[],
    )
    res = _all_results(inputs)
    _assert_no_silent_values(res)
    ma = {r.truth: r for r in res["mass-accuracy"]}
    # zeros: no positive mass -> NaN with a reason, not a silent 0
    assert np.isnan(ma["planted"].values[0]) and "positive" in ma["planted"].reasons[0]
    assert ma["planted"].values[1] == pytest.approx(0.04)  # constant: area share 4/100
    assert np.isnan(ma["planted"].values[2]) and "non-finite" in ma["planted"].reasons[2]
    assert np.isnan(ma["planted"].values[3]) and "empty" in ma["planted"].reasons[3]
    auc = {r.truth: r for r in res["mask-auroc"]}
    assert auc["planted"].values[1] == pytest.approx(0.5)  # constant map: chance level
    assert np.isnan(auc["verified"].values).all() and "whole tile" in auc["verified"].reasons[0]
    rank = {r.truth: r for r in res["rank-accuracy"]}["planted"]
    assert rank.values[1] == pytest.approx(0.04)  # ties split fractionally: chance level
    assert res["gini"][0].values[1] == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(res["gini"][0].values[0])
    assert res["entropy"][0].values[1] == pytest.approx(1.0)
    for key in ("deletion-auc", "insertion-auc", "aopc-morf", "aopc-lerf", "infidelity"):
        v = res[key][0].values
        assert np.isfinite(v[[0, 1, 3]]).all() and np.isnan(v[2]), key
    fc = res["subset-drop-corr"][0]
    assert np.isnan(fc.values[1]) and "constant" in fc.reasons[1]
    rs = res["randomization-spearman"][0]
    assert np.isnan(rs.values[0]) and "zero everywhere" in rs.reasons[0]
    ms = res["max-sensitivity"][0]
    assert np.isnan(ms.values[0]) and "zero everywhere" in ms.reasons[0]
    # one-type tasks have no unused type to rank against: NaN with the reason
    ca = res["concept-recovery"][0]
    assert np.isnan(ca.values[0]) and "type" in ca.reasons[-1]


def test_all_nan_attributions():
    inputs = full_inputs(attributions=np.full((3, 10, 10), np.nan, np.float32), n=3)
    _assert_no_silent_values(_all_results(inputs))


def test_cli_lists_every_metric():
    from xbench.cli import main

    buf = io.StringIO()
    with redirect_stdout(buf):
        assert main(["metrics"]) == 0
    out = buf.getvalue()
    for key in EXPECTED_KEYS:
        assert f"  {key} " in out
        spec = get_metric(key)
        assert spec.citation.split(".")[0][:30] in out.replace("\n", " ")
    buf = io.StringIO()
    with redirect_stdout(buf):
        assert main(["metrics", "deletion-auc", "--format", "json"]) == 0
    assert '"baseline": "twin"' in buf.getvalue()
    assert main(["metrics", "no-such-metric"]) == 2
