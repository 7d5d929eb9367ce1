"""Explainers behind one interface: pixel explainers, concept explainers, controls, plugins.

    from xbench.explainers import explain, ExplainContext
    exp = explain("integrated-gradients", model, images, targets, ExplainContext(seed=0), baseline="twin")
    exp.attributions  # float32 (N, H, W);  exp.cost  # forward/backward calls, seconds

Keys: gradient, input-x-gradient, integrated-gradients, smoothgrad, guided-backprop, deeplift, grad-cam,
grad-cam-pp, occlusion, rise, kernel-shap, activation-clusters, tcav; controls random, edges, oracle.
Register more with :func:`register_explainer` or the entry-point group ``xbench.explainers``.
"""

from xbench.explainers.base import (
    ConceptReport,
    Cost,
    ExplainContext,
    Explanation,
    NonFiniteAttributionError,
)
from xbench.explainers.registry import (
    ENTRY_POINT_GROUP,
    NEEDS,
    ExplainerSpec,
    explain,
    get_explainer,
    list_explainers,
    load_plugins,
    register_explainer,
    unregister_explainer,
)

__all__ = [
    "ENTRY_POINT_GROUP",
    "NEEDS",
    "ConceptReport",
    "Cost",
    "ExplainContext",
    "ExplainerSpec",
    "Explanation",
    "NonFiniteAttributionError",
    "explain",
    "get_explainer",
    "list_explainers",
    "load_plugins",
    "register_explainer",
    "unregister_explainer",
]
