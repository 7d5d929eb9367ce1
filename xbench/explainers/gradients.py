"""Gradient explainers through captum: gradient, input-x-gradient, integrated-gradients, smoothgrad,
guided-backprop, deeplift.

All attribute the target class *logit* of the torch module (``model.module``), batched over tiles
(``context.batch_size``). Channel reduction (bands -> one map) is the ``reduce`` setting:
- signed sums for input-x-gradient, integrated gradients and DeepLIFT (``sum``; then the map's total is
  the method's total attribution, so completeness statements carry over to the map);
- ``max-abs`` for plain gradients, SmoothGrad and guided backprop (Simonyan et al. 2014 take the maximum
  over channels of the absolute gradient).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch
from captum.attr import (
    DeepLift,
    GuidedBackprop,
    InputXGradient,
    IntegratedGradients,
    NoiseTunnel,
    Saliency,
)

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    BASELINES,
    REDUCTIONS,
    ExplainContext,
    as_numpy,
    as_tensor,
    batches,
    check_choice,
    check_float,
    check_int,
    make_baseline,
    reduce_channels,
)
from xbench.explainers.registry import register_explainer
from xbench.models.base import ModelHandle

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


def _require_modules(key: str, model: ModelHandle, types: tuple[type, ...], what: str) -> None:
    """captum's modified backpropagation works through hooks on activation *modules*; a network whose
    non-linearities are all functional calls would silently get plain gradients instead."""
    if not any(isinstance(m, types) for m in model.module.modules()):
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
    defaults={"reduce": "max-abs"},
    description="gradient of the target logit w.r.t. the input (captum Saliency); bands reduced by max |gradient|",
)
def gradient(model, images, targets, context, *, reduce):
    reduce = check_choice("gradient", "reduce", reduce, REDUCTIONS)
    method = Saliency(model.module)
    raw = _per_batch(model, images, targets, context, lambda x, t, sl: method.attribute(x, target=t, abs=False))
    return reduce_channels(raw, reduce)


@register_explainer(
    "input-x-gradient",
    citation=CITE_IXG,
    needs={"gradients"},
    defaults={"reduce": "sum"},
    description="input times gradient of the target logit (captum InputXGradient); bands summed",
)
def input_x_gradient(model, images, targets, context, *, reduce):
    reduce = check_choice("input-x-gradient", "reduce", reduce, REDUCTIONS)
    method = InputXGradient(model.module)
    raw = _per_batch(model, images, targets, context, lambda x, t, sl: method.attribute(x, target=t))
    return reduce_channels(raw, reduce)


@register_explainer(
    "integrated-gradients",
    citation=CITE_IG,
    needs={"gradients"},
    defaults={"baseline": "zero", "n_steps": 64, "method": "gausslegendre", "blur_sigma": 4.0, "reduce": "sum"},
    description="path integral of gradients from a baseline (zero, mean, blur or the "
    "tile's structure-free twin) to the tile (captum IntegratedGradients); "
    "bands summed; baseline 'twin' needs the twins",
)
def integrated_gradients(model, images, targets, context, *, baseline, n_steps, method, blur_sigma, reduce):
    key = "integrated-gradients"
    check_choice(key, "baseline", baseline, BASELINES)
    n_steps = check_int(key, "n_steps", n_steps, 2)
    method = check_choice(
        key, "method", method, ("gausslegendre", "riemann_trapezoid", "riemann_left", "riemann_right", "riemann_middle")
    )
    blur_sigma = check_float(key, "blur_sigma", blur_sigma, 0.0)
    reduce = check_choice(key, "reduce", reduce, REDUCTIONS)
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
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
    return reduce_channels(raw, reduce)


@register_explainer(
    "smoothgrad",
    citation=CITE_SMOOTHGRAD,
    needs={"gradients"},
    defaults={"n_samples": 25, "stdev": 0.05, "reduce": "max-abs"},
    description="gradients averaged over noisy copies of the tile (captum NoiseTunnel "
    "over Saliency); noise sd 'stdev' in reflectance units; bands by max |.|",
)
def smoothgrad(model, images, targets, context, *, n_samples, stdev, reduce):
    key = "smoothgrad"
    n_samples = check_int(key, "n_samples", n_samples, 1)
    stdev = check_float(key, "stdev", stdev, 0.0)
    reduce = check_choice(key, "reduce", reduce, REDUCTIONS)
    tunnel = NoiseTunnel(Saliency(model.module))

    def attribute(x, t, sl):
        per_eval = max(1, context.batch_size // x.shape[0])
        return tunnel.attribute(
            x,
            nt_type="smoothgrad",
            nt_samples=n_samples,
            stdevs=stdev,
            nt_samples_batch_size=per_eval,
            target=t,
            abs=False,
        )

    raw = _per_batch(model, images, targets, context, attribute)
    return reduce_channels(raw, reduce)


@register_explainer(
    "guided-backprop",
    citation=CITE_GUIDED,
    needs={"gradients"},
    defaults={"reduce": "max-abs"},
    description="gradient with negative signals zeroed at every ReLU (captum "
    "GuidedBackprop; needs nn.ReLU modules); bands by max |.|",
)
def guided_backprop(model, images, targets, context, *, reduce):
    key = "guided-backprop"
    reduce = check_choice(key, "reduce", reduce, REDUCTIONS)
    _require_modules(key, model, (torch.nn.ReLU,), "nn.ReLU")
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
    defaults={"baseline": "zero", "blur_sigma": 4.0, "reduce": "sum"},
    description="DeepLIFT rescale rule against a baseline (zero, mean, blur or twin) "
    "(captum DeepLift; needs nn.ReLU modules, none reused); bands summed",
)
def deeplift(model, images, targets, context, *, baseline, blur_sigma, reduce):
    key = "deeplift"
    check_choice(key, "baseline", baseline, BASELINES)
    blur_sigma = check_float(key, "blur_sigma", blur_sigma, 0.0)
    reduce = check_choice(key, "reduce", reduce, REDUCTIONS)
    base = make_baseline(images, baseline, context.twins, blur_sigma, where=f"explainer '{key}'")
    _require_modules(key, model, DEEPLIFT_MODULES, "nn.ReLU (or other DeepLIFT-supported activation)")
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
    return reduce_channels(raw, reduce)
