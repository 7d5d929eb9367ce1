"""Concentration: how much of the attribution sits on few pixels (of the absolute attribution |a|).

- ``gini``: the Gini index of |a| over the tile's pixels (Chalasani et al. 2020, after Hurley and
  Rickard): with |a| sorted ascending, G = sum_k (2k - n - 1) |a|_(k) / (n sum_k |a|_(k)). 0 for a uniform
  map, 1 - 1/n when one pixel holds everything.
- ``entropy``: the Shannon entropy of p = |a| / sum |a| divided by log(n), so 0 = one pixel, 1 = uniform
  (normalised so that tiles of different sizes compare).

A map that is zero everywhere has no distribution: NaN with a reason. Both are invariant to positive (and
negative) scaling. Chalasani et al. argue that sparser maps are easier to read, hence the directions.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from xbench.metrics.base import NONFINITE_REASON, MetricInputs, MetricResult, register_metric, tile_result


def _abs_rows(attributions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    a = np.abs(np.asarray(attributions, dtype=np.float64))
    a = a.reshape(a.shape[0], -1)
    total = a.sum(axis=1)
    ok = np.isfinite(a).all(axis=1) & (total > 0) & np.isfinite(total)
    return a, ok


def gini_index(attributions: np.ndarray) -> np.ndarray:
    """Gini index of |a| per tile (N,); NaN for zero or non-finite maps."""
    a, ok = _abs_rows(attributions)
    out = np.full(a.shape[0], np.nan)
    if ok.any():
        s = np.sort(a[ok], axis=1)
        n = s.shape[1]
        k = np.arange(1, n + 1, dtype=np.float64)
        out[ok] = np.clip(((2 * k - n - 1) * s).sum(axis=1) / (n * s.sum(axis=1)), 0.0, 1.0)
    return out


def normalised_entropy(attributions: np.ndarray) -> np.ndarray:
    """Entropy of |a| / sum|a| divided by log(n) per tile (N,); NaN for zero or non-finite maps."""
    a, ok = _abs_rows(attributions)
    out = np.full(a.shape[0], np.nan)
    n = a.shape[1]
    if ok.any():
        p = a[ok] / a[ok].sum(axis=1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            h = -np.where(p > 0, p * np.log(p), 0.0).sum(axis=1)
        out[ok] = np.clip(h / np.log(n), 0.0, 1.0) if n > 1 else 0.0
    return out


def _reasons(attributions: np.ndarray, values: np.ndarray) -> dict[int, str]:
    a = np.asarray(attributions, dtype=np.float64).reshape(len(values), -1)
    return {
        int(i): NONFINITE_REASON
        if not np.isfinite(a[i]).all()
        else "attribution is zero everywhere: no distribution to measure"
        for i in np.flatnonzero(~np.isfinite(values))
    }


_CHALASANI = (
    "Chalasani, Chen, Chowdhury, Wu, Jha. Concise explanations of neural networks using "
    "adversarial training. ICML 2020."
)


@register_metric(
    "gini",
    definition="Gini index of the absolute attribution over the tile's pixels",
    citation=_CHALASANI,
    value_range=(0, 1),
    higher_is_better=True,
    family="spread",
    needs=(),
    per_tile=True,
)
def _gini(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    v = gini_index(inputs.attributions)
    return tile_result("gini", truth, v, _reasons(inputs.attributions, v), settings)


@register_metric(
    "entropy",
    definition="Shannon entropy of the normalised absolute attribution, divided by log(pixels)",
    citation="Common practice (Shannon entropy of the normalised attribution map).",
    value_range=(0, 1),
    higher_is_better=False,
    family="spread",
    needs=(),
    per_tile=True,
)
def _entropy(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    v = normalised_entropy(inputs.attributions)
    return tile_result("entropy", truth, v, _reasons(inputs.attributions, v), settings)
