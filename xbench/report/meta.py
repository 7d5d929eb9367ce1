"""What the report knows about metrics and explainers: direction, range, family, citation, description.

The registries (``xbench.metrics``, ``xbench.explainers``) are the source; they are imported lazily. A key
they do not know (or a registry that cannot be imported) falls back to the table below, built from
DESIGN.md's names and REFERENCES.md, and the report logs that it did.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache
from typing import Any

FAMILY_ORDER = [
    "overlap",
    "response",
    "model-dependence",
    "steadiness",
    "spread",
    "concepts",
    "concept",
    "cost",
    "other",
]


@dataclass(frozen=True)
class MetricInfo:
    key: str
    family: str
    higher_is_better: bool | None
    value_range: tuple[float, float] | None
    definition: str
    citation: str
    source: str  # "registry" or "fallback"


@dataclass(frozen=True)
class ExplainerInfo:
    key: str
    citation: str
    description: str
    source: str


# key: (family, higher_is_better, range, short definition, citation)
_METRICS: dict[str, tuple[str, bool | None, tuple[float, float] | None, str, str]] = {
    "mass-accuracy": (
        "overlap",
        True,
        (0, 1),
        "share of positive attribution mass inside the mask",
        "Arras, Osman, Samek 2022",
    ),
    "rank-accuracy": (
        "overlap",
        True,
        (0, 1),
        "share of the K highest-attributed pixels inside the mask (K = mask size)",
        "Arras, Osman, Samek 2022",
    ),
    "pointing-game": (
        "overlap",
        True,
        (0, 1),
        "whether the maximum of the map falls inside the mask",
        "Zhang, Bargal, Lin, Brandt, Shen, Sclaroff 2018",
    ),
    "mask-auroc": (
        "overlap",
        True,
        (0, 1),
        "area under the ROC curve of the map as a mask detector",
        "",
    ),
    "mask-ap": ("overlap", True, (0, 1), "average precision of the map as a mask detector", ""),
    "topk-iou": (
        "overlap",
        True,
        (0, 1),
        "intersection over union of the top-k pixels and the mask",
        "",
    ),
    "deletion-auc": (
        "response",
        False,
        (0, 1),
        "area under the target score as the most relevant pixels are removed",
        "Petsiuk, Das, Saenko 2018",
    ),
    "insertion-auc": (
        "response",
        True,
        (0, 1),
        "area under the target score as the most relevant pixels are inserted",
        "Petsiuk, Das, Saenko 2018",
    ),
    "aopc-morf": (
        "response",
        True,
        None,
        "area over the perturbation curve, most relevant first",
        "Samek, Binder, Montavon, Lapuschkin, Mueller 2017",
    ),
    "aopc-lerf": (
        "response",
        False,
        None,
        "area over the perturbation curve, least relevant first",
        "Samek, Binder, Montavon, Lapuschkin, Mueller 2017",
    ),
    "subset-drop-corr": (
        "response",
        True,
        (-1, 1),
        "correlation of attribution sums and score drops over random pixel subsets",
        "Bhatt, Weller, Moura 2020",
    ),
    "randomization-spearman": (
        "model-dependence",
        False,
        (-1, 1),
        "Spearman correlation between maps of the trained and randomized model",
        "Adebayo, Gilmer, Muelly, Goodfellow, Hardt, Kim 2018",
    ),
    "randomization-ssim": (
        "model-dependence",
        False,
        (-1, 1),
        "SSIM between maps of the trained and randomized model",
        "Adebayo, Gilmer, Muelly, Goodfellow, Hardt, Kim 2018; Wang, Bovik, Sheikh, Simoncelli 2004",
    ),
    "max-sensitivity": (
        "steadiness",
        False,
        None,
        "largest change of the map under small input perturbations",
        "Yeh, Hsieh, Suggala, Inouye, Ravikumar 2019",
    ),
    "infidelity": (
        "steadiness",
        False,
        None,
        "expected squared error between attribution-predicted and actual score changes",
        "Yeh, Hsieh, Suggala, Inouye, Ravikumar 2019",
    ),
    "gini": (
        "spread",
        True,
        (0, 1),
        "Gini index of the absolute attributions",
        "Chalasani, Chen, Chowdhury, Wu, Jha 2020",
    ),
    "entropy": ("spread", False, None, "entropy of the normalised absolute attributions", ""),
    "concept-recovery": (
        "concepts",
        True,
        (0, 1),
        "AUROC of importance per type for relied-on vs unused types (chance 0.5)",
        "",
    ),
    "concept-detection": (
        "concepts",
        True,
        (0, 1),
        "share of relied-on structure types recovered as concepts",
        "",
    ),
    "concept-false-alarm": (
        "concepts",
        False,
        (0, 1),
        "share of unused types (look-alikes not relied on included) flagged",
        "",
    ),
    "model-calls": ("cost", False, None, "model forward and backward passes per tile", ""),
    "seconds": ("cost", False, None, "explainer wall time per tile (s)", ""),
}

_EXPLAINERS: dict[str, tuple[str, str]] = {
    "gradient": ("Simonyan, Vedaldi, Zisserman 2014", "gradient saliency"),
    "input-x-gradient": ("Shrikumar, Greenside, Shcherbina, Kundaje 2016", "input times gradient"),
    "integrated-gradients": ("Sundararajan, Taly, Yan 2017", "integrated gradients"),
    "smoothgrad": ("Smilkov, Thorat, Kim, Viegas, Wattenberg 2017", "SmoothGrad"),
    "guided-backprop": ("Springenberg, Dosovitskiy, Brox, Riedmiller 2015", "guided backpropagation"),
    "deeplift": ("Shrikumar, Greenside, Kundaje 2017", "DeepLIFT"),
    "cam": ("Zhou, Khosla, Lapedriza, Oliva, Torralba 2016", "class activation mapping"),
    "grad-cam": ("Selvaraju, Cogswell, Das, Vedantam, Parikh, Batra 2017", "Grad-CAM"),
    "grad-cam-pp": ("Chattopadhay, Sarkar, Howlader, Balasubramanian 2018", "Grad-CAM++"),
    "occlusion": ("Zeiler, Fergus 2014", "occlusion"),
    "rise": ("Petsiuk, Das, Saenko 2018", "RISE"),
    "lime": ("Ribeiro, Singh, Guestrin 2016", "LIME"),
    "kernel-shap": ("Lundberg, Lee 2017", "KernelSHAP"),
    "activation-clusters": (
        "Ghorbani, Wexler, Zou, Kim 2019; Dempster, Laird, Rubin 1977",
        "Gaussian-mixture clusters of a layer's activations, occluded one at a time",
    ),
    "tcav": ("Kim, Wattenberg, Gilmer, Cai, Wexler, Viegas, Sayres 2018", "TCAV"),
    "random": ("", "control: random map"),
    "edges": ("", "control: Sobel edge magnitude (model-independent)"),
    "oracle": ("", "control: the planted mask (an upper bound)"),
}


def _registry_metric(key: str) -> Any | None:
    try:
        from xbench.metrics import get_metric  # lazy: an earlier stage, may be absent in a partial install
    except Exception:
        return None
    try:
        return get_metric(key)
    except Exception:
        return None


def _registry_explainer(key: str) -> Any | None:
    try:
        from xbench.explainers import get_explainer
    except Exception:
        return None
    try:
        return get_explainer(key)
    except Exception:
        return None


def _range(value: Any) -> tuple[float, float] | None:
    try:
        lo, hi = value
        return float(lo), float(hi)
    except (TypeError, ValueError):
        return None


@cache
def metric_info(key: str) -> MetricInfo:
    spec = _registry_metric(key)
    fb = _METRICS.get(key)
    if spec is not None:
        hib = getattr(spec, "higher_is_better", None)
        return MetricInfo(
            key=key,
            family=str(getattr(spec, "family", None) or (fb[0] if fb else "other")),
            higher_is_better=None if hib is None else bool(hib),
            value_range=_range(getattr(spec, "value_range", None)),
            definition=str(getattr(spec, "definition", "") or (fb[3] if fb else "")),
            citation=str(getattr(spec, "citation", "") or (fb[4] if fb else "")),
            source="registry",
        )
    if fb is not None:
        return MetricInfo(key, fb[0], fb[1], fb[2], fb[3], fb[4], "fallback")
    return MetricInfo(key, "other", None, None, "", "", "unknown")


@cache
def explainer_info(key: str) -> ExplainerInfo:
    spec = _registry_explainer(key)
    fb = _EXPLAINERS.get(key, ("", key))
    if spec is not None:
        return ExplainerInfo(
            key,
            str(getattr(spec, "citation", "") or fb[0]),
            str(getattr(spec, "description", "") or fb[1]),
            "registry",
        )
    return ExplainerInfo(key, fb[0], fb[1], "fallback" if key in _EXPLAINERS else "unknown")


def family_rank(family: str) -> int:
    return FAMILY_ORDER.index(family) if family in FAMILY_ORDER else len(FAMILY_ORDER)
