"""Concept recovery: does a method's importance per structure type match what the model really used?

The reference is the truth module's interventional importance per structure type (``type_importance``:
the mean drop of the target score when that type's instances are removed; signed, 0 = no effect) and
the type roles (relied-on types, look-alikes, unused types).

A method's importance per type:
- **concept methods** (``concept_report`` given): their ``concept_report.type_importance`` (signed,
  0 = no effect) and ``concept_report.flagged``. The explainers fill these: ``activation-clusters`` with
  the score sensitivity of the cluster matched to each type, ``tcav`` with its score per type centred
  on 0.5 (score - 0.5) and ``flagged`` = significant against random concepts;
- **pixel methods**: from ``type_masks``, over the tiles where the type is present,
  importance = mean of (attribution summed inside the type's mask) / (sum of |attribution|) (the signed
  mass share, in [-1, 1]); a type is *flagged* when its mean positive-mass share exceeds
  ``factor`` (default 2) times its mean area share, i.e. the method concentrates on it beyond chance.

Metrics (one value each, not per tile):
- ``concept-agreement``: Spearman correlation across types (``measure = "spearman"``, default; needs at
  least ``min_types`` types) or the share of types whose signs agree (``measure = "sign"``; values with
  |v| <= ``tolerance`` count as 0).
- ``concept-detection``: share of the relied-on types that the method flags.
- ``concept-false-alarm``: share of the look-alike and unused types that the method flags.
Types a method cannot assess (absent from every tile for pixel methods, missing from the concept report)
are left out of the shares; when none is left the value is NaN with a reason.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from xbench.metrics.base import (
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    check_choice,
    check_number,
    register_metric,
)
from xbench.metrics.model_dependence import spearman_rows


# -- pure cores -------------------------------------------------------------------------------------------
def pixel_type_shares(attributions: np.ndarray, type_masks: np.ndarray) -> dict[str, np.ndarray]:
    """Per type k (K,), averaged over the tiles where k is present (NaN when it is nowhere):
    ``signed`` = sum_{mask_k} a / sum |a|; ``positive`` = sum_{mask_k} a+ / sum a+;
    ``area`` = |mask_k| / pixels. Tiles with zero or non-finite attribution are left out."""
    a = np.asarray(attributions, dtype=np.float64)
    n = a.shape[0]
    a = a.reshape(n, -1)
    m = np.asarray(type_masks, dtype=bool).reshape(n, type_masks.shape[1], -1)
    abs_total = np.abs(a).sum(axis=1)
    pos = np.clip(a, 0, None)
    pos_total = pos.sum(axis=1)
    usable = np.isfinite(a).all(axis=1) & (abs_total > 0) & np.isfinite(abs_total)
    a = np.where(usable[:, None], a, 0.0)
    pos = np.where(usable[:, None], pos, 0.0)
    signed = np.einsum("nkp,np->nk", m, a) / np.where(usable, abs_total, 1.0)[:, None]
    positive = np.einsum("nkp,np->nk", m, pos) / np.where(pos_total > 0, pos_total, 1.0)[:, None]
    area = m.mean(axis=2)
    present = m.any(axis=2) & usable[:, None]
    count = present.sum(axis=0)

    def avg(x: np.ndarray) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(count > 0, (x * present).sum(axis=0) / count, np.nan)

    return {"signed": avg(signed), "positive": avg(positive), "area": avg(area), "tiles": count}


def pixel_flags(shares: dict[str, np.ndarray], factor: float) -> np.ndarray:
    """Flag (K,) bool: mean positive-mass share > factor x mean area share (False where not assessable)."""
    with np.errstate(invalid="ignore"):
        return np.nan_to_num(shares["positive"]) > factor * np.nan_to_num(shares["area"], nan=np.inf)


def sign_agreement(a: np.ndarray, b: np.ndarray, tolerance: float = 0.0) -> float:
    """Share of entries whose signs agree, values with |v| <= tolerance counting as 0."""
    sa = np.where(np.abs(a) <= tolerance, 0, np.sign(a))
    sb = np.where(np.abs(b) <= tolerance, 0, np.sign(b))
    return float((sa == sb).mean())


# -- method importance and flags ----------------------------------------------------------------------------
def _method_view(inputs: MetricInputs, factor: float) -> tuple[dict[str, float], dict[str, bool], str] | str:
    """(importance per type, flag per type, kind) or a reason why the method cannot be assessed."""
    report = inputs.concept_report
    if report is not None and getattr(report, "type_importance", None) is not None:
        imp = {str(k): float(v) for k, v in report.type_importance.items()}
        flagged = {str(k): bool(v) for k, v in (getattr(report, "flagged", None) or {}).items()}
        return imp, flagged, "concept"
    if inputs.type_masks is None or inputs.mask_names is None:
        return "needs a concept report (concept methods) or type masks (pixel methods)"
    names = list(inputs.mask_names)
    shares = pixel_type_shares(inputs.attributions, np.asarray(inputs.type_masks))
    flags = pixel_flags(shares, factor)
    assessable = shares["tiles"] > 0
    imp = {t: float(shares["signed"][k]) for k, t in enumerate(names) if assessable[k]}
    flagged = {t: bool(flags[k]) for k, t in enumerate(names) if assessable[k]}
    return imp, flagged, "pixel"


def _one(key: str, truth: str, value: float, reason: str | None, settings: dict[str, Any]) -> MetricResult:
    reasons = {} if reason is None else {-1: reason}
    return MetricResult(
        metric=key,
        truth=truth,
        values=np.array([value], dtype=np.float64),
        per_tile=False,
        reasons=reasons,
        settings=dict(settings),
    )


def _unusable_reason(inputs: MetricInputs) -> str | None:
    if inputs.concept_report is None and bad_attribution_tiles(inputs.attributions).all():
        return "attribution has non-finite values on every tile"
    return None


_CONCEPT = dict(family="concepts", per_tile=False)
_FLAG_DOC = {"factor": "pixel methods flag a type when its mass share exceeds this multiple of its area share"}


@register_metric(
    "concept-agreement",
    definition="Spearman correlation (or sign agreement) across structure types between the method's "
    "importance per type and the interventional importance",
    citation="Interventional importance vs. method importance per type (concept scores after Kim et al., "
    "ICML 2018; Ghorbani et al., NeurIPS 2019); rank agreement: common practice.",
    value_range=(-1, 1),
    higher_is_better=True,
    needs=("concepts", "interventional importance"),
    defaults={"measure": "spearman", "tolerance": 0.0, "min_types": 3},
    settings_doc={
        "measure": "spearman (rank correlation) or sign (share of types whose signs agree)",
        "tolerance": "for sign: values with |v| <= tolerance count as 0",
        "min_types": "fewest types with both importances for a Spearman value",
    },
    **_CONCEPT,
)
def _concept_agreement(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "concept-agreement"
    check_choice(key, "measure", settings["measure"], ("spearman", "sign"))
    check_number(key, "tolerance", settings["tolerance"], 0, np.inf)
    check_number(key, "min_types", settings["min_types"], 2, 10_000, integer=True)
    if inputs.type_importance is None:
        return _one(key, truth, np.nan, "needs the interventional importance per type (truth module)", settings)
    if (reason := _unusable_reason(inputs)) is not None:
        return _one(key, truth, np.nan, reason, settings)
    view = _method_view(inputs, 2.0)
    if isinstance(view, str):
        return _one(key, truth, np.nan, view, settings)
    method, _, kind = view
    types = [
        t
        for t in inputs.type_importance
        if t in method and np.isfinite(method[t]) and np.isfinite(inputs.type_importance[t])
    ]
    x = np.array([method[t] for t in types])
    y = np.array([float(inputs.type_importance[t]) for t in types])
    if settings["measure"] == "sign":
        if not types:
            return _one(key, truth, np.nan, "no structure type has both importances", settings)
        return _one(key, truth, sign_agreement(x, y, float(settings["tolerance"])), None, settings)
    if len(types) < int(settings["min_types"]):
        return _one(
            key,
            truth,
            np.nan,
            f"only {len(types)} structure type(s) with both importances "
            f"(need {settings['min_types']}) for a rank correlation",
            settings,
        )
    rho = spearman_rows(x[None, None, :], y[None, None, :])[0]
    if not np.isfinite(rho):
        which = "method's" if np.ptp(x) == 0 else "interventional"
        return _one(
            key, truth, np.nan, f"the {which} importance is equal for every type: rank correlation undefined", settings
        )
    return _one(key, truth, float(rho), None, settings)


def _flag_share(
    key: str, inputs: MetricInputs, truth: str, settings: dict[str, Any], types: list[str] | None, role: str
) -> MetricResult:
    check_number(key, "factor", settings["factor"], 0, np.inf)
    if types is None:
        return _one(key, truth, np.nan, f"needs the {role} types (type roles)", settings)
    if (reason := _unusable_reason(inputs)) is not None:
        return _one(key, truth, np.nan, reason, settings)
    view = _method_view(inputs, float(settings["factor"]))
    if isinstance(view, str):
        return _one(key, truth, np.nan, view, settings)
    _, flagged, kind = view
    assessed = [t for t in dict.fromkeys(types) if t in flagged]
    if not assessed:
        where = "present in any tile" if kind == "pixel" else "in the concept report"
        return _one(key, truth, np.nan, f"none of the {role} types ({', '.join(types) or 'none'}) is {where}", settings)
    return _one(key, truth, float(np.mean([flagged[t] for t in assessed])), None, settings)


@register_metric(
    "concept-detection",
    definition="share of the types the model relies on that the method flags",
    citation="Common practice (detection rate against interventional reliance from counterfactual twins).",
    value_range=(0, 1),
    higher_is_better=True,
    needs=("concepts", "type roles"),
    defaults={"factor": 2.0},
    settings_doc=_FLAG_DOC,
    **_CONCEPT,
)
def _concept_detection(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _flag_share("concept-detection", inputs, truth, settings, inputs.relied_types, "relied-on")


@register_metric(
    "concept-false-alarm",
    definition="share of the look-alike and unused types that the method flags",
    citation="Common practice (false-alarm rate against look-alikes and unused types).",
    value_range=(0, 1),
    higher_is_better=False,
    needs=("concepts", "type roles"),
    defaults={"factor": 2.0},
    settings_doc=_FLAG_DOC,
    **_CONCEPT,
)
def _concept_false_alarm(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    types = None
    if inputs.lookalike_types is not None or inputs.unused_types is not None:
        types = list(inputs.lookalike_types or []) + list(inputs.unused_types or [])
    return _flag_share("concept-false-alarm", inputs, truth, settings, types, "look-alike or unused")
