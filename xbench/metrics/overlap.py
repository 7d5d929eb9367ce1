"""Localization: how well an attribution map points at a truth mask (planted or model-verified).

Pure cores take ``attributions`` (N, H, W) and ``masks`` (N, H, W) bool and return float64 (N,), NaN where
the value is undefined; :func:`localization_reasons` says why. Conventions:

- Signed attributions are ranked as they are (larger = more evidence); mass accuracy uses only the
  positive part, as Arras et al. (2022) do.
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

from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    check_number,
    register_metric,
    tile_result,
)


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


def localization_reasons(
    attributions: np.ndarray,
    masks: np.ndarray,
    values: np.ndarray,
    *,
    need_background: bool = False,
    positive_mass: bool = False,
) -> dict[int, str]:
    """Why each NaN value is undefined."""
    a, m = _flat(attributions, masks)
    reasons: dict[int, str] = {}
    for i in np.flatnonzero(~np.isfinite(values)):
        if not np.isfinite(a[i]).all():
            reasons[int(i)] = NONFINITE_REASON
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
def _run(
    key: str, core: Callable[..., np.ndarray], inputs: MetricInputs, truth: str, settings: dict[str, Any], **flags: bool
) -> MetricResult:
    mask = np.asarray(inputs.truth_mask(truth), dtype=bool)
    values = core(inputs.attributions, mask, **settings)
    return tile_result(key, truth, values, localization_reasons(inputs.attributions, mask, values, **flags), settings)


_LOC = dict(family="overlap", needs=("truth mask",), per_tile=True, truths=("planted", "verified"))
_ARRAS = "Arras, Osman, Samek. Ground-truth evaluation of neural network explanations. Information Fusion 81, 2022."


@register_metric(
    "mass-accuracy",
    definition="share of the positive attribution mass that falls inside the mask",
    citation=_ARRAS,
    value_range=(0, 1),
    higher_is_better=True,
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
    defaults={"tolerance": 1.0},
    settings_doc={"tolerance": "hit radius in pixels around the mask (Euclidean; 0 = inside)"},
    **_LOC,
)
def _pointing_game(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    check_number("pointing-game", "tolerance", settings["tolerance"], 0, 1e6)
    return _run("pointing-game", pointing_game, inputs, truth, settings)


@register_metric(
    "mask-auroc",
    definition="ROC AUC of the attribution as a per-pixel score for the mask",
    citation="Common practice (ROC AUC as in sklearn.metrics.roc_auc_score).",
    value_range=(0, 1),
    higher_is_better=True,
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
    defaults={"fraction": 0.1},
    settings_doc={"fraction": "share of the tile's pixels kept as the top-k set"},
    **_LOC,
)
def _topk_iou(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    check_number("topk-iou", "fraction", settings["fraction"], 1e-9, 1)
    return _run("topk-iou", topk_iou, inputs, truth, settings)
