"""Class activation maps from gradients at a named conv layer: grad-cam (captum LayerGradCam) and
grad-cam-pp (Grad-CAM++, written here: captum lacks it).

Both attribute the target logit, take the layer's output feature map (N, K, h, w), and upsample the
(h, w) map to the input size (``upsample``: bilinear by default). The layer defaults to
``model.default_layer()``: the module's ``explain_layer``, which every zoo model sets to the rectified output
of its last conv block (the ReLU module after the last conv and batch-norm, the feature maps A of
Selvaraju et al. and Chattopadhay et al.); a user model names its layer the same way (an ``explain_layer``
attribute, or the ``layer`` setting). Without one, the last Conv2d is read (its raw, unrectified output).
Grad-CAM maps are unsigned with ``relu = true`` (the default), Grad-CAM++ maps always.
"""

from __future__ import annotations

import numpy as np
import torch

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    LAYER_FIELD,
    LayerTap,
    as_numpy,
    as_tensor,
    backward_counted,
    batches,
    signed_maps,
)
from xbench.explainers.base import (
    upsample as resize_maps,
)
from xbench.explainers.registry import register_explainer
from xbench.schema import Field

CITE_GRADCAM = (
    "Selvaraju, Cogswell, Das, Vedantam, Parikh, Batra. Grad-CAM: visual explanations from deep "
    "networks via gradient-based localization. ICCV 2017."
)
CITE_GRADCAMPP = (
    "Chattopadhay, Sarkar, Howlader, Balasubramanian. Grad-CAM++: generalized gradient-based "
    "visual explanations for deep convolutional networks. WACV 2018."
)
UPSAMPLE = ("bilinear", "nearest")
UPSAMPLE_FIELD = Field("str", "bilinear", choices=UPSAMPLE, doc="how the layer map is resized to the tile")


@register_explainer(
    "grad-cam",
    citation=CITE_GRADCAM,
    needs={"gradients", "layer"},
    settings={
        "layer": LAYER_FIELD,
        "relu": Field("bool", True, doc="keep only positive evidence (Grad-CAM's ReLU)"),
        "upsample": UPSAMPLE_FIELD,
    },
    description="layer feature maps weighted by their spatially averaged gradients, ReLU, "
    "upsampled (captum LayerGradCam + LayerAttribution.interpolate)",
)
@signed_maps(lambda settings: not settings["relu"])
def grad_cam(model, images, targets, context, *, layer, relu, upsample):
    key = "grad-cam"
    mode = upsample
    module = model.get_layer(layer)
    from captum.attr import LayerAttribution, LayerGradCam

    method = LayerGradCam(model.module, module)
    h, w = images.shape[2:]
    out = np.empty((images.shape[0], h, w), dtype=np.float32)
    for sl in batches(images.shape[0], context.batch_size):
        x = as_tensor(images[sl])
        with backward_counted(model, x.shape[0]):
            attr = method.attribute(x, target=torch.from_numpy(targets[sl]), relu_attributions=bool(relu))
        if not isinstance(attr, torch.Tensor) or attr.ndim != 4:
            raise XbenchInputError(
                f"explainer '{key}': layer '{layer}'",
                "output is not a spatial feature map",
                expected="a 4-D conv output (N, K, h, w)",
                found=getattr(attr, "shape", type(attr).__name__),
            )
        up = attr if attr.shape[-2:] == (h, w) else LayerAttribution.interpolate(attr, (h, w), mode)
        out[sl] = as_numpy(up[:, 0])
    return out


@register_explainer(
    "grad-cam-pp",
    citation=CITE_GRADCAMPP,
    needs={"gradients", "layer"},
    settings={"layer": LAYER_FIELD, "upsample": UPSAMPLE_FIELD},
    description="Grad-CAM++: feature maps weighted by positive gradients with per-position "
    "weights from higher-order terms (exponential score), ReLU, upsampled",
)
@signed_maps(False)
def grad_cam_pp(model, images, targets, context, *, layer, upsample):
    """Grad-CAM++ (Chattopadhay et al. 2018, eqs. 19 and 9 with Y = exp(S)).

    With g = dS/dA for the target logit S at the layer's maps A (K, h, w):
    alpha_k(i,j) = g^2 / (2 g^2 + sum_ab A_k(a,b) g^3), w_k = sum_ij alpha_k(i,j) relu(g_k(i,j)),
    map = relu(sum_k w_k A_k). (The factor exp(S) of dY/dA is a positive scale per tile and is dropped.)
    """
    key = "grad-cam-pp"
    mode = upsample
    h, w = images.shape[2:]
    out = np.empty((images.shape[0], h, w), dtype=np.float32)
    with LayerTap(key, model, layer, mode="grad") as t:
        for sl in batches(images.shape[0], context.batch_size):
            x = as_tensor(images[sl])
            idx = torch.from_numpy(targets[sl])
            with torch.enable_grad(), backward_counted(model, x.shape[0]):
                logits = t.forward(x)
                score = logits.gather(1, idx[:, None]).sum()
                (g,) = torch.autograd.grad(score, t.recorded)
            a = t.recorded.detach().double()
            g = g.double()
            g2, g3 = g**2, g**3
            denom = 2.0 * g2 + a.sum(dim=(2, 3), keepdim=True) * g3
            denom = torch.where(denom != 0, denom, torch.ones_like(denom))
            alpha = g2 / denom
            weights = (alpha * torch.relu(g)).sum(dim=(2, 3), keepdim=True)
            cam = torch.relu((weights * a).sum(dim=1))
            out[sl] = resize_maps(cam.float(), (h, w), mode)
    return out
