"""Concept recovery: does a method's importance per structure type match what the model really used?

The reference is the truth module's measured reliance: a type is *relied on* when removing its instances
from the tiles drops the target score reliably (``MetricInputs.relied_types``; ``Reliance.relied_types``).
Roles (:func:`type_roles`): **relied-on types**, **relied-on look-alikes** (natural look-alikes the model
does use) and **unused types** (every other type, look-alikes included). A method that flags a relied-on
look-alike has found something the model uses: that is a detection, never a false alarm. Only unused
types can be false alarms.

A method's evidence per type, on the class the type is meant to drive (the class whose label rule uses it;
a type that drives no class: the classes some type drives):
- **concept methods** (``concept_report`` given): ``concept_report.type_importance`` and ``concept_report.flagged``.
  ``tcav``: the concept's mean alignment (cosine between the class logit's gradient and the CAV) minus the random
  sets' mean on that class; ``activation-clusters``: mean drop of that class's probability when the cluster labelled
  with the type is replaced, on that class's tiles.
- **pixel methods**: per tile, the type's *enrichment* = (mean attribution inside the type's mask - mean
  attribution over the tile) / standard deviation of the attribution over the tile (scale-free; 0 for a
  map unrelated to the type, whatever the type's area). Tiles used: those holding the type whose target
  class the type drives (most of its pixels lie in the planted mask, the union of the target class's
  driving types), or, for a type that drives no class there, the tiles of classes some type drives
  (non-empty planted mask). Importance = mean enrichment over those tiles.

**One flagging rule for every family**: a type is flagged when its effect on its class is positive and
significant: a two-sided t-test over the method's samples (pixel methods: the per-tile enrichments
against 0; ``activation-clusters``: the per-tile probability drops against 0, with the truth's practical
floor of 0.02; ``tcav``: the concept's alignment against random sets posing as concepts), at level
``alpha`` (0.05) with Bonferroni over the types. Concept explainers apply it themselves (their ``flagged``);
pixel methods get it here.

Metrics (one value each, not per tile):
- ``concept-recovery``: the AUROC (Mann-Whitney; ties count 1/2) of the method's importance per type for
  telling relied-on types (look-alikes included) from unused types. Chance level 0.5: averaged over every
  assignment of a method's values to the types, each (relied-on, unused) pair is ordered either way
  equally often, so a method unrelated to reliance (the ``random`` control) scores 0.5 on average; 1 when
  every relied-on type outranks every unused type (the ``oracle`` when the model uses what the labels
  say). NaN when either group is empty.
- ``concept-detection``: share of the relied-on types and relied-on look-alikes that the method flags.
- ``concept-false-alarm``: share of the unused types that the method flags.
Types a method cannot assess (absent from every tile it is scored on for pixel methods, missing from the
concept report) are left out; when none is left the value is NaN with a reason.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from xbench.metrics.base import (
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    register_metric,
)
from xbench.schema import Field
from xbench.truth import type_roles

ROLES = ("relied-on", "relied-on look-alike", "unused")


# -- pure cores -------------------------------------------------------------------------------------------
def recovery_auroc(importance: dict[str, float], roles: dict[str, str]) -> float:
    """AUROC of ``importance`` for relied-on (either relied role) against unused types; ties count 1/2.
    NaN when a group is empty. Chance level 0.5."""
    pos = [importance[t] for t, r in roles.items() if r != "unused" and t in importance]
    neg = [importance[t] for t, r in roles.items() if r == "unused" and t in importance]
    if not pos or not neg:
        return float("nan")
    p, n = np.asarray(pos, float)[:, None], np.asarray(neg, float)[None, :]
    return float(np.mean((p > n) + 0.5 * (p == n)))  # the Mann-Whitney U / (n1 n2)


def one_sample_p(values: np.ndarray) -> float:
    """Two-sided one-sample t-test of ``values`` against 0 (scipy); 1 for fewer than 2 values or all 0,
    0 for a constant non-zero sample."""
    v = np.asarray(values, dtype=np.float64)
    if v.size < 2:
        return 1.0
    if np.ptp(v) == 0:
        return 1.0 if v[0] == 0 else 0.0
    p = float(stats.ttest_1samp(v, 0.0).pvalue)
    return p if np.isfinite(p) else 1.0


ENRICHMENT_NOISE = 1e-9


def pixel_enrichment(
    attributions: np.ndarray, type_masks: np.ndarray, planted: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Per tile and type: enrichment (N, K) and whether the tile is one the type is scored on (N, K).

    enrichment = (mean a inside the mask - mean a over the tile) / sd of a over the tile. A tile counts for
    type k when k is present and the tile's attribution is finite and not constant, and either k drives the
    tile's target (at least half of k's pixels lie in ``planted``) or, if k drives the target of no tile,
    the tile's target is driven by some type (``planted`` not empty). Without ``planted``: every tile
    holding the type."""
    a = np.asarray(attributions, dtype=np.float64)
    n = a.shape[0]
    a = a.reshape(n, -1)
    m = np.asarray(type_masks, dtype=bool).reshape(n, type_masks.shape[1], -1)
    with np.errstate(invalid="ignore"):
        sd = a.std(axis=1)
    usable = np.isfinite(a).all(axis=1) & np.isfinite(sd) & (sd > 0)
    a = np.where(usable[:, None], a, 0.0)
    area = m.sum(axis=2)
    present = (area > 0) & usable[:, None]
    inside = np.einsum("nkp,np->nk", m, a) / np.maximum(area, 1)
    enrichment = (inside - a.mean(axis=1)[:, None]) / np.where(usable, sd, 1.0)[:, None]
    # enrichment is in units of the tile's sd: below 1e-9 it is float noise (a mask covering the whole tile
    # gives 0 up to rounding, and noise that differs between tiles would pass the t-test as a real effect)
    enrichment[np.abs(enrichment) < ENRICHMENT_NOISE] = 0.0
    if planted is None:
        return enrichment, present
    p = np.asarray(planted, dtype=bool).reshape(n, 1, -1)
    drives = present & (np.einsum("nkp,nkp->nk", m, np.broadcast_to(p, m.shape)) >= 0.5 * np.maximum(area, 1))
    positive_class = np.asarray(p.reshape(n, -1).any(axis=1))[:, None]  # asarray: numpy's stubs say "or scalar"
    fallback = present & positive_class & ~drives.any(axis=0)[None, :]
    return enrichment, drives | fallback


