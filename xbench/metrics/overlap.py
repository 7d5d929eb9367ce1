"""Overlap: how well an attribution map points at a truth mask (planted or model-verified).

Pure cores take ``attributions`` (N, H, W) and ``masks`` (N, H, W) bool and return float64 (N,), NaN where
the value is undefined; :func:`localization_reasons` says why. Conventions (every one a metric setting,
recorded with the result):

- **Void fringe** (``fringe``, ``core_threshold``): when the truth's coverage is known, a structure's
  *core* is its pixels with coverage >= ``core_threshold`` (default 0.5) and its *fringe* the pixels with
  0 < coverage < threshold (anti-aliased edges, often invisible to a model). By default (``fringe =
  "void"``) fringe pixels are left out, neither positive nor negative, as segmentation benchmarks leave a
  void band at object boundaries (Everingham et al., IJCV 2010); ``"positive"`` counts them as mask
  (coverage > 0, the former convention), ``"negative"`` as background. Without coverage the boolean
  mask is used as it is.
- **Signed maps** (``signed``): the positive part of the map is the evidence for the target (default
  ``"positive-part"``: negative values count as no evidence, as mass accuracy has always done, Arras et
  al. 2022); ``"magnitude"`` ranks |attribution| instead (a protocol variant). Unsigned maps are the same
  under both.
- **Coverage weights** (``weighting``, mask-auroc and mask-ap only): ``"coverage"`` scores every pixel
  as a positive with weight = coverage and as a negative with weight 1 - coverage
  (``sklearn.metrics.roc_auc_score`` / ``average_precision_score`` with ``sample_weight``).
- Ties are never broken arbitrarily: where the top-k set or the maximum is tied, the value is its
  expectation under random tie-breaking (a constant map scores the chance level, the mask's area share).
- Empty masks give NaN ("mask is empty"); AUROC also needs a background ("mask covers the whole tile").
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from scipy import ndimage
from scipy.stats import rankdata
from sklearn.metrics import average_precision_score, roc_auc_score

from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    register_metric,
    tile_result,
)
from xbench.schema import Field


def _flat(attributions: np.ndarray, masks: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = np.asarray(attributions, dtype=np.float64)
    m = np.asarray(masks, dtype=bool)
    return a.reshape(a.shape[0], -1), m.reshape(m.shape[0], -1)


def _finite_rows(a: np.ndarray) -> np.ndarray:
    return np.isfinite(a).all(axis=1)


# -- pure cores -----------------------------------------------------------------------------------------
def mass_accuracy(attributions: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Relevance mass accuracy (Arras et al. 2022): positive relevance inside the mask / all positive
    relevance. NaN for an empty mask, no positive relevance, or non-finite attributions."""
    a, m = _flat(attributions, masks)
    pos = np.clip(np.nan_to_num(a, nan=0.0, posinf=0.0, neginf=0.0), 0.0, None)
    total = pos.sum(axis=1)
    inside = (pos * m).sum(axis=1)
    ok = (total > 0) & m.any(axis=1) & _finite_rows(a)
    out = np.full(a.shape[0], np.nan)
    out[ok] = inside[ok] / total[ok]
    return np.clip(out, 0.0, 1.0)


