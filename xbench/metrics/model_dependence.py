"""Sanity: cascading model-parameter randomization (Adebayo et al. 2018).

A deep copy of the torch module has its parametrised layers re-initialised one after another, **top layer
first** (the reverse of the order in which a forward pass runs them; each layer re-initialised with its own
``reset_parameters`` under a torch seed derived from ``seed`` and the step). After each step the explainer
is re-run with the same settings (``rerun_explainer``) and its maps are compared with the original ones:

- ``randomization-spearman``: Spearman rank correlation per tile (equals ``scipy.stats.spearmanr``);
- ``randomization-ssim``: structural similarity per tile (Wang et al. 2004; equals
  ``skimage.metrics.structural_similarity`` with its defaults: 7x7 uniform window, K1 = 0.01, K2 = 0.03,
  sample covariance).

Normalisation: by default (``absolute = True``) both maps are compared as ``|a| / max |a|`` per tile (in
[0, 1], SSIM data range 1), as Adebayo et al. did for their absolute-value comparisons; with
``absolute = False`` as ``a / max |a|`` (in [-1, 1], data range 2). Spearman is unaffected by the scaling.

Per-tile value: how similar the map stays **after the full cascade** (every parametrised layer
re-initialised, or the top ``max_layers`` when set): ``|rho|`` for ``randomization-spearman`` and ``|SSIM|``
for ``randomization-ssim``. A faithful explanation should no longer resemble its original, so the best value
is 0 and lower is better; the absolute value ranks a map that became anti-correlated with its original
(rho = -0.6: still determined by it) behind one that became unrelated (rho = 0), as Adebayo et al. report
absolute rank correlations. The signed similarities go into ``curves`` (N, S) with the cumulative layer
names in ``curve_labels``, for the figures.

Cost: the value needs only the final, fully randomized model, and every layer is re-initialised from its
own seed (``seed * 1000 + step``), so re-initialising all layers at once gives **exactly** the model (and
maps) that the end of the cascade gives. By default (``cascade_steps = 1``) the explainer is re-run once, on
that model; ``cascade_steps = k`` re-runs it after k evenly spaced steps of the cascade (the last one is
the full cascade) for the per-layer figure, and ``cascade_steps = "all"`` after every step (Adebayo et al.'s
full curve; L re-runs for L layers). The values are identical (tests/test_speed_cascade.py checks equality
to 1e-12) whatever ``cascade_steps``; only the curve's resolution and the cost change.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import numpy as np
import torch
from scipy import ndimage
from scipy.stats import rankdata
from torch import nn

from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    register_metric,
    tile_result,
)
from xbench.models.base import ModelHandle, tensor_from
from xbench.schema import Field, Where

SSIM_WINDOW = 7


# -- pure similarity cores -------------------------------------------------------------------------------
def normalise_maps(maps: np.ndarray, absolute: bool = True) -> np.ndarray:
    """Per tile: |a| / max|a| (absolute) or a / max|a|; NaN rows where the map is zero everywhere."""
    a = np.asarray(maps, dtype=np.float64)
    if absolute:
        a = np.abs(a)
    scale = np.abs(a).reshape(a.shape[0], -1).max(axis=1)
    out = np.full_like(a, np.nan)
    ok = np.isfinite(scale) & (scale > 0)
    out[ok] = a[ok] / scale[ok, None, None]
    return out


def spearman_rows(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Spearman rank correlation per tile of two (N, H, W) stacks (mid-ranks for ties); NaN when either map
    is constant or non-finite."""
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    y = np.asarray(y, dtype=np.float64).reshape(len(y), -1)
    out = np.full(x.shape[0], np.nan)
    ok = np.isfinite(x).all(axis=1) & np.isfinite(y).all(axis=1)
    ok &= (np.ptp(x, axis=1) > 0) & (np.ptp(y, axis=1) > 0)
    if ok.any():
        rx = rankdata(x[ok], axis=1)
        ry = rankdata(y[ok], axis=1)
        rx -= rx.mean(axis=1, keepdims=True)
        ry -= ry.mean(axis=1, keepdims=True)
        out[ok] = np.clip((rx * ry).sum(1) / np.sqrt((rx * rx).sum(1) * (ry * ry).sum(1)), -1, 1)
    return out


