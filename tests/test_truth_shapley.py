"""Verified truth by Shapley shares over a tile's instances: redundant instances that each suffice are both
verified; shares add up to the total change and equal values worked out by hand."""

from __future__ import annotations

import numpy as np
import pytest

from xbench import scenes
from xbench.models.adapters import wrap_callable
from xbench.names import STRUCTURE_TYPES
from xbench.truth import EXACT_MAX_INSTANCES, compute_reliance, exact_shapley, type_roles

OFF = {t: 0.0 for t in STRUCTURE_TYPES}


def _scene_with(count: int, presence: dict[str, float]) -> object:
    _, sc = scenes.synthesize("conifer-upland", 40, seed=5, size=32, presence={**OFF, **presence})
    return next(s for s in sc if len(s.instances) == count)


def _presence_probe(scene) -> tuple[list[tuple[int, int]], np.ndarray]:
    """For each instance, one pixel that only it covers and where removing it changes the tile, and the
    full tile's values there: an image 'holds' the instance when it shows the full tile's value there."""
    full = scene.render()
    pixels = []
    for inst in scene.instances:
        others = sum((o.coverage for o in scene.instances if o is not inst), np.zeros_like(inst.coverage))
        changed = (full != scene.render(omit=(inst.instance_id,))).any(axis=0)
        r, c = np.argwhere((inst.coverage > 0) & (others == 0) & changed)[0]
        pixels.append((int(r), int(c)))
    return pixels, full


def _detector(scene, value_of):
    """A black box whose class-1 probability is ``value_of(present)`` for the set of present instances."""
    pixels, full = _presence_probe(scene)

    def probs(images: np.ndarray) -> np.ndarray:
        out = np.empty((images.shape[0], 2))
        for k, img in enumerate(images):
            present = frozenset(i for i, (r, c) in enumerate(pixels) if np.array_equal(img[:, r, c], full[:, r, c]))
            p1 = value_of(present)
            out[k] = (1.0 - p1, p1)
        return out

    return wrap_callable(probs, 2, "presence-detector")


def test_redundant_instances_both_verified() -> None:
    scene = _scene_with(2, {"clearing": 1.0})
    # Either clearing alone suffices: v(empty) = 0.1, v(A) = v(B) = v(AB) = 0.9.
    model = _detector(scene, lambda present: 0.9 if present else 0.1)
    rel = compute_reliance(model, [scene], np.array([1]), n_boot=50)
    table = rel.instance_table
    # Worked by hand (Shapley 1953): phi_A = 1/2 (v(A) - v()) + 1/2 (v(AB) - v(B)) = 0.4, same for B.
    np.testing.assert_allclose(table["share"], [0.4, 0.4], atol=1e-12)
    # One at a time, neither looks used: the blindness the shares remove.
    np.testing.assert_allclose(table["drop"], [0.0, 0.0], atol=1e-12)
    assert table["verified"].all()
    union = np.zeros((32, 32), dtype=bool)
    for inst in scene.instances:
        union |= inst.coverage > 0
    np.testing.assert_array_equal(rel.verified_masks[0], union)
    assert rel.unverified_table().empty
    # Efficiency: shares add up to v(all) - v(none) = 0.8.
    assert table["share"].sum() == pytest.approx(0.8, abs=1e-12)


def test_three_instances_hand_values() -> None:
    scene = _scene_with(3, {"clearing": 1.0, "outcrop": 1.0})

    def value(present: frozenset) -> float:
        # instance 0 adds 0.3 on its own; instances 1 and 2 add 0.2 only together (a pure interaction).
        return 0.1 + 0.3 * (0 in present) + 0.2 * ({1, 2} <= present)

    rel = compute_reliance(_detector(scene, value), [scene], np.array([1]), n_boot=50)
    shares = rel.instance_table["share"].to_numpy()
    # Worked by hand (Shapley 1953): the additive 0.3 goes to instance 0; the interaction 0.2 is split
    # equally between 1 and 2 (symmetry), so (0.3, 0.1, 0.1); they sum to v(all) - v(none) = 0.5.
    np.testing.assert_allclose(shares, [0.3, 0.1, 0.1], atol=1e-12)
    assert shares.sum() == pytest.approx(0.5, abs=1e-12)
    # One at a time: instance 1 or 2 alone removed drops 0.2 each, instance 0 drops 0.3.
    np.testing.assert_allclose(rel.instance_table["drop"], [0.3, 0.2, 0.2], atol=1e-12)


def test_exact_shapley_core_and_sampled_efficiency() -> None:
    # Glove game (common practice textbook example, from memory): players 0 and 1 hold left gloves, 2 a
    # right glove; a coalition is worth the number of pairs. Shapley values: (1/6, 1/6, 2/3).
    v = np.array([0, 0, 0, 0, 0, 1, 1, 1], dtype=float)  # bit mask order: {}, {0}, {1}, {0,1}, {2}, ...
    np.testing.assert_allclose(exact_shapley(v), [1 / 6, 1 / 6, 2 / 3], atol=1e-12)
    rng = np.random.default_rng(0)
    table = rng.random(2**4)
    assert exact_shapley(table).sum() == pytest.approx(table[-1] - table[0], abs=1e-12)
    assert EXACT_MAX_INSTANCES == 6


def test_sampled_shares_keep_efficiency() -> None:
    _, sc = scenes.synthesize(
        "conifer-upland", 40, seed=9, size=32, presence={**OFF, "clearing": 1.0, "outcrop": 1.0, "natural-gap": 1.0}
    )
    scene = max(sc, key=lambda s: len(s.instances))
    n = len(scene.instances)
    if n <= EXACT_MAX_INSTANCES:
        pytest.skip(f"no tile with more than {EXACT_MAX_INSTANCES} instances in this draw (largest {n})")
    rng = np.random.default_rng(1)
    gain = rng.random(n)
    model = _detector(scene, lambda present: 0.05 + 0.9 * sum(gain[i] for i in present) / gain.sum())
    rel = compute_reliance(model, [scene], np.array([1]), n_boot=50)
    shares = rel.instance_table["share"].to_numpy()
    # Permutation sampling (Strumbelj & Kononenko 2014) keeps efficiency exactly; on an additive game every
    # order gives each player its own gain, so the estimate is exact too.
    assert shares.sum() == pytest.approx(0.9, abs=1e-9)
    np.testing.assert_allclose(shares, 0.9 * gain / gain.sum(), atol=1e-9)


def test_type_roles() -> None:
    roles = type_roles(["road", "river", "cue"], ["river", "outcrop"], ["road", "river", "outcrop", "clearing"])
    assert roles == {
        "road": "relied-on",
        "river": "relied-on look-alike",
        "outcrop": "unused",
        "clearing": "unused",
    }


def test_unverified_tiles_are_counted_with_reasons() -> None:
    from xbench.truth import unverified_summary

    scene = _scene_with(2, {"clearing": 1.0})
    # The model ignores both instances: no change, so no verified evidence, and the reason says so.
    rel = compute_reliance(_detector(scene, lambda present: 0.6), [scene], np.array([1]), n_boot=50)
    table = rel.unverified_table()
    assert list(table["reason"]) == ["no-change"] and table.attrs["fraction"] == 1.0
    assert "1 of 1 tiles" in unverified_summary(rel)
