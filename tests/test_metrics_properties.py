"""Property tests (hypothesis) of the metric engine: ranges, the oracle, scale invariance, chance level."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from torch import nn

from xbench.metrics import METRIC_KEYS, MetricInputs, compute_metric, get_metric
from xbench.models.base import ModelHandle

FAST = settings(
    max_examples=40,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
MODEL = settings(
    max_examples=8,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

LOCALIZATION = ["mass-accuracy", "rank-accuracy", "pointing-game", "mask-auroc", "mask-ap", "topk-iou"]
SMALL = {
    "deletion-auc": {"steps": 5},
    "insertion-auc": {"steps": 5},
    "aopc-morf": {"steps": 5},
    "aopc-lerf": {"steps": 5},
    "subset-drop-corr": {"runs": 6},
    "max-sensitivity": {"samples": 2},
    "infidelity": {"samples": 4},
}
# Invariant to multiplying the attribution by c > 0 by their definitions: rank- and share-based
# localization; Gini and entropy of |a| / sum |a|; perturbation orders; Pearson correlation; infidelity
# with the optimal beta (normalize=True); randomization similarities after per-map normalisation;
# rank correlation and flags of mass shares per type. Not max-sensitivity (a relative change, but the
# re-run explainer is not rescaled with the given map), not cost.
SCALE_INVARIANT = [k for k in METRIC_KEYS if k not in ("max-sensitivity", "model-calls", "seconds")]


class Tiny(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(2, 4, 3, padding=1)
        self.relu = nn.ReLU()
        self.gap = nn.AdaptiveAvgPool2d(1)
        self.flat = nn.Flatten()
        self.head = nn.Linear(4, 3)

    def forward(self, x):
        return self.head(self.flat(self.gap(self.relu(self.conv(x)))))


torch.manual_seed(0)
HANDLE = ModelHandle("tiny", 3, module=Tiny().eval())


def explain(model, images, targets):
    """A model-dependent map: |input x (sum of the conv weights of the target's strongest filter)|."""
    w = model.module.conv.weight.detach().numpy().sum(axis=(2, 3))  # (4, 2)
    return np.abs(np.einsum("nchw,c->nhw", np.asarray(images), w[0])) + 0.01


@st.composite
def cases(draw, min_side=3, max_side=10):
    n = draw(st.integers(1, 3))
    h = draw(st.integers(min_side, max_side))
    w = draw(st.integers(min_side, max_side))
    # quarter steps from -2 to 4: many ties, negatives and exact zeros
    attr = draw(arrays(np.float32, (n, h, w), elements=st.integers(-8, 16).map(lambda v: v / 4)))
    planted = draw(arrays(np.bool_, (n, h, w)))
    verified = draw(arrays(np.bool_, (n, h, w)))
    seed = draw(st.integers(0, 2**16))
    return attr, planted, verified, seed


def build(attr, planted, verified, seed, with_model=False):
    n, h, w = attr.shape
    rng = np.random.default_rng(seed)
    images = rng.random((n, 2, h, w)).astype(np.float32)
    type_masks = np.stack([planted, verified, ~planted], axis=1)
    kw = dict(
        attributions=attr,
        images=images,
        targets=rng.integers(0, 3, n),
        planted=planted,
        verified=verified,
        type_masks=type_masks,
        mask_names=["road", "clearing", "river"],
        type_importance={"road": 0.3, "clearing": 0.1, "river": -0.02},
        relied_types=["road", "clearing"],
        lookalike_types=["river"],
        unused_types=[],
        seed=seed,
        cost=SimpleNamespace(forward_calls=3 * n, backward_calls=n, seconds=0.1),
    )
    if with_model:
        kw.update(model=HANDLE, twins=(images * 0.7).astype(np.float32), rerun_explainer=explain)
    return MetricInputs(**kw)


def run(key, inputs):
    return compute_metric(key, inputs, **SMALL.get(key, {}))


def assert_in_range(key, results):
    lo, hi = get_metric(key).value_range
    for r in results:
        v = r.values
        fin = v[np.isfinite(v)]
        assert np.all((fin >= lo - 1e-12) & (fin <= hi + 1e-12)), (key, r.truth, fin)
        for i in np.flatnonzero(~np.isfinite(v)):
            assert int(i) in r.reasons or -1 in r.reasons, (key, r.truth, i)


@FAST
@given(cases())
def test_array_metrics_stay_within_their_stated_range(case):
    inputs = build(*case)
    for key in LOCALIZATION + [
        "gini",
        "entropy",
        "concept-recovery",
        "concept-detection",
        "concept-false-alarm",
        "model-calls",
        "seconds",
    ]:
        assert_in_range(key, run(key, inputs))


@MODEL
@given(cases(min_side=4, max_side=7))
def test_model_metrics_stay_within_their_stated_range(case):
    inputs = build(*case, with_model=True)
    for key in (
        "deletion-auc",
        "insertion-auc",
        "aopc-morf",
        "aopc-lerf",
        "subset-drop-corr",
        "randomization-spearman",
        "randomization-ssim",
        "max-sensitivity",
        "infidelity",
    ):
        assert_in_range(key, run(key, inputs))


@FAST
@given(cases(), st.floats(0.01, 100))
def test_the_oracle_scores_one_on_its_own_mask(case, scale):
    _, planted, _, seed = case
    oracle = (planted * scale).astype(np.float32)
    inputs = build(oracle, planted, planted, seed)
    present = planted.reshape(len(planted), -1).any(axis=1)
    full = planted.reshape(len(planted), -1).all(axis=1)
    for key in ("mass-accuracy", "rank-accuracy", "pointing-game", "mask-ap"):
        values = run(key, inputs)[0].values
        assert np.allclose(values[present], 1.0), key  # by definition for the planted mask itself
        assert np.isnan(values[~present]).all(), key  # empty mask: undefined, not 0
    auc = run("mask-auroc", inputs)[0].values
    assert np.allclose(auc[present & ~full], 1.0)


def _same(a, b):
    return np.allclose(a, b, rtol=1e-9, atol=1e-12, equal_nan=True)


@MODEL
@given(cases(min_side=4, max_side=7), st.sampled_from([0.125, 0.37, 3.0, 1024.0]))
def test_scale_invariant_metrics_are_invariant_to_positive_scaling(case, c):
    attr, planted, verified, seed = case
    base = build(attr, planted, verified, seed, with_model=True)
    scaled = build((attr.astype(np.float64) * c), planted, verified, seed, with_model=True)
    for key in SCALE_INVARIANT:
        for r0, r1 in zip(run(key, base), run(key, scaled), strict=True):
            assert _same(r0.values, r1.values), (key, r0.truth, r0.values, r1.values)


@FAST
@given(arrays(np.bool_, (12, 12)), st.integers(0, 2**16))
def test_random_attribution_mass_accuracy_is_the_area_share_on_average(mask, seed):
    if not mask.any():
        mask[0, 0] = True
    rng = np.random.default_rng(seed)
    draws = 400
    attr = rng.random((draws, 12, 12)).astype(np.float32)
    masks = np.broadcast_to(mask, attr.shape)
    inputs = MetricInputs(attr, np.zeros((draws, 1, 12, 12), np.float32), np.zeros(draws, int), planted=masks)
    values = compute_metric("mass-accuracy", inputs)[0].values
    share = mask.mean()
    # Exchangeable i.i.d. pixel values: E[mass inside / total mass] = |mask| / pixels exactly (from the
    # definition); the mean of 400 draws lies within 4.5 standard errors of it.
    se = values.std(ddof=1) / np.sqrt(draws)
    assert abs(values.mean() - share) <= 4.5 * se + 1e-12
