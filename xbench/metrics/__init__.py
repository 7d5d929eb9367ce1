"""Metrics grouped by what each compares against: overlap (truth masks), response (the model's output under
removal), model-dependence (randomized models), steadiness (perturbed inputs), spread (the map alone),
concepts and cost.

``compute_metric(key, inputs, **settings) -> list[MetricResult]`` is the entry point; ``list_metrics()``
and ``get_metric(key)`` give the registry with each metric's definition, citation, range, direction and
needs. Importing this package registers every metric (family modules in the order below).
"""

from xbench.metrics import (  # noqa: F401  (imported to register the metrics)
    concepts,
    cost,
    model_dependence,
    overlap,
    response,
    spread,
    steadiness,
)
from xbench.metrics.base import (
    FAMILIES,
    NEEDS_TEXT,
    MetricInputs,
    MetricResult,
    MetricSpec,
    compute_metric,
    get_metric,
    list_metrics,
    register_metric,
)

METRIC_KEYS = [spec.key for spec in list_metrics()]

__all__ = [
    "FAMILIES",
    "METRIC_KEYS",
    "NEEDS_TEXT",
    "MetricInputs",
    "MetricResult",
    "MetricSpec",
    "compute_metric",
    "get_metric",
    "list_metrics",
    "register_metric",
]
