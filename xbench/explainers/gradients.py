"""Gradient explainers through captum: gradient, input-x-gradient, integrated-gradients, smoothgrad,
guided-backprop, deeplift.

All attribute the target class *logit* of the torch module (``model.module``), batched over tiles
(``context.batch_size``). Channel reduction (bands -> one map) is the ``reduce`` setting:
- signed sums for input-x-gradient, integrated gradients and DeepLIFT (``sum``; then the map's total is
  the method's total attribution, so completeness statements carry over to the map);
- ``max-abs`` for plain gradients, SmoothGrad and guided backprop (Simonyan et al. 2014 take the maximum
  over channels of the absolute gradient).

Each explainer declares whether its maps are signed (``signed_maps``): the signed reductions (``sum``,
``mean``) give signed maps, the absolute ones unsigned maps.

SmoothGrad's noise is a fraction (``noise_fraction``, default 0.15; Smilkov et al. 2017 suggest 10-20% of the
input range) of each band's spread, the band's standard deviation on the training split
(``ExplainContext.band_spread``; without it, over the explained tiles). ``stdev`` (reflectance units, same
for every band) overrides the rule.

Integrated gradients and DeepLIFT check themselves: captum's convergence delta
(``compute_convergence_delta``: sum of the attributions minus the target logit's change from the baseline
to the tile) divided by that change, in absolute value, is the tile's ``completeness-gap`` (NaN where
the change is below 1e-6), put into
``context.self_checks`` when the caller passes a dict there.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
import torch

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    ExplainContext,
    as_numpy,
    as_tensor,
    baseline_fields,
    batches,
    make_baseline,
    reduce_channels,
    reduce_field,
    reduce_is_signed,
    signed_maps,
    torch_module,
)
from xbench.explainers.registry import register_explainer
from xbench.models.base import ModelHandle
from xbench.schema import Field

if TYPE_CHECKING:  # captum is imported where a method runs: a client that only dispatches cells never loads it
    from captum.attr import DeepLift, IntegratedGradients

CITE_GRADIENT = "Simonyan, Vedaldi, Zisserman. Deep inside convolutional networks. ICLR Workshop 2014."
CITE_IXG = "Shrikumar, Greenside, Shcherbina, Kundaje. Not just a black box. arXiv:1605.01713, 2016."
CITE_IG = "Sundararajan, Taly, Yan. Axiomatic attribution for deep networks. ICML 2017."
CITE_SMOOTHGRAD = "Smilkov, Thorat, Kim, Viegas, Wattenberg. SmoothGrad. arXiv:1706.03825, 2017."
CITE_GUIDED = (
    "Springenberg, Dosovitskiy, Brox, Riedmiller. Striving for simplicity: the all convolutional "
    "net. ICLR Workshop 2015."
)
CITE_DEEPLIFT = (
    "Shrikumar, Greenside, Kundaje. Learning important features through propagating activation differences. ICML 2017."
)

# activation modules captum's DeepLift has rules for (captum.attr._core.deep_lift.SUPPORTED_NON_LINEAR)
DEEPLIFT_MODULES = (
    torch.nn.ReLU,
    torch.nn.ELU,
    torch.nn.Sigmoid,
    torch.nn.Tanh,
    torch.nn.Softmax,
    torch.nn.MaxPool1d,
    torch.nn.MaxPool2d,
    torch.nn.MaxPool3d,
)


def _per_batch(
    model: ModelHandle,
    images: np.ndarray,
    targets: np.ndarray,
    context: ExplainContext,
    attribute: Callable[[torch.Tensor, torch.Tensor, slice], torch.Tensor],
) -> np.ndarray:
    """Run ``attribute(x, target, slice)`` batch by batch; returns (N, C, H, W) float32."""
    out = np.empty(images.shape, dtype=np.float32)
    for sl in batches(images.shape[0], context.batch_size):
        x = as_tensor(images[sl])
        t = torch.from_numpy(targets[sl])
        out[sl] = as_numpy(attribute(x, t, sl))
    return out


COMPLETENESS_KEY = "completeness-gap"
SMOOTHGRAD_NOISE_FRACTION = 0.15
IG_METHODS = ("gausslegendre", "riemann_trapezoid", "riemann_left", "riemann_right", "riemann_middle")
MIN_SCORE_CHANGE = 1e-6


def completeness_gap(deltas: np.ndarray, score_change: np.ndarray) -> np.ndarray:
    """|convergence delta| / |score change| per tile; NaN where the change is below ``MIN_SCORE_CHANGE``."""
    d = np.abs(np.asarray(deltas, dtype=np.float64))
    c = np.abs(np.asarray(score_change, dtype=np.float64))
    out = np.full(d.shape, np.nan)
    ok = c >= MIN_SCORE_CHANGE
    out[ok] = d[ok] / c[ok]
    return out


def _record_completeness(
    context: ExplainContext,
    model: ModelHandle,
    method: IntegratedGradients | DeepLift,
    raw: np.ndarray,
    images: np.ndarray,
    base: np.ndarray,
    targets: np.ndarray,
) -> None:
    """Put the completeness gap (captum's ``compute_convergence_delta`` over the logit change) into
    ``context.self_checks``. Its forward passes are a check, not part of the method: they are not counted
    in the explainer's cost."""
    if context.self_checks is None:
        return
    before = (model.calls.forward, model.calls.backward)
    deltas = np.empty(images.shape[0])
    change = np.empty(images.shape[0])
    with torch.no_grad():
        for sl in batches(images.shape[0], context.batch_size):
            t = torch.from_numpy(targets[sl])
            x, b = as_tensor(images[sl]), as_tensor(base[sl])
            deltas[sl] = as_numpy(
                method.compute_convergence_delta(as_tensor(raw[sl]), start_point=b, end_point=x, target=t)
            ).reshape(-1)
            fx = torch_module(model)(x).double().gather(1, t[:, None])[:, 0]
            fb = torch_module(model)(b).double().gather(1, t[:, None])[:, 0]
            change[sl] = (fx - fb).numpy()
    model.calls.forward, model.calls.backward = before
    context.self_checks[COMPLETENESS_KEY] = completeness_gap(deltas, change)


def _require_modules(key: str, model: ModelHandle, types: tuple[type, ...], what: str) -> None:
    """captum's modified backpropagation works through hooks on activation *modules*; a network whose
    non-linearities are all functional calls would silently get plain gradients instead."""
    if not any(isinstance(m, types) for m in torch_module(model).modules()):
        raise XbenchInputError(
            f"explainer '{key}'",
            f"model '{model.name}' has no {what} modules (functional activations such as torch.relu cannot be hooked)",
            expected=f"non-linearities as {what} modules, each used once",
        )


def _modified_backprop_error(key: str, model: ModelHandle, exc: Exception) -> XbenchInputError:
    return XbenchInputError(
        f"explainer '{key}'",
        f"captum failed on model '{model.name}': {type(exc).__name__}: {exc}",
        expected="a module whose non-linearities are nn.ReLU modules (not functional relu), each used "
        "once per forward pass and not in-place",
    )


@register_explainer(
    "gradient",
    citation=CITE_GRADIENT,
    needs={"gradients"},
    settings={"reduce": reduce_field("max-abs")},
    description="gradient of the target logit w.r.t. the input (captum Saliency); bands reduced by max |gradient|",
)
@signed_maps(reduce_is_signed)
def gradient(model, images, targets, context, *, reduce):
    from captum.attr import Saliency

    method = Saliency(model.module)
    raw = _per_batch(model, images, targets, context, lambda x, t, sl: method.attribute(x, target=t, abs=False))
    return reduce_channels(raw, reduce)


@register_explainer(
    "input-x-gradient",
    citation=CITE_IXG,
    needs={"gradients"},
    settings={"reduce": reduce_field("sum")},
    description="input times gradient of the target logit (captum InputXGradient); bands summed",
)
@signed_maps(reduce_is_signed)
def input_x_gradient(model, images, targets, context, *, reduce):
    from captum.attr import InputXGradient

    method = InputXGradient(model.module)
    raw = _per_batch(model, images, targets, context, lambda x, t, sl: method.attribute(x, target=t))
    return reduce_channels(raw, reduce)


@register_explainer(
    "integrated-gradients",
    citation=CITE_IG,
    needs={"gradients"},
    settings={
        **baseline_fields(),
        "n_steps": Field("int", 64, low=2, doc="points on the path from the baseline to the tile"),
        "method": Field("str", "gausslegendre", choices=IG_METHODS, doc="captum's integration rule"),
        "reduce": reduce_field("sum"),
    },
    description="path integral of gradients from a baseline (zero, mean, blur or the "
    "tile's structure-free twin) to the tile (captum IntegratedGradients); "
    "bands summed; baseline 'twin' needs the twins",
)
@signed_maps(reduce_is_signed)
def integrated_gradients(model, images, targets, context, *, baseline, n_steps, method, blur_sigma, reduce):
    key = "integrated-gradients"
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    from captum.attr import IntegratedGradients

    ig = IntegratedGradients(model.module)
    raw = _per_batch(
        model,
        images,
        targets,
        context,
        lambda x, t, sl: ig.attribute(
            x,
            baselines=as_tensor(base[sl]),
            target=t,
            n_steps=n_steps,
            method=method,
            internal_batch_size=context.batch_size,
        ),
    )
    _record_completeness(context, model, ig, raw, images, base, targets)
    return reduce_channels(raw, reduce)


def band_spread(images: np.ndarray, context: ExplainContext) -> np.ndarray:
    """(C,) per-band standard deviation: the training split's (``context.band_spread``) when given, else the
    explained tiles'."""
    if context.band_spread is not None:
        spread = np.asarray(context.band_spread, dtype=np.float64).reshape(-1)
        if spread.shape != (images.shape[1],) or not np.isfinite(spread).all() or (spread < 0).any():
            raise XbenchInputError(
                "ExplainContext.band_spread",
                "wrong shape or values",
                expected=f"({images.shape[1]},) finite values >= 0",
                found=spread.shape,
            )
        return spread
    return np.asarray(images, dtype=np.float64).std(axis=(0, 2, 3))


@register_explainer(
    "smoothgrad",
    citation=CITE_SMOOTHGRAD,
    needs={"gradients"},
    settings={
        "n_samples": Field("int", 25, low=1, doc="noisy copies per tile"),
        "noise_fraction": Field(
            "number", SMOOTHGRAD_NOISE_FRACTION, low=0.0, doc="noise sd as a share of each band's spread"
        ),
        "stdev": Field("number", None, low=0.0, nullable=True, doc="noise sd in reflectance (overrides the share)"),
        "reduce": reduce_field("max-abs"),
    },
    description="gradients averaged over noisy copies of the tile (captum Saliency); noise sd per band = "
    "noise_fraction x the band's spread on the training split (or 'stdev' reflectance); bands by max |.|",
)
@signed_maps(reduce_is_signed)
def smoothgrad(model, images, targets, context, *, n_samples, noise_fraction, stdev, reduce):
    """SmoothGrad (Smilkov et al. 2017): the mean gradient over ``n_samples`` copies x + e, with e Gaussian
    of sd ``noise_fraction`` x the band's spread in each band (or ``stdev`` in every band). Each tile's noise
    comes from ``[seed, tile, 11]``, so it does not depend on the batch."""
    if stdev is None:
        sigma = float(noise_fraction) * band_spread(images, context)
    else:
        sigma = np.full(images.shape[1], float(stdev))
    from captum.attr import Saliency

    saliency = Saliency(model.module)
    n, c, h, w = images.shape
    out = np.zeros(images.shape, dtype=np.float64)
    per_chunk = max(1, context.batch_size // n_samples)
    for start in range(0, n, per_chunk):
        ids = np.arange(start, min(n, start + per_chunk))
        noise = (
            np.stack(
                [
                    np.random.default_rng([int(context.seed), int(i), 11]).standard_normal((n_samples, c, h, w))
                    for i in ids
                ]
            )
            * sigma[None, None, :, None, None]
        )
        noisy = (images[ids][:, None] + noise).reshape(-1, c, h, w).astype(np.float32)
        t = torch.from_numpy(np.repeat(targets[ids], n_samples))
        grads = np.empty(noisy.shape, dtype=np.float32)
        for sl in batches(noisy.shape[0], context.batch_size):
            grads[sl] = as_numpy(saliency.attribute(as_tensor(noisy[sl]), target=t[sl], abs=False))
        out[ids] = grads.reshape(len(ids), n_samples, c, h, w).mean(axis=1)
    return reduce_channels(out.astype(np.float32), reduce)


@register_explainer(
    "guided-backprop",
    citation=CITE_GUIDED,
    needs={"gradients"},
    settings={"reduce": reduce_field("max-abs")},
    description="gradient with negative signals zeroed at every ReLU (captum "
    "GuidedBackprop; needs nn.ReLU modules); bands by max |.|",
)
@signed_maps(reduce_is_signed)
def guided_backprop(model, images, targets, context, *, reduce):
    key = "guided-backprop"
    _require_modules(key, model, (torch.nn.ReLU,), "nn.ReLU")
    from captum.attr import GuidedBackprop

    method = GuidedBackprop(model.module)
    try:
        raw = _per_batch(model, images, targets, context, lambda x, t, sl: method.attribute(x, target=t))
    except (RuntimeError, AssertionError, TypeError) as exc:
        raise _modified_backprop_error(key, model, exc) from exc
    return reduce_channels(raw, reduce)


@register_explainer(
    "deeplift",
    citation=CITE_DEEPLIFT,
    needs={"gradients"},
    settings={**baseline_fields(), "reduce": reduce_field("sum")},
    description="DeepLIFT rescale rule against a baseline (zero, mean, blur or twin) "
    "(captum DeepLift; needs nn.ReLU modules, none reused); bands summed",
)
@signed_maps(reduce_is_signed)
def deeplift(model, images, targets, context, *, baseline, blur_sigma, reduce):
    key = "deeplift"
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    _require_modules(key, model, DEEPLIFT_MODULES, "nn.ReLU (or other DeepLIFT-supported activation)")
    from captum.attr import DeepLift

    method = DeepLift(model.module)
    try:
        raw = _per_batch(
            model,
            images,
            targets,
            context,
            lambda x, t, sl: method.attribute(x, baselines=as_tensor(base[sl]), target=t),
        )
    except (RuntimeError, AssertionError, TypeError) as exc:
        raise _modified_backprop_error(key, model, exc) from exc
    _record_completeness(context, model, method, raw, images, base, targets)
    return reduce_channels(raw, reduce)
