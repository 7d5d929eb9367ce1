"""Cost: what producing the explanations took, per tile, from the explainer's recorded ``cost``.

- ``model-calls``: (images passed forward + images passed backward) / tiles. A backward pass is counted
  like a forward one (it costs roughly twice as much on a CPU).
- ``seconds``: wall-clock seconds / tiles.
One value each (the explainer runs on the whole batch, so per-tile shares would all be equal).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from xbench.metrics.base import MetricInputs, MetricResult, register_metric


def _per_tile(key: str, inputs: MetricInputs, truth: str, settings: dict[str, Any], total: Any) -> MetricResult:
    n = inputs.n_tiles
    reasons: dict[int, str] = {}
    try:
        value = float(total)
    except (TypeError, ValueError):
        value = float("nan")
    if n == 0:
        value, reasons = float("nan"), {-1: "no tiles"}
    elif not np.isfinite(value) or value < 0:
        reasons = {-1: f"the recorded cost is not a non-negative number ({total!r})"}
        value = float("nan")
    else:
        value /= n
    return MetricResult(
        metric=key, truth=truth, values=np.array([value]), per_tile=False, reasons=reasons, settings=dict(settings)
    )


@register_metric(
    "model-calls",
    definition="images passed forward and backward through the model, per tile",
    citation="Common practice (cost in model evaluations).",
    value_range=(0, np.inf),
    higher_is_better=False,
    family="cost",
    needs=("cost",),
    per_tile=False,
)
def _model_calls(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    c = inputs.cost
    try:
        total = int(c.forward_calls) + int(c.backward_calls)
    except (AttributeError, TypeError, ValueError):
        total = None
    return _per_tile("model-calls", inputs, truth, settings, total)


@register_metric(
    "seconds",
    definition="wall-clock seconds spent by the explainer, per tile",
    citation="Common practice (wall-clock cost).",
    value_range=(0, np.inf),
    higher_is_better=False,
    family="cost",
    needs=("cost",),
    per_tile=False,
)
def _seconds(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _per_tile("seconds", inputs, truth, settings, getattr(inputs.cost, "seconds", None))
