"""Perturbation explainers that need only class scores, so they also run on black boxes: occlusion
(captum Occlusion), rise (written here: captum lacks it) and kernel-shap on SLIC superpixels (captum
KernelShap with a feature mask from scikit-image SLIC).

Score (setting ``score``): ``probability`` by default, i.e. ``model.probabilities`` (softmax of the logits
for torch models, the callable's output for black boxes), so torch and black-box models are explained in
the same units. ``logit`` uses a torch module's raw target logit (an error for black boxes).

Channel reduction: the perturbations cover all bands of a pixel at once, so every band receives the same
value; the map is their mean (equal to any one band).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from xbench.explainers.base import (
    BLUR_SIGMA,
    SCORES,
    as_numpy,
    as_tensor,
    batches,
    make_baseline,
    reduce_channels,
    score_function,
    signed_maps,
)
from xbench.explainers.registry import register_explainer
from xbench.schema import Field

CITE_OCCLUSION = "Zeiler, Fergus. Visualizing and understanding convolutional networks. ECCV 2014."
CITE_RISE = "Petsiuk, Das, Saenko. RISE: randomized input sampling for explanation of black-box models. BMVC 2018."
CITE_KERNEL_SHAP = (
    "Lundberg, Lee. A unified approach to interpreting model predictions. NeurIPS 2017 "
    "(KernelSHAP); SLIC superpixels: Achanta et al. IEEE TPAMI 2012."
)
PERTURB_BASELINES = ("zero", "mean", "blur")


def _perturb_fields(baseline: str) -> dict[str, Field]:
    """Settings every perturbation explainer shares: the baseline that replaces removed pixels and the score."""
    return {
        "baseline": Field("str", baseline, choices=PERTURB_BASELINES, doc="what replaces a removed patch"),
        "blur_sigma": Field("number", BLUR_SIGMA, low=0.0, doc="Gaussian sigma in pixels of the 'blur' baseline"),
        "score": Field("str", "probability", choices=SCORES, doc="the target class's probability or logit"),
    }


RISE_GROUP = 256  # perturbed copies built at once (the model sees them in its preferred batches)


@register_explainer(
    "occlusion",
    citation=CITE_OCCLUSION,
    needs=set(),
    settings={
        "window": Field("int", 8, low=1, doc="side of the occluded square patch, in pixels"),
        "stride": Field("int", 4, low=1, doc="step between patches, in pixels"),
        **_perturb_fields("mean"),
    },
    description="drop of the target score when a window x window patch (all bands) is "
    "replaced by a baseline, averaged over the windows covering each pixel "
    "(captum Occlusion); black box ok",
)
@signed_maps(True)
def occlusion(model, images, targets, context, *, window, stride, baseline, blur_sigma, score):
    key = "occlusion"
    forward = score_function(key, model, score)
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    c = images.shape[1]
    from captum.attr import Occlusion

    method = Occlusion(forward)
    out = np.empty(images.shape, dtype=np.float32)
    for sl in batches(images.shape[0], context.batch_size):
        x = as_tensor(images[sl])
        per_eval = max(1, context.batch_size // x.shape[0])
        attr = method.attribute(
            x,
            sliding_window_shapes=(c, window, window),
            strides=(c, stride, stride),
            baselines=as_tensor(base[sl]),
            target=torch.from_numpy(targets[sl]),
            perturbations_per_eval=per_eval,
        )
        out[sl] = as_numpy(attr)
    return reduce_channels(out, "mean")


def rise_masks(n_masks: int, grid: int, p: float, size: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """RISE masks (Petsiuk et al. 2018): a grid x grid binary grid with P(1) = p, upsampled bilinearly
    to (grid + 1) cells of ceil(H / grid) pixels and cropped at a random shift. float32 (n, H, W)."""
    h, w = size
    cell_h, cell_w = -(-h // grid), -(-w // grid)
    small = (rng.random((n_masks, 1, grid, grid)) < p).astype(np.float32)
    up = F.interpolate(
        torch.from_numpy(small), size=((grid + 1) * cell_h, (grid + 1) * cell_w), mode="bilinear", align_corners=False
    )[:, 0].numpy()
    dy = rng.integers(0, cell_h, n_masks)
    dx = rng.integers(0, cell_w, n_masks)
    out = np.empty((n_masks, h, w), dtype=np.float32)
    for i in range(n_masks):
        out[i] = up[i, dy[i] : dy[i] + h, dx[i] : dx[i] + w]
    return out


@register_explainer(
    "rise",
    citation=CITE_RISE,
    needs=set(),
    settings={
        "n_masks": Field("int", 500, low=1, doc="random masks"),
        "grid": Field("int", 8, low=1, doc="cells per side of the coarse mask grid before upsampling"),
        "p": Field("number", 0.5, low=0.0, high=1.0, low_open=True, doc="probability that a grid cell is kept"),
        **_perturb_fields("zero"),
    },
    description="target score under random smooth masks, averaged per pixel weighted by "
    "the mask (masked-out pixels take the baseline); black box ok",
)
@signed_maps(False)
def rise(model, images, targets, context, *, n_masks, grid, p, baseline, blur_sigma, score):
    """RISE saliency S(x) = sum_i f_t(x * M_i + b * (1 - M_i)) M_i / (n * p) (Petsiuk et al. 2018;
    b = 0 in the paper). The same seeded masks serve every tile, so a tile's map does not depend on the
    other tiles in the call."""
    key = "rise"
    score_function(key, model, score)  # validates the score for this model (black boxes have no logits)
    n, c, h, w = images.shape
    masks = rise_masks(n_masks, grid, p, (h, w), context.rng(stream=1))
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    out = np.zeros((n, h, w), dtype=np.float64)
    # The handle's own batched scoring path (preferred batch size, channels-last, inference mode); masks go
    # in groups of RISE_GROUP so that the perturbed copies of one tile stay small in memory.
    for i in range(n):
        x = images[i][None]
        b = base[i][None]
        zero_baseline = not b.any()  # the default: b * (1 - m) adds nothing
        for ms in batches(n_masks, RISE_GROUP):
            m = masks[ms][:, None]
            # x * m + b * (1 - m), in float32 like the inputs, without the extra copies
            perturbed = np.multiply(x, m, dtype=np.float32)
            if not zero_baseline:
                perturbed += b * (1.0 - m)
            scores = model.scores(perturbed, score)[:, targets[i]]
            out[i] += np.tensordot(scores, masks[ms], axes=(0, 0))
    return (out / (n_masks * p)).astype(np.float32)


def superpixels(tile: np.ndarray, n_segments: int, compactness: float, seed: int = 0) -> np.ndarray:
    """SLIC superpixels (Achanta et al. 2012) of one tile (C, H, W): int64 (H, W) labels 0..S-1.
    Each band is min-max scaled to [0, 1] first so the compactness means the same for every tile."""
    x = tile.transpose(1, 2, 0).astype(np.float64)
    lo = x.min(axis=(0, 1), keepdims=True)
    span = x.max(axis=(0, 1), keepdims=True) - lo
    x = (x - lo) / np.where(span > 0, span, 1.0)
    from skimage.segmentation import slic

    seg = slic(
        x,
        n_segments=n_segments,
        compactness=compactness,
        channel_axis=-1,
        start_label=0,
        convert2lab=False,
        enforce_connectivity=True,
    )
    _, seg = np.unique(seg, return_inverse=True)  # consecutive labels
    return seg.reshape(tile.shape[1:]).astype(np.int64)


def _coalition_input(coalition: torch.Tensor, tile: torch.Tensor, **kwargs: Any) -> torch.Tensor:
    """A coalition's model input: the tile where its superpixel is in the coalition, the baseline elsewhere.
    captum's default (``default_from_interp_rep_transform``: ``mask * tile + (1 - mask) * baseline``) as one
    select: the same values for finite tiles and baselines (x * 1 + 0 * b = x), in two tensor operations
    per coalition instead of six (~0.1 ms each: captum builds the inputs one coalition at a time)."""
    keep = coalition[0][kwargs["feature_mask"]].bool()
    return torch.where(keep, tile, kwargs["baselines"])


@register_explainer(
    "kernel-shap",
    citation=CITE_KERNEL_SHAP,
    needs=set(),
    settings={
        "n_segments": Field("int", 50, low=2, doc="SLIC superpixels per tile (the players of the game)"),
        "compactness": Field("number", 1.0, low=0.0, low_open=True, doc="SLIC compactness"),
        "n_samples": Field("int", 200, low=2, doc="random coalitions scored per tile"),
        **_perturb_fields("mean"),
    },
    description="Shapley values of SLIC superpixels by weighted linear regression on "
    "random coalitions (captum KernelShap with a feature mask); each pixel "
    "gets its superpixel's value; black box ok",
)
@signed_maps(True)
def kernel_shap(model, images, targets, context, *, n_segments, compactness, n_samples, baseline, blur_sigma, score):
    key = "kernel-shap"
    forward = score_function(key, model, score)
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    n, c, h, w = images.shape
    from captum.attr import KernelShap

    method = KernelShap(forward)
    method.from_interp_rep_transform = _coalition_input  # captum's own hook for building coalition inputs
    out = np.empty(images.shape, dtype=np.float32)
    for i in range(n):
        seg = superpixels(images[i], n_segments, compactness)
        # one mask plane broadcast over the bands (captum accepts a broadcastable mask): each coalition's
        # input is built from an h x w selection, not a c x h x w one; same values
        mask = torch.from_numpy(seg[None, None].copy())
        # coalitions drawn from a generator seeded per tile: a tile's map ignores the other tiles
        torch.manual_seed(int(np.random.SeedSequence([int(context.seed), i]).generate_state(1)[0]))
        attr = method.attribute(
            as_tensor(images[i][None]),
            baselines=as_tensor(base[i][None]),
            target=int(targets[i]),
            feature_mask=mask,
            n_samples=n_samples,
            perturbations_per_eval=context.batch_size,
        )
        out[i] = as_numpy(attr[0])
    return reduce_channels(out, "mean")