def _expected_topk_hits(a: np.ndarray, m: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Expected number of mask pixels among the k highest values per row (ties split fractionally)."""
    n, p = a.shape
    k = np.clip(np.asarray(k, dtype=np.int64), 1, p)
    srt = -np.sort(-a, axis=1)
    thr = np.take_along_axis(srt, (k - 1)[:, None], axis=1)
    above = a > thr
    tied = a == thr
    slots = k - above.sum(axis=1)
    tied_n = tied.sum(axis=1)
    tied_in = (tied & m).sum(axis=1)
    return (above & m).sum(axis=1) + slots * tied_in / np.maximum(tied_n, 1)


def rank_accuracy(attributions: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Relevance rank accuracy (Arras et al. 2022): share of the K = |mask| highest-ranked pixels that lie
    in the mask (ties at the K-th value split fractionally). NaN for an empty mask."""
    a, m = _flat(attributions, masks)
    k = m.sum(axis=1)
    ok = (k > 0) & _finite_rows(a)
    out = np.full(a.shape[0], np.nan)
    if ok.any():
        out[ok] = _expected_topk_hits(a[ok], m[ok], k[ok]) / k[ok]
    return out


def topk_iou(attributions: np.ndarray, masks: np.ndarray, fraction: float = 0.1) -> np.ndarray:
    """IoU between the top ``fraction`` of pixels (k = max(1, round(fraction * H * W))) and the mask.
    Under ties at the k-th value the expected intersection is used. NaN for an empty mask."""
    a, m = _flat(attributions, masks)
    n, p = a.shape
    k = np.full(n, max(1, int(round(fraction * p))), dtype=np.int64)
    area = m.sum(axis=1)
    ok = (area > 0) & _finite_rows(a)
    out = np.full(n, np.nan)
    if ok.any():
        inter = _expected_topk_hits(a[ok], m[ok], k[ok])
        out[ok] = inter / (k[ok] + area[ok] - inter)
    return out


def pointing_game(attributions: np.ndarray, masks: np.ndarray, tolerance: float = 1.0) -> np.ndarray:
    """Pointing game (Zhang et al. 2016/2018): 1 when the attribution maximum lies within ``tolerance``
    pixels (Euclidean) of the mask, else 0; with several tied maxima, the share of them that hit.
    NaN for an empty mask."""
    a = np.asarray(attributions, dtype=np.float64)
    m = np.asarray(masks, dtype=bool)
    n = a.shape[0]
    out = np.full(n, np.nan)
    for i in range(n):
        if not m[i].any() or not np.isfinite(a[i]).all():
            continue
        hit = m[i] if tolerance <= 0 else ndimage.distance_transform_edt(~m[i]) <= tolerance
        peak = a[i] == a[i].max()
        out[i] = (peak & hit).sum() / peak.sum()
    return out


def mask_auroc(attributions: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Area under the ROC curve of the attribution as a score for mask pixels (equals
    ``sklearn.metrics.roc_auc_score(mask, attribution)`` per tile; Mann-Whitney with mid-ranks).
    NaN when the mask is empty or covers the whole tile."""
    a, m = _flat(attributions, masks)
    n, p = a.shape
    pos = m.sum(axis=1)
    neg = p - pos
    ok = (pos > 0) & (neg > 0) & _finite_rows(a)
    out = np.full(n, np.nan)
    if ok.any():
        r = rankdata(a[ok], axis=1)
        pk = pos[ok].astype(np.float64)
        out[ok] = ((r * m[ok]).sum(axis=1) - pk * (pk + 1) / 2) / (pk * neg[ok])
    return out


def mask_ap(attributions: np.ndarray, masks: np.ndarray) -> np.ndarray:
    """Average precision of the attribution as a score for mask pixels: sum over distinct thresholds of
    (R_n - R_(n-1)) P_n (equals ``sklearn.metrics.average_precision_score`` per tile).
    NaN for an empty mask."""
    a, m = _flat(attributions, masks)
    n, p = a.shape
    pos = m.sum(axis=1)
    ok = (pos > 0) & _finite_rows(a)
    out = np.full(n, np.nan)
    if not ok.any():
        return out
    a, m, pos = a[ok], m[ok], pos[ok]
    order = np.argsort(-a, axis=1, kind="stable")
    v = np.take_along_axis(a, order, axis=1)
    y = np.take_along_axis(m, order, axis=1)
    tps = np.cumsum(y, axis=1)
    is_last = np.ones_like(y)
    is_last[:, :-1] = v[:, :-1] != v[:, 1:]
    idx = np.where(is_last, np.arange(p)[None, :], p)
    group_end = np.minimum.accumulate(idx[:, ::-1], axis=1)[:, ::-1]
    precision_at_end = np.take_along_axis(tps, group_end, axis=1) / (group_end + 1.0)
    out[ok] = (precision_at_end * y).sum(axis=1) / pos
    return out


FRINGE_POLICIES = ("void", "positive", "negative")
SIGNED_CONVENTIONS = ("positive-part", "magnitude")
WEIGHTINGS = ("none", "coverage")


def truth_regions(
    mask: np.ndarray, coverage: np.ndarray | None, fringe: str = "void", core_threshold: float = 0.5
) -> tuple[np.ndarray, np.ndarray | None]:
    """The positive pixels and the scored pixels (None = all) of a truth under a fringe policy.

    core = coverage >= core_threshold; fringe = 0 < coverage < core_threshold. ``void``: positives = core,
    fringe not scored (Everingham et al. 2010); ``positive``: positives = coverage > 0; ``negative``:
    positives = core, fringe scored as background. Without coverage: (mask, None)."""
    mask = np.asarray(mask, dtype=bool)
    if coverage is None:
        return mask, None
    cov = np.asarray(coverage, dtype=np.float64)
    core = cov >= core_threshold
    if fringe == "positive":
        return cov > 0, None
    if fringe == "negative":
        return core, None
    return core, ~((cov > 0) & ~core)


def signed_map(attributions: np.ndarray, signed: str = "positive-part") -> np.ndarray:
    """The map as evidence for the target: its positive part (default) or its magnitude."""
    a = np.asarray(attributions, dtype=np.float64)
    return np.abs(a) if signed == "magnitude" else np.maximum(a, 0.0)


def scored_pixels(
    core: Callable[..., np.ndarray], attributions: np.ndarray, masks: np.ndarray, valid: np.ndarray | None, **kw: Any
) -> np.ndarray:
    """Apply a pure core to the scored pixels only (``valid`` (N, H, W) bool; None = all pixels): each tile's
    valid pixels become one row, so void pixels are neither positive nor negative."""
    if valid is None:
        return core(attributions, masks, **kw)
    a, m = _flat(attributions, masks)
    v = np.asarray(valid, dtype=bool).reshape(a.shape[0], -1)
    out = np.full(a.shape[0], np.nan)
    for i in range(a.shape[0]):
        if v[i].any():
            out[i] = core(a[i][v[i]][None, :], m[i][v[i]][None, :], **kw)[0]
    return out


def _weighted(score_fn: Callable[..., float], attributions: np.ndarray, coverage: np.ndarray) -> np.ndarray:
    a = np.asarray(attributions, dtype=np.float64).reshape(len(attributions), -1)
    c = np.clip(np.asarray(coverage, dtype=np.float64).reshape(len(a), -1), 0.0, 1.0)
    out = np.full(a.shape[0], np.nan)
    for i in range(a.shape[0]):
        pos, neg = c[i].sum(), (1.0 - c[i]).sum()
        if not np.isfinite(a[i]).all() or pos <= 0 or (score_fn is roc_auc_score and neg <= 0):
            continue
        y = np.r_[np.ones(a.shape[1]), np.zeros(a.shape[1])]
        out[i] = score_fn(y, np.r_[a[i], a[i]], sample_weight=np.r_[c[i], 1.0 - c[i]])
    return out


def mask_auroc_weighted(attributions: np.ndarray, coverage: np.ndarray) -> np.ndarray:
    """Coverage-weighted ROC AUC: each pixel is a positive with weight = coverage and a negative with
    weight 1 - coverage (``sklearn.metrics.roc_auc_score`` with ``sample_weight``). NaN without positive
    or negative weight."""
    return _weighted(roc_auc_score, attributions, coverage)


def mask_ap_weighted(attributions: np.ndarray, coverage: np.ndarray) -> np.ndarray:
    """Coverage-weighted average precision (``sklearn.metrics.average_precision_score`` with
    ``sample_weight``, the same soft labels as :func:`mask_auroc_weighted`). NaN without positive weight."""
    return _weighted(average_precision_score, attributions, coverage)


def pointing_game_scored(
    attributions: np.ndarray, masks: np.ndarray, valid: np.ndarray | None, tolerance: float = 1.0
) -> np.ndarray:
    """Pointing game whose maximum is taken over the scored pixels only (void pixels can neither hit nor
    miss)."""
    if valid is None:
        return pointing_game(attributions, masks, tolerance)
    a = np.where(np.asarray(valid, dtype=bool), np.asarray(attributions, dtype=np.float64), -np.inf)
    m = np.asarray(masks, dtype=bool)
    out = np.full(a.shape[0], np.nan)
    for i in range(a.shape[0]):
        if not m[i].any() or not np.isfinite(attributions[i]).all() or not np.isfinite(a[i]).any():
            continue
        hit = m[i] if tolerance <= 0 else ndimage.distance_transform_edt(~m[i]) <= tolerance
        peak = a[i] == a[i].max()
        out[i] = (peak & hit).sum() / peak.sum()
    return out


def localization_reasons(
    attributions: np.ndarray,
    masks: np.ndarray,
    values: np.ndarray,
    *,
    need_background: bool = False,
    positive_mass: bool = False,
    fringe_only: np.ndarray | None = None,
) -> dict[int, str]:
    """Why each NaN value is undefined (``fringe_only``: tiles whose truth has fringe pixels but no core)."""
    a, m = _flat(attributions, masks)
    reasons: dict[int, str] = {}
    for i in np.flatnonzero(~np.isfinite(values)):
        if not np.isfinite(a[i]).all():
            reasons[int(i)] = NONFINITE_REASON
        elif not m[i].any() and fringe_only is not None and fringe_only[i]:
            reasons[int(i)] = "mask has no core: every pixel of the truth is covered below core_threshold (fringe)"
        elif not m[i].any():
            reasons[int(i)] = "mask is empty: the tile holds no evidence of this truth kind"
        elif need_background and m[i].all():
            reasons[int(i)] = "mask covers the whole tile: no background to rank against"
        elif positive_mass and not (a[i] > 0).any():
            reasons[int(i)] = "no positive attribution: relevance mass undefined"
        else:
            reasons[int(i)] = "undefined"
    return reasons


# -- registration ---------------------------------------------------------------------------------------
COMMON_DEFAULTS = {"fringe": "void", "core_threshold": 0.5, "signed": "positive-part"}
COMMON_DOC = {
    "fringe": "fringe pixels (0 < coverage < core_threshold): void (left out), positive or negative",
    "core_threshold": "coverage at or above which a pixel is the structure's core",
    "signed": "signed maps as evidence: positive-part (negative = no evidence) or magnitude",
}
COMMON_FIELDS = {
    "fringe": Field("str", "void", choices=FRINGE_POLICIES, doc=COMMON_DOC["fringe"]),
    "core_threshold": Field("number", 0.5, low=0.0, high=1.0, low_open=True, doc=COMMON_DOC["core_threshold"]),
    "signed": Field("str", "positive-part", choices=SIGNED_CONVENTIONS, doc=COMMON_DOC["signed"]),
}
WEIGHT_DEFAULTS = {"weighting": "none"}
WEIGHT_DOC = {"weighting": "none, or coverage (pixels weighted by coverage as positive, 1 - coverage as negative)"}
WEIGHT_FIELDS = {"weighting": Field("str", "none", choices=WEIGHTINGS, doc=WEIGHT_DOC["weighting"])}


def _run(
    key: str, core: Callable[..., np.ndarray], inputs: MetricInputs, truth: str, settings: dict[str, Any], **flags: bool
) -> MetricResult:
    extra = {k: v for k, v in settings.items() if k not in COMMON_DEFAULTS and k not in WEIGHT_DEFAULTS}
    mask = np.asarray(inputs.truth_mask(truth), dtype=bool)
    coverage = inputs.truth_coverage(truth)
    a = signed_map(inputs.attributions, settings["signed"])
    a = np.where(np.isfinite(np.asarray(inputs.attributions, dtype=np.float64)), a, np.nan)
    if settings.get("weighting", "none") == "coverage":
        if coverage is None:
            cov = mask.astype(np.float64)
        else:
            cov = np.asarray(coverage, dtype=np.float64)
        weighted = mask_auroc_weighted if core is mask_auroc else mask_ap_weighted
        values = weighted(a, cov)
        positives = cov > 0
        fringe_only = None
    else:
        positives, valid = truth_regions(mask, coverage, settings["fringe"], float(settings["core_threshold"]))
        if core is pointing_game:
            values = pointing_game_scored(a, positives, valid, **extra)
        else:
            values = scored_pixels(core, a, positives, valid, **extra)
        # np.asarray (no copy): numpy's stubs type a reduction with an axis as "scalar or array"
        fringe_only = None if coverage is None else np.asarray(~positives.any(axis=(1, 2)) & mask.any(axis=(1, 2)))
    reasons = localization_reasons(inputs.attributions, positives, values, fringe_only=fringe_only, **flags)
    return tile_result(key, truth, values, reasons, settings)


_LOC: dict[str, Any] = dict(family="overlap", needs=("truth mask",), per_tile=True, truths=("planted", "verified"))


def _fields(own: dict[str, Field] | None = None, weights: bool = False) -> dict[str, Field]:
    """The declared settings of an overlap metric: its own, the common ones, the weighting."""
    return {**(own or {}), **COMMON_FIELDS, **(WEIGHT_FIELDS if weights else {})}


def _docs(own: dict[str, str] | None = None, weights: bool = False) -> dict[str, str]:
    return {**(own or {}), **COMMON_DOC, **(WEIGHT_DOC if weights else {})}


_ARRAS = (
    "Arras, Osman, Samek. CLEVR-XAI: A benchmark dataset for the ground truth evaluation of neural network "
    "explanations. Information Fusion 81, 2022."
)


@register_metric(
    "mass-accuracy",
    definition="share of the positive attribution mass that falls inside the mask",
    citation=_ARRAS,
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields(),
    settings_doc=_docs(),
    **_LOC,
)
def _mass_accuracy(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("mass-accuracy", mass_accuracy, inputs, truth, settings, positive_mass=True)


@register_metric(
    "rank-accuracy",
    definition="share of the K highest-attributed pixels inside the mask, K = mask size",
    citation=_ARRAS,
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields(),
    settings_doc=_docs(),
    **_LOC,
)
def _rank_accuracy(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("rank-accuracy", rank_accuracy, inputs, truth, settings)


@register_metric(
    "pointing-game",
    definition="1 if the attribution maximum lies within `tolerance` pixels of the mask, else 0",
    citation="Zhang, Bargal, Lin, Brandt, Shen, Sclaroff. Top-down neural attention by "
    "excitation backprop. ECCV 2016 / IJCV 2018.",
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields({"tolerance": Field("number", 1.0, low=0.0, high=1e6, doc="hit radius in pixels")}),
    settings_doc=_docs({"tolerance": "hit radius in pixels around the mask (Euclidean; 0 = inside)"}),
    **_LOC,
)
def _pointing_game(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("pointing-game", pointing_game, inputs, truth, settings)


@register_metric(
    "mask-auroc",
    definition="ROC AUC of the attribution as a per-pixel score for the mask",
    citation="Common practice (ROC AUC as in sklearn.metrics.roc_auc_score).",
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields(weights=True),
    settings_doc=_docs(weights=True),
    **_LOC,
)
def _mask_auroc(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("mask-auroc", mask_auroc, inputs, truth, settings, need_background=True)


@register_metric(
    "mask-ap",
    definition="average precision of the attribution as a per-pixel score for the mask",
    citation="Common practice (average precision as in sklearn.metrics.average_precision_score).",
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields(weights=True),
    settings_doc=_docs(weights=True),
    **_LOC,
)
def _mask_ap(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("mask-ap", mask_ap, inputs, truth, settings)


@register_metric(
    "topk-iou",
    definition="IoU between the top `fraction` of pixels by attribution and the mask",
    citation="Common practice (thresholded saliency vs. mask intersection over union).",
    value_range=(0, 1),
    higher_is_better=True,
    settings=_fields({"fraction": Field("number", 0.1, low=0.0, high=1.0, low_open=True, doc="top share")}),
    settings_doc=_docs({"fraction": "share of the tile's pixels kept as the top-k set (of the scored pixels)"}),
    **_LOC,
)
def _topk_iou(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _run("topk-iou", topk_iou, inputs, truth, settings)