def ssim_rows(
    x: np.ndarray, y: np.ndarray, data_range: float, win_size: int = SSIM_WINDOW, k1: float = 0.01, k2: float = 0.03
) -> np.ndarray:
    """Mean SSIM per tile (Wang et al. 2004) with skimage's defaults (uniform window, sample covariance,
    border of (win_size-1)/2 cropped); NaN for non-finite maps and for tiles smaller than the window."""
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    out = np.full(x.shape[0], np.nan)
    if min(x.shape[1:]) < win_size:
        return out
    ok = np.isfinite(x).reshape(len(x), -1).all(1) & np.isfinite(y).reshape(len(y), -1).all(1)
    if not ok.any():
        return out
    x, y = x[ok], y[ok]
    size = (1, win_size, win_size)
    npix = win_size**2
    cov_norm = npix / (npix - 1)
    ux = ndimage.uniform_filter(x, size=size)
    uy = ndimage.uniform_filter(y, size=size)
    uxx = ndimage.uniform_filter(x * x, size=size)
    uyy = ndimage.uniform_filter(y * y, size=size)
    uxy = ndimage.uniform_filter(x * y, size=size)
    vx = cov_norm * (uxx - ux * ux)
    vy = cov_norm * (uyy - uy * uy)
    vxy = cov_norm * (uxy - ux * uy)
    c1 = (k1 * data_range) ** 2
    c2 = (k2 * data_range) ** 2
    s = ((2 * ux * uy + c1) * (2 * vxy + c2)) / ((ux**2 + uy**2 + c1) * (vx + vy + c2))
    pad = (win_size - 1) // 2
    out[ok] = s[:, pad : s.shape[1] - pad, pad : s.shape[2] - pad].mean(axis=(1, 2))
    return out


# -- the cascade -----------------------------------------------------------------------------------------
def parametrised_layers(module: nn.Module, example: torch.Tensor) -> list[str]:
    """Names of the modules that own parameters directly, in the order a forward pass first runs them
    (modules never run are left out)."""
    owners = {name: m for name, m in module.named_modules() if any(True for _ in m.parameters(recurse=False))}
    seen: list[str] = []
    handles = []
    for name, m in owners.items():

        def hook(_m, _a, _o, name=name):
            if name not in seen:
                seen.append(name)

        handles.append(m.register_forward_hook(hook))
    try:
        with torch.no_grad():
            module(example)
    finally:
        for h in handles:
            h.remove()
    return seen


def _reinitialise(layer: nn.Module, seed: int) -> None:
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        reset = getattr(layer, "reset_parameters", None)
        if callable(reset):
            reset()
        else:
            with torch.no_grad():
                for p in layer.parameters(recurse=False):
                    p.normal_(0.0, 0.02)


def _detached_copy(module: nn.Module) -> nn.Module:
    """A deep copy without the original handle's call-counting hooks (they would count into it)."""
    clone = copy.deepcopy(module)
    for attr in ("_forward_hooks", "_backward_hooks", "_forward_pre_hooks", "_backward_pre_hooks"):
        hooks = getattr(clone, attr, None)
        if hooks is not None:
            hooks.clear()
    if hasattr(clone, "_is_full_backward_hook"):
        clone._is_full_backward_hook = None
    return clone.eval()


