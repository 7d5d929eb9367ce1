"""Model-verified reliance: an analytic model's drops are reproduced exactly; a trained model relies on
the label-driving type and not on the look-alikes."""

from __future__ import annotations

import numpy as np
import pytest

from xbench import scenes
from xbench.errors import XbenchInputError
from xbench.models.adapters import wrap_callable
from xbench.truth import VERIFIED_MIN_DROP, VERIFIED_REL_DROP, compute_reliance

BANDS = list(scenes.BANDS)
BLUE, RED, NIR = BANDS.index("blue"), BANDS.index("red"), BANDS.index("nir")
K = 1.0  # slope of the analytic detector
BASE = 0.3  # its intercept
CUE_STRENGTH = 0.02


def index_detector(images: np.ndarray) -> np.ndarray:
    """A linear spectral-index detector averaged over the tile: p(class 1) = BASE + K * mean(nir - red +
    blue). Probabilities stay inside (0, 1) for reflectance in [0, 1] bands of vegetated tiles."""
    x = images.astype(np.float64)
    p1 = BASE + K * (x[:, NIR] - x[:, RED] + x[:, BLUE]).mean(axis=(1, 2))
    return np.stack([1.0 - p1, p1], axis=1)


@pytest.fixture(scope="module")
def analytic_scenes():
    _, sc = scenes.synthesize(
        "conifer-upland",
        12,
        seed=3,
        size=32,
        presence={"road": 0.7, "river": 0.5, "clearing": 0.4, "outcrop": 0.3},
        label_rule={"classes": ["intact", "road"], "rule": [{"class": "road", "type": "road", "above": 0.005}]},
        cue={"kind": "band-offset", "band": "blue", "strength": CUE_STRENGTH},
        cue_rate=0.8,
    )
    return sc


def _index_mean(img: np.ndarray) -> float:
    x = img.astype(np.float64)
    return float((x[NIR] - x[RED] + x[BLUE]).mean())


def test_analytic_detector_drops(analytic_scenes) -> None:
    sc = analytic_scenes
    model = wrap_callable(index_detector, 2, "index-detector")
    targets = np.array([i % 2 for i in range(len(sc))], dtype=np.int64)  # both signs of the score
    rel = compute_reliance(model, sc, targets, seed=0, batch_size=7, n_boot=200)
    assert len(rel.instance_table) == sum(len(s.instances) for s in sc) > 10
    sign = np.where(targets == 1, 1.0, -1.0)
    for row in rel.instance_table.itertuples():
        scene = sc[row.tile]
        inst = next(i for i in scene.instances if i.instance_id == row.instance_id)
        tile, twin = scene.render(), scene.render(omit=(row.instance_id,))
        # Analytic drop of a linear tile-mean score (linearity of the mean, worked by hand): K/(H*W)
        # times the summed index change, confined to the instance's footprint (the twin contract).
        cov = inst.coverage > 0
        delta = (tile.astype(np.float64) - twin)[[NIR, RED, BLUE]]
        changed = delta[0] - delta[1] + delta[2]
        assert np.all(changed[~cov] == 0)
        expected = sign[row.tile] * K * changed[cov].sum() / cov.size
        assert row.drop == pytest.approx(expected, abs=1e-5)
        assert row.kind == inst.kind and row.human == inst.human
        assert row.coverage_px == pytest.approx(float(inst.coverage.sum()), rel=1e-6)
    # per type: all instances of the type removed at once
    kinds = sorted({i.kind for s in sc for i in s.instances})
    for kind in kinds:
        drops = []
        for t, scene in enumerate(sc):
            ids = scene.instance_ids([kind])
            if ids:
                d = _index_mean(scene.render()) - _index_mean(scene.render(omit=ids))
                drops.append(sign[t] * K * d)
        row = rel.type_table[rel.type_table["kind"] == kind].iloc[0]
        assert row["n"] == len(drops)
        assert row["mean_drop"] == pytest.approx(np.mean(drops), abs=1e-5)
        if len(drops) > 1 and np.ptp(drops) > 0:
            # a percentile bootstrap interval of the mean brackets the mean (Efron & Tibshirani 1993)
            assert row["ci_low"] <= row["mean_drop"] <= row["ci_high"]
    # the cue: a blue offset of CUE_STRENGTH everywhere moves the score by exactly K * CUE_STRENGTH
    cue_tiles = [t for t, s in enumerate(sc) if s.cue_on]
    assert cue_tiles
    row = rel.type_table[rel.type_table["kind"] == "cue"].iloc[0]
    assert row["n"] == len(cue_tiles)
    assert row["mean_drop"] == pytest.approx(np.mean(sign[cue_tiles]) * K * CUE_STRENGTH, abs=1e-5)


