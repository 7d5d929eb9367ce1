"""Stability: max-sensitivity and infidelity (Yeh, Hsieh, Suggala, Inouye, Ravikumar. NeurIPS 2019).

- ``max-sensitivity``: max over ``samples`` perturbations y ~ U(-radius, radius)^(C x H x W) of
  ||Phi(x + y) - Phi(x)||_F / ||Phi(x)||_F, where Phi(x) is the attribution given to the metric and
  Phi(x + y) comes from re-running the explainer (``rerun_explainer``) on the perturbed tiles. The same
  quantity as ``captum.metrics.sensitivity_max`` (default perturbation: uniform in the L-infinity ball,
  no clipping). A map that is zero everywhere has no relative sensitivity: NaN with a reason (captum then
  divides by 1 instead).
- ``infidelity``: E_I[(I . Phi(x) - (f(x) - f(x - I)))^2] with f the target score (default: the log-odds of the
  target probability; ``score = "probability"`` as a variant) and I one of Yeh et al.'s perturbations:
  - ``perturbation = "square"`` (default; Yeh et al.'s "square removal"): I removes a random square of
    ``side`` x the tile side (default 0.25, at least 2 px) by setting it to the baseline (default the twin; zero,
    mean or blur as for deletion), so f(x) - f(x - I) is the score drop of removing the square and I . Phi is
    the map's sum over it (I is the square's indicator per pixel: the maps are per-pixel evidence).
  - ``perturbation = "gaussian"`` (Yeh et al.'s noisy perturbation): I ~ N(0, noise^2) per pixel, shared across
    bands. Measured on the demo's cnn, this cannot separate the controls whatever the level (oracle / random
    infidelity 0.90-1.11 at noise 0.008-0.5 x band spread; the square gives 0.06-0.3): a zero-mean per-pixel
    noise moves the score through the signed, band-mixed gradient, which a per-pixel evidence map (unsigned,
    one value per pixel) cannot express. Kept as a variant; the report marks a metric that cannot separate
    the controls.
  With ``normalize = True`` (default) Phi is first rescaled by the optimal
  beta = E[(I . Phi) (f(x) - f(x - I))] / E[(I . Phi)^2] (as in Yeh et al.'s code), which makes the value
  invariant to the attribution's scale and comparable across methods. The same quantity as
  ``captum.metrics.infidelity`` on the same perturbations.

Perturbations are drawn per tile from ``[seed, tile, salt]``, so a tile's draw does not depend on the others.

**Noise calibrated to the data** (default ``noise = "auto"`` / ``radius = "auto"``): the noise of a band is a fraction
f of the band's spread (its standard deviation over the explained tiles), f starting at ``START_FRACTION`` (0.5) and
halved until at most ``max_flips`` of the perturbed copies change the model's predicted class (at most
``MAX_HALVINGS`` halvings): 10% for max-sensitivity, 1% for infidelity's gaussian perturbation. A perturbation that
flips most predictions measures the model's collapse, not the explanation: with the former fixed 0.02 reflectance, 69%
of the demo's predictions flipped and every explainer, random included, scored alike. The chosen f, the per-band noise
and the measured flip share are recorded with the result (``settings['calibrated']``, which the runner writes to the
manifest's notes). For infidelity the per-pixel perturbation I is the noise in band units of the mean spread (band c
gets I x spread_c / mean spread), so I . Phi keeps its per-pixel meaning. A number instead of ``"auto"`` gives the
former fixed noise in reflectance units, the same in every band.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.explainers.base import BASELINES, BLUR_SIGMA, make_baseline
from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    get_metric,
    model_scorer,
    nan_result,
    register_metric,
    tile_result,
)
from xbench.schema import Field, Where

if TYPE_CHECKING:
    from xbench.models.base import ModelHandle

_YEH = "Yeh, Hsieh, Suggala, Inouye, Ravikumar. On the (in)fidelity and sensitivity of explanations. NeurIPS 2019."


SCORES = ("log-odds", "probability")
LOG_ODDS_CLIP = 1e-6


def target_score(probabilities: np.ndarray, score: str) -> np.ndarray:
    """The target probability, or its log-odds log(p / (1 - p)) with p clipped to [1e-6, 1 - 1e-6]: a
    confident classifier's probability saturates near 1, where score drops vanish except at flips, so the
    log-odds is offered as a variant (``score = "log-odds"``)."""
    p = np.asarray(probabilities, dtype=np.float64)
    if score == "probability":
        return p
    p = np.clip(p, LOG_ODDS_CLIP, 1 - LOG_ODDS_CLIP)
    return np.log(p) - np.log1p(-p)


START_FRACTION = 0.5
MAX_HALVINGS = 10
AUTO = "auto"


def band_spread(images: np.ndarray) -> np.ndarray:
    """(C,) per-band standard deviation over the tiles (the unit of calibrated noise)."""
    return np.asarray(images, dtype=np.float64).std(axis=(0, 2, 3))


def flip_share(base_probs: np.ndarray, probs: np.ndarray, samples: int) -> float:
    """Share of perturbed copies (``samples`` per tile, tile-major) whose predicted class differs from the
    tile's."""
    before = np.repeat(np.argmax(base_probs, axis=1), samples)
    return float(np.mean(np.argmax(probs, axis=1) != before)) if probs.shape[0] else 0.0