def pixel_evidence(
    attributions: np.ndarray, type_masks: np.ndarray, names: list[str], planted: np.ndarray | None, alpha: float
) -> tuple[dict[str, float], dict[str, bool]]:
    """Importance (mean enrichment) and flag (the shared rule) per assessable type of a pixel method."""
    enrichment, used = pixel_enrichment(attributions, type_masks, planted)
    assessable = [k for k in range(len(names)) if used[:, k].any()]
    importance, flagged = {}, {}
    for k in assessable:
        e = enrichment[used[:, k], k]
        importance[names[k]] = float(e.mean())
        flagged[names[k]] = bool(e.mean() > 0 and one_sample_p(e) * len(assessable) < alpha)
    return importance, flagged


# -- method importance and flags ----------------------------------------------------------------------------
def _method_view(inputs: MetricInputs, alpha: float) -> tuple[dict[str, float], dict[str, bool], str] | str:
    """(importance per type, flag per type, kind) or a reason why the method cannot be assessed."""
    report = inputs.concept_report
    if report is not None and getattr(report, "type_importance", None) is not None:
        imp = {str(k): float(v) for k, v in report.type_importance.items()}
        flagged = {str(k): bool(v) for k, v in (getattr(report, "flagged", None) or {}).items()}
        return imp, flagged, "concept"
    if inputs.type_masks is None or inputs.mask_names is None:
        return "needs a concept report (concept methods) or type masks (pixel methods)"
    imp, flagged = pixel_evidence(
        inputs.attributions, np.asarray(inputs.type_masks), list(inputs.mask_names), inputs.planted, alpha
    )
    return imp, flagged, "pixel"


def _roles_of(inputs: MetricInputs) -> dict[str, str] | None:
    if inputs.relied_types is None:
        return None
    types = list(inputs.mask_names or []) + list(inputs.relied_types)
    types += list(inputs.lookalike_types or []) + list(inputs.unused_types or [])
    return type_roles(list(inputs.relied_types), list(inputs.lookalike_types or []), list(dict.fromkeys(types)))


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


_CONCEPT: dict[str, Any] = dict(family="concepts", per_tile=False)
_ALPHA_DOC = {
    "alpha": "pixel methods: level of the flagging rule (two-sided t-test of per-tile enrichment, Bonferroni "
    "over types); concept methods flag with their own alpha setting"
}


_ALPHA_FIELD = Field("number", 0.05, low=0.0, high=1.0, doc="significance level of the flagging rule")


