"""Stability: max-sensitivity and infidelity (Yeh, Hsieh, Suggala, Inouye, Ravikumar. NeurIPS 2019).

- ``max-sensitivity``: max over ``samples`` perturbations y ~ U(-radius, radius)^(C x H x W) of
  ||Phi(x + y) - Phi(x)||_F / ||Phi(x)||_F, where Phi(x) is the attribution given to the metric and
  Phi(x + y) comes from re-running the explainer (``rerun_explainer``) on the perturbed tiles. The same
  quantity as ``captum.metrics.sensitivity_max`` (default perturbation: uniform in the L-infinity ball,
  no clipping). A map that is zero everywhere has no relative sensitivity: NaN with a reason (captum then
  divides by 1 instead).
- ``infidelity``: E_I[(I . Phi(x) - (f(x) - f(x - I)))^2] with f = the target class probability and
  I ~ N(0, noise^2) per pixel, shared across bands (attributions are per pixel, so I . Phi sums over
  pixels). With ``normalize = True`` (default) Phi is first rescaled by the optimal
  beta = E[(I . Phi) (f(x) - f(x - I))] / E[(I . Phi)^2] (as in Yeh et al.'s code), which makes the value
  invariant to the attribution's scale and comparable across methods. The same quantity as
  ``captum.metrics.infidelity`` on the same perturbations.

Perturbations are drawn per tile from ``[seed, tile, salt]``, so a tile's draw does not depend on the others.
"""

from __future__ import annotations

import inspect
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    check_number,
    model_scorer,
    register_metric,
    tile_result,
)

_YEH = "Yeh, Hsieh, Suggala, Inouye, Ravikumar. On the (in)fidelity and sensitivity of explanations. NeurIPS 2019."


# -- perturbations ----------------------------------------------------------------------------------------
def sensitivity_perturbations(seed: int, tile: int, shape: tuple[int, ...], samples: int, radius: float) -> np.ndarray:
    """(samples, C, H, W) float32 noise uniform in [-radius, radius] for one tile."""
    rng = np.random.default_rng([int(seed), int(tile), 13])
    return rng.uniform(-radius, radius, size=(samples, *shape)).astype(np.float32)


def infidelity_perturbations(seed: int, tile: int, shape: tuple[int, int], samples: int, noise: float) -> np.ndarray:
    """(samples, H, W) float32 Gaussian perturbations I ~ N(0, noise^2) for one tile (shared by all bands)."""
    rng = np.random.default_rng([int(seed), int(tile), 17])
    return rng.normal(0.0, noise, size=(samples, *shape)).astype(np.float32)


# -- pure cores ---------------------------------------------------------------------------------------------
def max_sensitivity(original: np.ndarray, perturbed: np.ndarray) -> np.ndarray:
    """max_s ||perturbed[:, s] - original||_F / ||original||_F per tile; original (N, H, W), perturbed
    (N, S, H, W). NaN where the original map is zero everywhere or anything is non-finite."""
    o = np.asarray(original, dtype=np.float64)
    p = np.asarray(perturbed, dtype=np.float64)
    n = o.shape[0]
    o = o.reshape(n, -1)
    p = p.reshape(n, p.shape[1], -1)
    norm = np.sqrt((o * o).sum(axis=1))
    diff = np.sqrt(((p - o[:, None, :]) ** 2).sum(axis=2)).max(axis=1)
    out = np.full(n, np.nan)
    ok = (norm > 0) & np.isfinite(norm) & np.isfinite(diff)
    out[ok] = diff[ok] / norm[ok]
    return out


def infidelity(
    attributions: np.ndarray, perturbations: np.ndarray, score_drops: np.ndarray, normalize: bool = True
) -> np.ndarray:
    """Mean squared difference between I . Phi and the score drop f(x) - f(x - I), per tile.

    attributions (N, H, W); perturbations (N, S, H, W); score_drops (N, S). Follows captum's arithmetic
    (including beta = 0 when I . Phi is zero for every sample)."""
    a = np.asarray(attributions, dtype=np.float64)
    n = a.shape[0]
    pert = np.asarray(perturbations, dtype=np.float64).reshape(n, -1, a[0].size)
    dots = np.einsum("nsp,np->ns", pert, a.reshape(n, -1))
    drops = np.asarray(score_drops, dtype=np.float64)
    samples = dots.shape[1]
    if normalize:
        aa = (dots * dots).sum(axis=1)
        ab = (dots * drops).sum(axis=1)
        bb = (drops * drops).sum(axis=1)
        beta = ab / np.where(aa != 0, aa, 1.0)
        return (beta * beta * aa - 2 * beta * ab + bb) / samples
    return ((dots - drops) ** 2).sum(axis=1) / samples


# -- runners ----------------------------------------------------------------------------------------------
def call_rerun_explainer(
    rerun_explainer: Any, model: Any, images: np.ndarray, targets: np.ndarray, tiles: np.ndarray
) -> np.ndarray:
    """Call ``rerun_explainer`` with the row-to-tile index when it accepts one (the runner's does)."""
    try:
        params = inspect.signature(rerun_explainer).parameters
    except (TypeError, ValueError):
        params = {}
    if "tiles" in params:
        return rerun_explainer(model, images, targets, tiles=tiles)
    return rerun_explainer(model, images, targets)