def calibration_text(fraction: float, spread: np.ndarray, flips: float, limit: float, kind: str) -> str:
    lo, hi = float((fraction * spread).min()), float((fraction * spread).max())
    return (
        f"{kind} = {fraction:g} x band spread ({lo:.4g}..{hi:.4g} reflectance per band); "
        f"{flips:.1%} of perturbed copies change the predicted class (limit {limit:.0%})"
    )


def _level(value: Any, where: Where) -> Any:
    """A perturbation size: 'auto' or reflectance units in [0, 1000]."""
    if value == AUTO:
        return value
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 <= value <= 1e3:
        raise where.error("not an allowed value", expected=f"'{AUTO}' or a number in [0, 1000]", found=value)
    return value


def _samples(default: int) -> Field:
    return Field("int", default, low=1, high=100_000, doc="perturbations per tile")


def _max_flips(default: float) -> Field:
    return Field("number", default, low=0.0, high=1.0, doc="largest share of perturbed copies that may flip class")


# -- perturbations ----------------------------------------------------------------------------------------
def sensitivity_perturbations(seed: int, tile: int, shape: tuple[int, ...], samples: int, radius: float) -> np.ndarray:
    """(samples, C, H, W) float32 noise uniform in [-radius, radius] for one tile."""
    rng = np.random.default_rng([int(seed), int(tile), 13])
    return rng.uniform(-radius, radius, size=(samples, *shape)).astype(np.float32)


def square_perturbations(seed: int, tile: int, shape: tuple[int, int], samples: int, side: int) -> np.ndarray:
    """(samples, H, W) float32 indicators of random ``side`` x ``side`` squares (uniform positions, wholly
    inside the tile) for one tile: Yeh et al.'s square removal."""
    h, w = shape
    side = int(min(side, h, w))
    rng = np.random.default_rng([int(seed), int(tile), 19])
    rows = rng.integers(0, h - side + 1, size=samples)
    cols = rng.integers(0, w - side + 1, size=samples)
    out = np.zeros((samples, h, w), dtype=np.float32)
    for k, (r, c) in enumerate(zip(rows, cols, strict=True)):
        out[k, r : r + side, c : c + side] = 1.0
    return out