def test_evidence_and_verified_masks(analytic_scenes) -> None:
    sc = analytic_scenes
    model = wrap_callable(index_detector, 2, "index-detector")
    targets = np.zeros(len(sc), dtype=np.int64)  # class 0: removing dark structures lowers its score
    rel = compute_reliance(model, sc, targets, n_boot=100)
    assert rel.evidence.dtype == np.float32 and rel.evidence.shape == (len(sc), 32, 32)
    assert rel.verified_masks.dtype == np.bool_
    for t, scene in enumerate(sc):
        rows = rel.instance_table[rel.instance_table["tile"] == t]
        expected = np.zeros((32, 32))
        verified = np.zeros((32, 32), dtype=bool)
        largest = rows["share"].max() if len(rows) else 0.0
        for row in rows.itertuples():
            inst = next(i for i in scene.instances if i.instance_id == row.instance_id)
            expected += max(row.share, 0.0) * inst.coverage
            if row.share >= max(VERIFIED_MIN_DROP, VERIFIED_REL_DROP * largest):
                verified |= inst.coverage > 0
        # Efficiency (Shapley 1953): the shares add up to the change from the empty to the full tile.
        total = _index_mean(scene.render()) - _index_mean(scene.render(omit=scene.instance_ids()))
        assert rows["share"].sum() == pytest.approx(-K * total, abs=1e-6)
        np.testing.assert_allclose(rel.evidence[t], expected, atol=1e-6)
        np.testing.assert_array_equal(rel.verified_masks[t], verified)


def test_batch_size_does_not_change_results(analytic_scenes) -> None:
    model = wrap_callable(index_detector, 2, "index-detector")
    targets = np.ones(len(analytic_scenes), dtype=np.int64)
    a = compute_reliance(model, analytic_scenes, targets, batch_size=5, n_boot=100, seed=1)
    b = compute_reliance(model, analytic_scenes, targets, batch_size=500, n_boot=100, seed=1)
    np.testing.assert_array_equal(a.instance_table["drop"].to_numpy(), b.instance_table["drop"].to_numpy())
    assert a.type_table.equals(b.type_table)


def test_bad_targets_named(analytic_scenes) -> None:
    model = wrap_callable(index_detector, 2, "index-detector")
    with pytest.raises(XbenchInputError, match="targets"):
        compute_reliance(model, analytic_scenes, np.zeros(3, dtype=np.int64))
    with pytest.raises(XbenchInputError, match="targets"):
        compute_reliance(model, analytic_scenes, np.full(len(analytic_scenes), 5))


def test_trained_model_relies_on_roads_not_rivers(trained_small) -> None:
    data = trained_small.data
    rel = compute_reliance(trained_small.handle, data.test_scenes, data.test.clean_labels, n_boot=300)
    road, river = rel.drop_of("road"), rel.drop_of("river")
    assert road > 0.1, rel.type_table
    assert road > river + 0.1, rel.type_table
    assert "road" in rel.relied_types()
    assert "river" not in rel.relied_types()
    # verified evidence sits on road pixels
    road_px = data.test.type_mask(["road"])
    assert rel.evidence[road_px].sum() > rel.evidence[~road_px].sum()


def test_cue_row_restricted_to_cue_classes(analytic_scenes) -> None:
    sc = analytic_scenes
    model = wrap_callable(index_detector, 2, "index-detector")
    targets = np.array([i % 2 for i in range(len(sc))], dtype=np.int64)
    rel = compute_reliance(model, sc, targets, n_boot=100, cue_classes=[1])
    cue_pos = [t for t, s in enumerate(sc) if s.cue_on and targets[t] == 1]
    row = rel.type_table[rel.type_table["kind"] == "cue"].iloc[0]
    assert row["n"] == len(cue_pos) > 0
    # the blue offset raises the class-1 score by exactly K * strength (linear detector, by hand)
    assert row["mean_drop"] == pytest.approx(K * CUE_STRENGTH, abs=1e-6)
