"""Control "explainers" that run through every metric exactly like real ones.

- ``random``: seeded uniform noise; a floor that any real explainer should beat.
- ``edges``: Sobel gradient magnitude of the image (scikit-image), model-independent; shows how much a
  metric rewards image structure rather than model evidence (Adebayo et al. 2018 compare explainers with
  an edge detector).
- ``oracle``: the planted mask of the target class's driving structure types; an upper bound for
  localization metrics (not necessarily for faithfulness: the model may not use every planted pixel).
  When the context carries the model's measured reliance (``context.reliance``, ``context.relied_types``),
  the oracle also reports it as its concept evidence (importance = the interventional importance per type,
  flagged = the relied-on types), so that it is the top anchor of the concept metrics too (recovery below 1
  only where an unused type's mean drop exceeds a relied-on type's without being significant): the planted mask
  says what the labels are made of, which is not what a model relies on when it uses a look-alike or ignores
  a driving type.

None of them calls the model, so all work with black boxes and cost zero model calls.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.filters import sobel

from xbench.errors import XbenchInputError
from xbench.explainers.base import ConceptReport, signed_maps
from xbench.explainers.registry import register_explainer
from xbench.schema import Field

CITE_RANDOM = "Control (common practice): uniform noise from a seeded generator."
CITE_EDGES = (
    "Control: Sobel edge magnitude; edge detectors as a baseline for saliency maps: Adebayo, "
    "Gilmer, Muelly, Goodfellow, Hardt, Kim. Sanity checks for saliency maps. NeurIPS 2018."
)
CITE_ORACLE = "Control: the planted structure masks of the synthetic scenes (ground truth by construction)."


@register_explainer(
    "random",
    citation=CITE_RANDOM,
    needs=set(),
    kind="control",
    settings={"distribution": Field("str", "uniform", choices=("uniform", "normal"), doc="of the random values")},
    description="seeded noise, independent of model and image (uniform [0, 1) or standard normal)",
)
@signed_maps(lambda settings: settings["distribution"] == "normal")
def random_map(model, images, targets, context, *, distribution):
    rng = context.rng(stream=7)
    n, _, h, w = images.shape
    if distribution == "uniform":
        return rng.random((n, h, w), dtype=np.float32)
    return rng.standard_normal((n, h, w), dtype=np.float32)


@register_explainer(
    "edges",
    citation=CITE_EDGES,
    needs=set(),
    kind="control",
    settings={
        "sigma": Field("number", 0.0, low=0.0, doc="Gaussian smoothing before the Sobel filter, in pixels"),
        "combine": Field("str", "mean", choices=("mean", "max"), doc="how the bands' edge magnitudes combine"),
    },
    description="Sobel gradient magnitude of each band (optionally Gaussian-smoothed "
    "first), combined over bands by mean or max; ignores the model",
)
@signed_maps(False)
def edges(model, images, targets, context, *, sigma, combine):
    x = images.astype(np.float64)
    if sigma > 0:
        x = ndimage.gaussian_filter(x, sigma=(0, 0, sigma, sigma), mode="reflect")
    n, c, h, w = x.shape
    mags = np.stack([sobel(x[i, b]) for i in range(n) for b in range(c)]).reshape(n, c, h, w)
    out = mags.mean(axis=1) if combine == "mean" else mags.max(axis=1)
    return out.astype(np.float32)


@register_explainer(
    "oracle",
    citation=CITE_ORACLE,
    needs={"masks"},
    kind="control",
    defaults={},
    description="1 on the planted pixels of the target class's driving structure types "
    "(context.driving_types), 0 elsewhere; needs the planted masks; reports the measured reliance per type as "
    "its concept evidence",
)
@signed_maps(False)
def oracle(model, images, targets, context):
    names = list(context.mask_names)
    if context.driving_types is None:
        raise XbenchInputError(
            "explainer 'oracle': context.driving_types",
            "the oracle needs each class's driving structure types",
            expected="dict class index -> types",
        )
    driving = {int(k): list(v) for k, v in context.driving_types.items()}
    unknown = sorted({t for ts in driving.values() for t in ts} - set(names))
    if unknown:
        raise XbenchInputError(
            "explainer 'oracle': context.driving_types",
            "unknown structure types",
            expected="names from mask_names: " + ", ".join(names),
            found=unknown,
        )
    masks = np.asarray(context.masks, dtype=bool)
    n, _, h, w = images.shape
    out = np.zeros((n, h, w), dtype=np.float32)
    for i in range(n):
        planes = [names.index(t) for t in driving.get(int(targets[i]), [])]
        if planes:
            out[i] = masks[i, planes].any(axis=0)
    if context.reliance is None:
        return out
    relied = set(context.relied_types or [])
    importance = {str(t): float(v) for t, v in context.reliance.items()}
    return out, ConceptReport(type_importance=importance, flagged={t: t in relied for t in importance})