def square_side(fraction: float, shape: tuple[int, int]) -> int:
    """The square's side in pixels: ``fraction`` of the shorter tile side, at least 2 px."""
    return int(max(2, min(min(shape), round(float(fraction) * min(shape)))))


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
    rerun_explainer: Callable[..., np.ndarray],
    model: ModelHandle | None,
    images: np.ndarray,
    targets: np.ndarray,
    tiles: np.ndarray,
) -> np.ndarray:
    """Call ``rerun_explainer`` with the row-to-tile index when it accepts one (the runner's does)."""
    params: Mapping[str, inspect.Parameter]
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
    settings={
        "radius": Field("any", AUTO, check=_level, doc="'auto' or the noise radius in reflectance"),
        "samples": _samples(10),
        "max_flips": _max_flips(0.1),
    },
    settings_doc={
        "radius": "L-infinity radius of the uniform input noise: 'auto' (a fraction of each band's spread, "
        "calibrated to max_flips) or reflectance units",
        "samples": "perturbations per tile (the maximum is taken over them)",
        "max_flips": "largest share of noisy copies whose predicted class may change (radius 'auto')",
    },
)
def _max_sensitivity(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "max-sensitivity"
    samples = int(settings["samples"])
    assert inputs.rerun_explainer is not None
    images = np.asarray(inputs.images, dtype=np.float32)
    targets = np.asarray(inputs.targets)
    n = images.shape[0]
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    values = np.full(n, np.nan)
    reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(bad)}
    settings = dict(settings)
    unit = np.ones(images.shape[1])
    if settings["radius"] == AUTO:
        if inputs.model is None:
            return nan_result(get_metric(key), inputs, truth, "radius 'auto' needs the model to count flips", settings)
        spread = band_spread(images)
        model = inputs.model

        def calibrate() -> tuple[float, dict[str, Any]]:  # the model's flips, not the explainer's: shared
            chosen = {"max_flips": settings["max_flips"]}
            fraction = _calibrate_sensitivity(model, images, good, inputs.seed, samples, spread, chosen)
            return fraction, {k: chosen[k] for k in ("calibrated", "fraction_used")}

        where = (samples, float(settings["max_flips"]), good.tobytes())
        fraction, chosen = inputs.shared_work(calibrate, "sensitivity radius", *where)
        settings.update(chosen)
        radius, unit = fraction, spread
    else:
        radius = float(settings["radius"])

    def noisy_copies(ids: np.ndarray, level: float) -> np.ndarray:
        return np.concatenate(
            [
                images[i][None]
                + sensitivity_perturbations(inputs.seed, i, images.shape[1:], samples, 1.0)
                * (level * unit)[None, :, None, None].astype(np.float32)
                for i in ids
            ]
        )

    limit = max(int(inputs.batch_size), samples)
    for start in _chunks(good.size, samples, limit):
        ids = good[start : start + max(1, limit // samples)]
        noisy = noisy_copies(ids, radius)
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


def _calibrate_sensitivity(
    model: ModelHandle,
    images: np.ndarray,
    good: np.ndarray,
    seed: int,
    samples: int,
    spread: np.ndarray,
    settings: dict,
) -> float:
    """The largest fraction START_FRACTION / 2^k of the band spread whose uniform noise flips at most
    ``max_flips`` of the copies' predictions; records the choice in ``settings['calibrated']``."""
    score = model_scorer(model)
    base = score(images[good]) if good.size else np.zeros((0, 1))
    unit = [sensitivity_perturbations(seed, i, images.shape[1:], samples, 1.0) for i in good]
    fraction, flips = START_FRACTION, 0.0
    for _ in range(MAX_HALVINGS + 1):
        level = (fraction * spread)[None, :, None, None].astype(np.float32)
        probs = (
            np.concatenate([score(images[i][None] + u * level) for i, u in zip(good, unit, strict=True)])
            if good.size
            else np.zeros((0, 1))
        )
        flips = flip_share(base, probs, samples)
        if flips <= float(settings["max_flips"]):
            break
        fraction /= 2
    settings["calibrated"] = calibration_text(fraction, spread, flips, float(settings["max_flips"]), "radius")
    settings["fraction_used"] = fraction
    return fraction


_INFIDELITY_PERTURBATIONS = ("square", "gaussian")


@register_metric(
    "infidelity",
    definition="expected squared error between the attribution-weighted perturbation and the target score "
    "drop, for random squares set to the baseline (or Gaussian pixel noise; attribution rescaled optimally "
    "when `normalize`)",
    citation=_YEH,
    value_range=(0, np.inf),
    higher_is_better=False,
    family="steadiness",
    needs=("model",),
    per_tile=True,
    settings={
        "perturbation": Field("str", "square", choices=_INFIDELITY_PERTURBATIONS, doc="the perturbation I"),
        "side": Field("number", 0.25, low=0.0, high=1.0, low_open=True, doc="square side / tile side"),
        "baseline": Field("str", "twin", choices=BASELINES, doc="what a removed square becomes"),
        "blur_sigma": Field("number", BLUR_SIGMA, low=0.0, high=1e4, doc="sigma in pixels for the blur baseline"),
        "noise": Field("any", AUTO, check=_level, doc="'auto' or the noise sd in reflectance"),
        "samples": _samples(32),
        "normalize": Field("bool", True, doc="rescale the attribution by the optimal beta first"),
        "max_flips": _max_flips(0.01),
        "score": Field("str", "log-odds", choices=SCORES, doc="the target score f"),
    },
    settings_doc={
        "perturbation": "square: random squares set to the baseline (Yeh et al.'s square removal); gaussian: "
        "per-pixel Gaussian noise (cannot separate the controls on the shipped tasks)",
        "side": "square: the square's side as a share of the tile side (at least 2 px)",
        "baseline": "square: what the removed square becomes: twin (structure-free twin), zero, mean, blur",
        "blur_sigma": "square: Gaussian sigma in pixels for the blur baseline",
        "noise": "gaussian: standard deviation of the per-pixel perturbation: 'auto' (a fraction of each band's "
        "spread, calibrated to max_flips) or reflectance units",
        "max_flips": "gaussian: largest share of perturbed copies whose predicted class may change (noise 'auto')",
        "score": "f: log-odds of the target probability (unsaturated; black boxes too) or probability",
        "samples": "perturbations per tile",
        "normalize": "rescale the attribution by the optimal beta first (scale invariant)",
    },
)
def _infidelity(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "infidelity"
    settings = dict(settings)
    samples = int(settings["samples"])
    assert inputs.model is not None
    images = np.asarray(inputs.images, dtype=np.float32)
    targets = np.asarray(inputs.targets)
    n, c, h, w = images.shape
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    values = np.full(n, np.nan)
    reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(bad)}
    if not good.size:
        return tile_result(key, truth, values, reasons, settings)
    if settings["perturbation"] == "square" and settings["baseline"] == "twin" and inputs.twins is None:
        reason = "needs twins for the 'twin' baseline (no twins given; choose baseline zero, mean or blur)"
        return nan_result(get_metric(key), inputs, truth, reason, settings)
    score = model_scorer(inputs.model)
    # the model's scores of the tiles and of the squares depend on the seed, not on the explainer: shared
    base_probs = inputs.shared_work(lambda: score(images[good]), "tile scores", good.tobytes())
    base = target_score(base_probs[np.arange(good.size), targets[good]], settings["score"])
    if settings["perturbation"] == "square":
        side = square_side(float(settings["side"]), (h, w))
        pert = np.stack([square_perturbations(inputs.seed, int(i), (h, w), samples, side) for i in good])

        def square_scores() -> np.ndarray:
            twins = None if inputs.twins is None else np.asarray(inputs.twins)[good]
            fill = make_baseline(images[good], settings["baseline"], twins, float(settings["blur_sigma"]), "metric")
            return _square_scores(score, images[good], fill, targets[good], pert)

        where = (settings["baseline"], float(settings["blur_sigma"]), samples, side, good.tobytes())
        scores = inputs.shared_work(square_scores, "infidelity squares", *where)
        settings["calibrated"] = (
            f"squares of {side} x {side} px ({float(settings['side']):g} of the tile side) set to the "
            f"{settings['baseline']} baseline, {samples} per tile; f = {settings['score']}"
        )
    else:
        pert, scores = _gaussian_scores(score, images, targets, good, base_probs, inputs.seed, samples, settings)
    picked = target_score(scores, settings["score"])
    values[good] = infidelity(
        np.asarray(inputs.attributions)[good], pert, base[:, None] - picked, settings["normalize"]
    )
    return tile_result(key, truth, values, reasons, settings)


def _square_scores(
    score: Any, images: np.ndarray, fill: np.ndarray, targets: np.ndarray, pert: np.ndarray
) -> np.ndarray:
    """The target probabilities (G, S) of the tiles with each square of ``pert`` (G, S, H, W) set to
    ``fill``."""
    g, c, h, w = images.shape
    samples = pert.shape[1]
    per_chunk = max(1, (8 * 2**20) // (samples * c * h * w * 4))
    picked = np.empty((g, samples))
    for start in range(0, g, per_chunk):
        j = np.arange(start, min(g, start + per_chunk))
        on = pert[j][:, :, None] > 0
        stack = np.where(on, fill[j][:, None], images[j][:, None]).reshape(-1, c, h, w)
        probs = score(stack)
        picked[j] = probs[np.arange(stack.shape[0]), np.repeat(targets[j], samples)].reshape(len(j), samples)
    return picked


def _gaussian_scores(
    score: Any,
    images: np.ndarray,
    targets: np.ndarray,
    good: np.ndarray,
    base_probs: np.ndarray,
    seed: int,
    samples: int,
    settings: dict[str, Any],
) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian perturbations (G, S, H, W) and target probabilities (G, S), the noise calibrated to
    ``max_flips`` when 'auto' (the chosen level written into ``settings``)."""
    c = images.shape[1]
    if settings["noise"] == AUTO:
        spread = band_spread(images)
        mean_spread = float(spread.mean()) if spread.mean() > 0 else 1.0
        band_scale, fractions = spread / mean_spread, [START_FRACTION / 2**k for k in range(MAX_HALVINGS + 1)]
    else:
        band_scale, fractions, mean_spread = np.ones(c), [1.0], float(settings["noise"])
    for fraction in fractions:
        noise = fraction * mean_spread  # per-pixel sd I; band c gets I x spread_c / mean spread
        pert, scores = _infidelity_scores(score, images, targets, good, seed, samples, noise, band_scale)
        flips = flip_share(base_probs, scores[1], samples)
        if settings["noise"] != AUTO or flips <= float(settings["max_flips"]):
            break
    if settings["noise"] == AUTO:
        settings["calibrated"] = calibration_text(
            fraction, band_scale * mean_spread, flips, float(settings["max_flips"]), "noise"
        )
        settings["fraction_used"] = fraction
    return pert, scores[0]


def _infidelity_scores(
    score: Any,
    images: np.ndarray,
    targets: np.ndarray,
    good: np.ndarray,
    seed: int,
    samples: int,
    noise: float,
    band_scale: np.ndarray,
) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]:
    """Per-pixel perturbations (G, S, H, W), and the target scores (G, S) and all class probabilities
    (G * S, K) of the perturbed copies x - I (band c perturbed by I x band_scale[c])."""
    n, c, h, w = images.shape
    pert = np.stack([infidelity_perturbations(seed, i, (h, w), samples, noise) for i in good])
    scale = np.asarray(band_scale, dtype=np.float32)[None, None, :, None, None]
    per_chunk = max(1, (8 * 2**20) // (samples * c * h * w * 4))
    picked = np.empty((good.size, samples))
    probs_all = []
    for start in range(0, good.size, per_chunk):
        j = np.arange(start, min(good.size, start + per_chunk))
        stack = (images[good[j]][:, None] - pert[j][:, :, None] * scale).reshape(-1, c, h, w)
        probs = score(stack)
        probs_all.append(probs)
        picked[j] = probs[np.arange(stack.shape[0]), np.repeat(targets[good[j]], samples)].reshape(len(j), samples)
    return pert, (picked, np.concatenate(probs_all))