def _chunks(n_items: int, per_item: int, limit: int) -> range:
    return range(0, n_items, max(1, limit // max(1, per_item)))


@register_metric(
    "max-sensitivity",
    definition="largest relative change of the attribution (Frobenius) when the explainer is re-run on "
    "tiles perturbed uniformly within `radius`",
    citation=_YEH,
    value_range=(0, np.inf),
    higher_is_better=False,
    family="steadiness",
    needs=("explainer re-runs",),
    per_tile=True,
    defaults={"radius": 0.02, "samples": 10},
    settings_doc={
        "radius": "L-infinity radius of the uniform input noise (reflectance units)",
        "samples": "perturbations per tile (the maximum is taken over them)",
    },
)
def _max_sensitivity(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "max-sensitivity"
    check_number(key, "radius", settings["radius"], 0, 1e3)
    check_number(key, "samples", settings["samples"], 1, 100_000, integer=True)
    samples, radius = int(settings["samples"]), float(settings["radius"])
    assert inputs.rerun_explainer is not None
    images = np.asarray(inputs.images, dtype=np.float32)
    targets = np.asarray(inputs.targets)
    n = images.shape[0]
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    values = np.full(n, np.nan)
    reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(bad)}
    limit = max(int(inputs.batch_size), samples)
    for start in _chunks(good.size, samples, limit):
        ids = good[start : start + max(1, limit // samples)]
        noisy = np.concatenate(
            [
                images[i][None] + sensitivity_perturbations(inputs.seed, i, images.shape[1:], samples, radius)
                for i in ids
            ]
        )
        # `tiles` tells the runner which explained tile each noisy copy comes from (per-tile context such as
        # the planted masks of the oracle control or the twin baseline of integrated gradients).
        expl = np.asarray(
            call_rerun_explainer(
                inputs.rerun_explainer, inputs.model, noisy, np.repeat(targets[ids], samples), np.repeat(ids, samples)
            )
        )
        if expl.shape != (len(ids) * samples, *images.shape[2:]):
            raise XbenchInputError(
                "metric 'max-sensitivity': rerun_explainer output",
                "wrong shape",
                expected=f"({len(ids) * samples}, H, W)",
                found=expl.shape,
            )
        values[ids] = max_sensitivity(
            np.asarray(inputs.attributions)[ids], expl.reshape(len(ids), samples, *images.shape[2:])
        )
    for i in np.flatnonzero(~np.isfinite(values)):
        if int(i) not in reasons:
            a = np.asarray(inputs.attributions[i])
            reasons[int(i)] = (
                "attribution is zero everywhere: relative sensitivity undefined"
                if not np.abs(a).max() > 0
                else "the re-run explainer returned non-finite values"
            )
    return tile_result(key, truth, values, reasons, settings)


@register_metric(
    "infidelity",
    definition="expected squared error between the attribution-weighted perturbation and the target score "
    "drop, for Gaussian pixel perturbations (attribution rescaled optimally when `normalize`)",
    citation=_YEH,
    value_range=(0, np.inf),
    higher_is_better=False,
    family="steadiness",
    needs=("model",),
    per_tile=True,
    defaults={"noise": 0.02, "samples": 16, "normalize": True},
    settings_doc={
        "noise": "standard deviation of the per-pixel Gaussian perturbation (reflectance units)",
        "samples": "perturbations per tile",
        "normalize": "rescale the attribution by the optimal beta first (scale invariant)",
    },
)
def _infidelity(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "infidelity"
    check_number(key, "noise", settings["noise"], 0, 1e3)
    check_number(key, "samples", settings["samples"], 1, 100_000, integer=True)
    if not isinstance(settings["normalize"], bool):
        raise XbenchInputError(
            f"metric '{key}' setting 'normalize'", "must be true or false", found=settings["normalize"]
        )
    samples, noise = int(settings["samples"]), float(settings["noise"])
    assert inputs.model is not None
    images = np.asarray(inputs.images, dtype=np.float32)
    targets = np.asarray(inputs.targets)
    n, c, h, w = images.shape
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    values = np.full(n, np.nan)
    reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(bad)}
    if good.size:
        score = model_scorer(inputs.model)
        base = score(images[good])[np.arange(good.size), targets[good]]
        per_chunk = max(1, (8 * 2**20) // (samples * c * h * w * 4))
        for start in range(0, good.size, per_chunk):
            j = np.arange(start, min(good.size, start + per_chunk))
            ids = good[j]
            pert = np.stack([infidelity_perturbations(inputs.seed, i, (h, w), samples, noise) for i in ids])
            stack = (images[ids][:, None] - pert[:, :, None]).reshape(-1, c, h, w)
            probs = score(stack)
            picked = probs[np.arange(stack.shape[0]), np.repeat(targets[ids], samples)]
            scores = picked.reshape(len(ids), samples)
            values[ids] = infidelity(
                np.asarray(inputs.attributions)[ids], pert, base[j][:, None] - scores, bool(settings["normalize"])
            )
    return tile_result(key, truth, values, reasons, settings)