def cascade_step_indices(n_layers: int, cascade_steps: int | str) -> list[int]:
    """Steps (0-based, in cascade order) after which the explainer is re-run: ``"all"`` -> every step;
    k -> k evenly spaced steps ending with the last (the fully randomized model)."""
    if n_layers <= 0:
        return []
    if cascade_steps == "all":
        return list(range(n_layers))
    k = min(int(cascade_steps), n_layers)
    return [-(-(i + 1) * n_layers // k) - 1 for i in range(k)]  # ceil((i + 1) L / k) - 1


def cascading_randomization(
    model: ModelHandle,
    rerun_explainer: Callable,
    images: np.ndarray,
    targets: np.ndarray,
    seed: int,
    max_layers: int | None = None,
    cascade_steps: int | str = "all",
) -> tuple[list[str], list[np.ndarray]]:
    """Re-initialise the parametrised layers top first on a deep copy; re-run the explainer after the steps
    chosen by ``cascade_steps`` (see :func:`cascade_step_indices`; the last step is always among them).
    Returns the cumulative layer names of those steps (the layer re-initialised last) and the attributions
    (N, H, W) after each."""
    assert model.module is not None
    clone = _detached_copy(model.module)
    example = tensor_from(images[:1])  # a copy when the images are read-only (the runner freezes them)
    layers = parametrised_layers(clone, example)[::-1]
    if max_layers is not None:
        layers = layers[: int(max_layers)]
    modules = dict(clone.named_modules())
    handle = ModelHandle(
        f"{model.name}~randomized",
        model.n_classes,
        module=clone,
        batch_size=model.batch_size,
        fast_inference=model.fast_inference,
    )
    chosen = set(cascade_step_indices(len(layers), cascade_steps))
    names, maps = [], []
    for step, name in enumerate(layers):
        _reinitialise(modules[name], int(seed) * 1000 + step)
        if step not in chosen:
            continue
        out = np.asarray(rerun_explainer(handle, images, targets), dtype=np.float64)
        if out.shape != np.shape(images)[:1] + np.shape(images)[2:]:
            raise RuntimeError(f"rerun_explainer returned {out.shape}, expected (N, H, W)")
        names.append(name)
        maps.append(out)
    return names, maps


def _cascade(
    inputs: MetricInputs, max_layers: int | None, cascade_steps: int | str
) -> tuple[list[str], list[np.ndarray]]:
    key = inputs.cache_key("randomization", max_layers, cascade_steps)
    if key not in inputs._cache:
        assert inputs.model is not None and inputs.rerun_explainer is not None
        inputs._cache[key] = cascading_randomization(
            inputs.model,
            inputs.rerun_explainer,
            np.asarray(inputs.images),
            np.asarray(inputs.targets),
            inputs.seed,
            max_layers,
            cascade_steps,
        )
    return inputs._cache[key]


def _randomization(key: str, inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    absolute, max_layers, steps = settings["absolute"], settings["max_layers"], settings["cascade_steps"]
    n = inputs.n_tiles
    if key == "randomization-ssim" and min(np.shape(inputs.attributions)[1:]) < SSIM_WINDOW:
        return tile_result(
            key,
            truth,
            np.full(n, np.nan),
            {-1: f"tiles smaller than the {SSIM_WINDOW}x{SSIM_WINDOW} SSIM window"},
            settings,
        )
    bad = bad_attribution_tiles(inputs.attributions)
    layers, maps = _cascade(inputs, max_layers, steps)
    original = normalise_maps(inputs.attributions, absolute)
    curve = np.full((n, len(layers)), np.nan)
    for j, m in enumerate(maps):
        other = normalise_maps(m, absolute)
        if key == "randomization-spearman":
            curve[:, j] = spearman_rows(original, other)
        else:
            curve[:, j] = ssim_rows(original, other, data_range=1.0 if absolute else 2.0)
    reasons: dict[int, str] = {}
    if not layers:
        values = np.full(n, np.nan)
        reasons[-1] = "the model has no parametrised layer to randomize"
        return tile_result(key, truth, values, reasons, settings)
    values = np.abs(curve[:, -1])  # the similarity's size: 0 = the map moved completely
    last = maps[-1].reshape(n, -1)
    orig = np.asarray(inputs.attributions, dtype=np.float64).reshape(n, -1)
    for i in np.flatnonzero(~np.isfinite(values)).tolist():
        if bad[i]:
            reasons[i] = NONFINITE_REASON
        elif not np.isfinite(last[i]).all():
            reasons[i] = "the randomized model's attribution has non-finite values"
        elif not np.abs(orig[i]).max() > 0:
            reasons[i] = "attribution is zero everywhere: no map to compare"
        elif not np.abs(last[i]).max() > 0:
            reasons[i] = "the fully randomized model's attribution is zero everywhere: similarity undefined"
        else:
            reasons[i] = "a map is constant after normalisation: rank correlation undefined"
    return tile_result(key, truth, values, reasons, settings, curves={key: curve}, curve_labels={key: layers})


_ADEBAYO = "Adebayo, Gilmer, Muelly, Goodfellow, Hardt, Kim. Sanity checks for saliency maps. NeurIPS 2018."


def _cascade_steps(value: Any, where: Where) -> int | str:
    if value == "all" or (isinstance(value, int) and not isinstance(value, bool) and value >= 1):
        return value
    raise where.error("not an allowed value", expected="a positive integer or 'all'", found=value)


_SANITY: dict[str, Any] = dict(
    family="model-dependence",
    needs=("torch model", "explainer re-runs"),
    per_tile=True,
    defaults={"absolute": True, "max_layers": None, "cascade_steps": 1},
    settings={
        "absolute": Field("bool", True, doc="compare |a| / max|a| (true) or a / max|a| (false)"),
        "max_layers": Field("int", None, low=1, high=100_000, nullable=True, doc="randomize at most this many layers"),
        "cascade_steps": Field(
            "any",
            1,
            check=_cascade_steps,
            doc="re-run the explainer after 1 (the fully randomized model), k evenly spaced or 'all' steps",
        ),
    },
    settings_doc={
        "absolute": "compare |a| / max|a| (true) or a / max|a| (false)",
        "max_layers": "randomize only the top this many parametrised layers (none = all)",
        "cascade_steps": "re-run the explainer after this many evenly spaced cascade steps (1 = only the fully "
        "randomized model, the value's only need; 'all' = every step, for the per-layer figure); values "
        "are identical, only the curve and the cost change",
    },
    higher_is_better=False,
)


@register_metric(
    "randomization-spearman",
    definition="|Spearman correlation| between the original maps and those of the fully "
    "randomized model (layers re-initialised top first); 0 = the map moved completely",
    citation=_ADEBAYO,
    value_range=(0, 1),
    **_SANITY,
)
def _randomization_spearman(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _randomization("randomization-spearman", inputs, truth, settings)


@register_metric(
    "randomization-ssim",
    definition="|SSIM| between the original maps and those of the fully randomized model "
    "(layers re-initialised top first); 0 = the map moved completely",
    citation=_ADEBAYO + " SSIM: Wang, Bovik, Sheikh, Simoncelli. IEEE TIP 2004.",
    value_range=(0, 1),
    **_SANITY,
)
def _randomization_ssim(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    return _randomization("randomization-ssim", inputs, truth, settings)
