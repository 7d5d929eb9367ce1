"""Truth that matches what a model can see: the void fringe, the signed-map convention, coverage weights.

The analytic detector: p(class 1) = BASE + K * mean over pixels of sum_c |x - twin| (the twin = the tile
without its structures). The model is additive over pixels, so each pixel's contribution to the score is
known exactly: K / (H W) * sum_c |x - twin| at that pixel (the Shapley value of a pixel in an additive game
is its own term; Shapley 1953). That exact map must score at least as well as any blurred version of it on
every overlap metric, under the planted and the verified truth.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from sklearn.metrics import average_precision_score, roc_auc_score

from xbench import scenes
from xbench.metrics import MetricInputs, compute_metric
from xbench.metrics.overlap import mask_ap_weighted, mask_auroc_weighted, truth_regions
from xbench.models.adapters import wrap_callable
from xbench.names import STRUCTURE_TYPES
from xbench.truth import CORE_THRESHOLD, compute_reliance

BASE, K, SIZE = 0.2, 8.0, 32
OVERLAP = ("mass-accuracy", "rank-accuracy", "pointing-game", "mask-auroc", "mask-ap", "topk-iou")


@pytest.fixture(scope="module")
def road_tiles():
    presence = {t: 0.0 for t in STRUCTURE_TYPES} | {"road": 1.0}
    _, sc = scenes.synthesize("conifer-upland", 10, seed=21, size=SIZE, presence=presence)
    sc = [s for s in sc if s.instances][:8]
    images = np.stack([s.render() for s in sc])
    twins = np.stack([s.render(omit=s.instance_ids()) for s in sc])

    def probs(batch: np.ndarray) -> np.ndarray:
        # Which tile a render comes from: the twin it is closest to (renders differ from their own twin only
        # under structures; the terrain of other tiles differs everywhere).
        out = np.empty((batch.shape[0], 2))
        for k, img in enumerate(batch.astype(np.float64)):
            own = twins[np.argmin(np.abs(twins - img).sum(axis=(1, 2, 3)))]
            p1 = BASE + K * np.abs(img - own).sum(axis=0).mean()
            out[k] = (1 - p1, p1)
        return out

    exact = K * np.abs(images.astype(np.float64) - twins).sum(axis=1) / (SIZE * SIZE)
    coverage = np.stack([np.max([i.coverage for i in s.instances], axis=0) for s in sc])
    model = wrap_callable(probs, 2, "road-detector")
    assert (model.probabilities(images)[:, 1] < 1).all()  # probabilities stay in range
    return sc, images, exact.astype(np.float32), coverage, model


def _inputs(attr, images, coverage, rel):
    return MetricInputs(
        attributions=attr,
        images=images,
        targets=np.ones(len(images), dtype=np.int64),
        planted=coverage > 0,
        planted_coverage=coverage,
        verified=rel.verified_masks,
        verified_coverage=rel.verified_coverage,
    )


def test_exact_map_beats_its_blurred_versions(road_tiles) -> None:
    sc, images, exact, coverage, model = road_tiles
    rel = compute_reliance(model, sc, np.ones(len(sc), dtype=np.int64), n_boot=50)
    assert rel.verified_masks.any(axis=(1, 2)).all()  # every road is verified evidence
    blurred = {
        "gauss-0.5": ndimage.gaussian_filter(exact, (0, 0.5, 0.5)),
        "gauss-1": ndimage.gaussian_filter(exact, (0, 1, 1)),
        "gauss-2": ndimage.gaussian_filter(exact, (0, 2, 2)),
        "box-4x4": ndimage.uniform_filter(exact, (1, 4, 4)),
    }
    for key in OVERLAP:
        for res in compute_metric(key, _inputs(exact, images, coverage, rel)):
            best = res.values
            assert np.isfinite(best).all(), (key, res.truth, res.reasons)
            for name, attr in blurred.items():
                other = next(
                    r for r in compute_metric(key, _inputs(attr, images, coverage, rel)) if r.truth == res.truth
                )
                assert np.all(best >= other.values - 1e-9), (key, res.truth, name, best, other.values)


def test_fringe_policies_and_core_threshold() -> None:
    cov = np.array([[[1.0, 0.6, 0.3, 0.0]]])
    mask = cov > 0
    core, valid = truth_regions(mask, cov, "void", CORE_THRESHOLD)
    np.testing.assert_array_equal(core, [[[True, True, False, False]]])
    np.testing.assert_array_equal(valid, [[[True, True, False, True]]])
    assert truth_regions(mask, cov, "positive")[0].sum() == 3 and truth_regions(mask, cov, "positive")[1] is None
    core, valid = truth_regions(mask, cov, "negative")
    assert core.sum() == 2 and valid is None
    assert truth_regions(mask, None)[1] is None
    # A map that puts the fringe pixel last: under void it does not count; as positive it costs AUROC.
    attr = np.array([[[3.0, 2.0, 0.0, 1.0]]], dtype=np.float32)
    inputs = MetricInputs(
        attr, np.zeros((1, 1, 1, 4), np.float32), np.zeros(1, np.int64), planted=mask, planted_coverage=cov
    )
    void = compute_metric("mask-auroc", inputs)[0].values[0]
    positive = compute_metric("mask-auroc", inputs, fringe="positive")[0].values[0]
    assert void == 1.0 and positive == pytest.approx(roc_auc_score([1, 1, 1, 0], [3, 2, 0, 1]))  # sklearn
    # A fringe-only truth has no core: NaN with a reason.
    thin = MetricInputs(
        attr, np.zeros((1, 1, 1, 4), np.float32), np.zeros(1, np.int64), planted=mask, planted_coverage=cov * 0.4
    )
    res = compute_metric("mask-ap", thin)[0]
    assert np.isnan(res.values[0]) and "core_threshold" in res.reasons[0]


def test_signed_maps_positive_part_and_magnitude() -> None:
    mask = np.array([[[True, True, False, False]]])
    attr = np.array([[[-3.0, -2.0, 0.5, 0.1]]], dtype=np.float32)  # strong evidence *against* on the mask
    inputs = MetricInputs(attr, np.zeros((1, 1, 1, 4), np.float32), np.zeros(1, np.int64), planted=mask)
    # positive part (default): the mask pixels hold no evidence for the target -> ranked last
    assert compute_metric("mask-auroc", inputs)[0].values[0] == 0.0
    assert compute_metric("mask-auroc", inputs, signed="magnitude")[0].values[0] == 1.0


def test_coverage_weighted_auroc_and_ap() -> None:
    scores = np.array([[[3.0, 2.0, 1.0]]])
    cov = np.array([[[1.0, 0.5, 0.0]]])
    # Worked by hand: positives weigh (1, .5, 0), negatives (0, .5, 1). Ordered pairs pos > neg:
    # 3 vs 2: 1 x .5; 3 vs 1: 1 x 1; 2 vs 2 (tie, half): .5 x .5 x .5; 2 vs 1: .5 x 1 -> 2.125 / (1.5 x 1.5).
    assert mask_auroc_weighted(scores, cov)[0] == pytest.approx(2.125 / 2.25)
    ref = average_precision_score([1, 1, 1, 0, 0, 0], [3, 2, 1, 3, 2, 1], sample_weight=[1, 0.5, 0, 0, 0.5, 1])
    assert mask_ap_weighted(scores, cov)[0] == pytest.approx(ref)  # scikit-learn
    inputs = MetricInputs(
        scores.astype(np.float32),
        np.zeros((1, 1, 1, 3), np.float32),
        np.zeros(1, np.int64),
        planted=cov > 0,
        planted_coverage=cov,
    )
    assert compute_metric("mask-auroc", inputs, weighting="coverage")[0].values[0] == pytest.approx(2.125 / 2.25)


def test_tile_pack_may_carry_coverage_instead_of_masks(tmp_path) -> None:
    from xbench.data import load_pack
    from xbench.errors import XbenchInputError

    rng = np.random.default_rng(0)
    coverage = np.zeros((2, 1, 4, 4), np.float32)
    coverage[0, 0, 1, 1:3] = (1.0, 0.3)
    arrays = {
        "images": rng.random((2, 3, 4, 4)).astype(np.float32),
        "labels": np.array([1, 0]),
        "class_names": np.array(["intact", "road"]),
        "band_names": np.array(["blue", "green", "red"]),
        "mask_names": np.array(["road"]),
    }
    np.savez(tmp_path / "p.npz", coverage=coverage, **arrays)
    pack = load_pack(tmp_path / "p.npz")
    np.testing.assert_array_equal(pack.masks, coverage > 0)
    np.savez(tmp_path / "bad.npz", coverage=coverage * 2, **arrays)
    with pytest.raises(XbenchInputError, match="coverage"):
        load_pack(tmp_path / "bad.npz")