@register_metric(
    "concept-recovery",
    definition="AUROC (Mann-Whitney, ties 1/2) of the method's importance per structure type for telling the "
    "types the model relies on (relied-on look-alikes included) from the unused types; importance on the class "
    "the type drives (pixel methods: mean enrichment of the attribution in the type's mask; tcav: the concept's "
    "alignment minus the random sets'; activation-clusters: probability drop of the matched cluster). Chance level 0.5 "
    "(the mean over every assignment of the values to the types); 1 = every relied-on type ranked first",
    citation="Interventional reliance from counterfactual twins vs. method importance per type (concept scores "
    "after Kim et al., ICML 2018; Ghorbani et al., NeurIPS 2019); AUROC as the Mann-Whitney U / (n1 n2): "
    "common practice.",
    value_range=(0, 1),
    higher_is_better=True,
    needs=("concepts", "type roles"),
    settings={"alpha": _ALPHA_FIELD},
    settings_doc=_ALPHA_DOC,
    **_CONCEPT,
)
def _concept_recovery(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "concept-recovery"
    roles = _roles_of(inputs)
    if roles is None:
        return _one(key, truth, np.nan, "needs the type roles (relied-on types from the truth module)", settings)
    if (reason := _unusable_reason(inputs)) is not None:
        return _one(key, truth, np.nan, reason, settings)
    view = _method_view(inputs, float(settings["alpha"]))
    if isinstance(view, str):
        return _one(key, truth, np.nan, view, settings)
    importance = {t: v for t, v in view[0].items() if np.isfinite(v)}
    value = recovery_auroc(importance, roles)
    if not np.isfinite(value):
        groups = {
            r: [t for t, q in roles.items() if (q == "unused") == (r == "unused") and t in importance]
            for r in ("relied", "unused")
        }
        empty = [r for r, ts in groups.items() if not ts]
        return _one(
            key, truth, np.nan, f"no {' and no '.join(empty)} type assessed by the method: AUROC undefined", settings
        )
    return _one(key, truth, value, None, settings)


def _flag_share(
    key: str, inputs: MetricInputs, truth: str, settings: dict[str, Any], wanted: tuple[str, ...]
) -> MetricResult:
    roles = _roles_of(inputs)
    what = " or ".join(wanted)
    if roles is None:
        return _one(key, truth, np.nan, f"needs the {what} types (type roles)", settings)
    if (reason := _unusable_reason(inputs)) is not None:
        return _one(key, truth, np.nan, reason, settings)
    view = _method_view(inputs, float(settings["alpha"]))
    if isinstance(view, str):
        return _one(key, truth, np.nan, view, settings)
    _, flagged, kind = view
    types = [t for t, r in roles.items() if r in wanted]
    assessed = [t for t in types if t in flagged]
    if not assessed:
        where = "present in any scored tile" if kind == "pixel" else "in the concept report"
        return _one(key, truth, np.nan, f"none of the {what} types ({', '.join(types) or 'none'}) is {where}", settings)
    return _one(key, truth, float(np.mean([flagged[t] for t in assessed])), None, settings)


@register_metric(
    "concept-detection",
    definition="share of the types the model relies on (relied-on types and relied-on look-alikes) that the "
    "method flags; flag = positive effect on the type's class, significant by a two-sided t-test over the "
    "method's samples at alpha with Bonferroni over types (the same rule for every family)",
    citation="Common practice (detection rate against interventional reliance from counterfactual twins).",
    value_range=(0, 1),
    higher_is_better=True,
    needs=("concepts", "type roles"),
    settings={"alpha": _ALPHA_FIELD},
    settings_doc=_ALPHA_DOC,
    **_CONCEPT,
)
def _concept_detection(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _flag_share("concept-detection", inputs, truth, settings, ("relied-on", "relied-on look-alike"))


@register_metric(
    "concept-false-alarm",
    definition="share of the unused types (look-alikes the model does not rely on included) that the method "
    "flags; a relied-on look-alike is never a false alarm; flag rule as for concept-detection",
    citation="Common practice (false-alarm rate against types the model does not use).",
    value_range=(0, 1),
    higher_is_better=False,
    needs=("concepts", "type roles"),
    settings={"alpha": _ALPHA_FIELD},
    settings_doc=_ALPHA_DOC,
    **_CONCEPT,
)
def _concept_false_alarm(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _flag_share("concept-false-alarm", inputs, truth, settings, ("unused",))
