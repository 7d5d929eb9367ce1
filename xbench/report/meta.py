"""What the report knows about metrics and explainers: direction, range, family, citation, description.

The registries (``xbench.metrics``, ``xbench.explainers``) are the only source. A key they do not know (a
plugin that is not installed where the report runs) gets no direction, so no best value and no tests, and
the report says so.

The report's own direction handling: the randomization metrics measure how far a map moved when the model's
weights were randomized, so the report ranks them by the magnitude of the similarity, |value| toward 0
(an anti-correlated map moved as far as an uncorrelated one; a signed "lower is better" would reward it).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cache

from xbench.errors import XbenchInputError

FAMILY_ORDER = ["overlap", "response", "model-dependence", "steadiness", "spread", "concepts", "cost", "other"]

# Metrics scored by |value| (lower is better): similarity of a map to the map of a randomized model.
RANK_BY_MAGNITUDE = frozenset({"randomization-spearman", "randomization-ssim"})


@dataclass(frozen=True)
class MetricInfo:
    key: str
    family: str
    higher_is_better: bool | None
    value_range: tuple[float, float] | None
    definition: str
    citation: str
    source: str  # "registry" or "unknown"
    by_magnitude: bool = False  # ranked by |value|, lower is better (RANK_BY_MAGNITUDE)


@dataclass(frozen=True)
class ExplainerInfo:
    key: str
    citation: str
    description: str
    source: str  # "registry" or "unknown"
    black_box_ok: bool | None = None  # runs on a black box (needs no gradients or layer); None: unknown


@cache
def metric_info(key: str) -> MetricInfo:
    from xbench.metrics import get_metric  # an earlier stage; lazy so that reading the report module is cheap

    try:
        spec = get_metric(key)
    except XbenchInputError:
        return MetricInfo(key, "other", None, None, "", "", "unknown")
    by_magnitude = key in RANK_BY_MAGNITUDE
    lo, hi = spec.value_range
    return MetricInfo(
        key=key,
        family=spec.family,
        higher_is_better=False if by_magnitude else spec.higher_is_better,
        value_range=(0.0, max(abs(lo), abs(hi))) if by_magnitude else (lo, hi),
        definition=spec.definition + ("; ranked by |value|, toward 0 = the map moved" if by_magnitude else ""),
        citation=spec.citation,
        source="registry",
        by_magnitude=by_magnitude,
    )


@cache
def explainer_info(key: str) -> ExplainerInfo:
    from xbench.explainers import get_explainer

    try:
        spec = get_explainer(key)
    except XbenchInputError:
        return ExplainerInfo(key, "", key, "unknown")
    return ExplainerInfo(key, spec.citation, spec.description or key, "registry", bool(spec.black_box_ok))


def metric_defaults(key: str) -> dict:
    """The registry's default settings of a metric (empty for an unknown key)."""
    from xbench.metrics import get_metric

    try:
        return dict(get_metric(key).defaults)
    except XbenchInputError:
        return {}


def explainer_defaults(key: str) -> dict:
    """The registry's default settings of an explainer (empty for an unknown key)."""
    from xbench.explainers import get_explainer

    try:
        return dict(get_explainer(key).defaults)
    except XbenchInputError:
        return {}


def family_rank(family: str) -> int:
    return FAMILY_ORDER.index(family) if family in FAMILY_ORDER else len(FAMILY_ORDER)
