"""Faithfulness: does removing (or adding) what the attribution ranks highest change the model's score?

The score is ``model.probabilities(images)[:, target]``. Pixels are perturbed in all bands at once
(attributions are per pixel), one pixel at a time (region size 1; Samek et al. 2017 used 9x9 regions).
Pixel order: by attribution, ties broken by a seeded random permutation (a constant map gives a random
order, never an arbitrary raster order).

Perturbation baselines (setting ``baseline``):
- ``zero``: reflectance 0 in every band;  ``mean``: the tile's own per-band mean;
- ``blur``: the tile blurred with a Gaussian of ``blur_sigma`` pixels (Petsiuk et al. 2018 insert into a
  blurred image);
- ``twin`` (default): the tile's structure-free counterfactual twin, an in-distribution baseline that only
  synthetic data can give. Without twins the result is skipped with a stated reason.

Curves: ``steps + 1`` points at perturbed fractions 0, 1/steps, ..., 1 (k_s = round(s * H * W / steps)
pixels); AUC by the trapezoid rule over [0, 1]; AOPC = mean over the points of f(x_0) - f(x_k).
Per-tile curves are returned in ``MetricResult.curves`` (``deletion``, ``insertion``, ``deletion-lerf``).

The engine is batched: for a group of tiles it builds the perturbed images of all their steps at once
(one ``np.where`` over a (images, 1, H, W) selection) and sends the stack through the model in large
batches; groups bound the memory to about ``CHUNK_BYTES``. A step whose image repeats the previous
step's exactly (no pixel where the baseline differs from the tile entered in between, common with the
twin baseline) reuses that score instead of calling the model. Torch models are scored through
:func:`xbench.metrics.base.model_scorer` (inference mode, channels-last chunks of 128 images: the same
probabilities as ``model.probabilities``, faster on CPU). Curves shared by several metrics on the same
inputs (deletion-auc and aopc-morf) are computed once. :func:`perturbation_curves_loop` is the
straightforward per-tile, per-step reference that the tests and ``tests/bench/bench_metrics.py`` compare
against.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from xbench.explainers.base import BLUR_SIGMA, make_baseline
from xbench.metrics.base import (
    NONFINITE_REASON,
    MetricInputs,
    MetricResult,
    bad_attribution_tiles,
    get_metric,
    model_scorer,
    nan_result,
    register_metric,
    tile_result,
)
from xbench.schema import Field

BASELINES = ("twin", "zero", "mean", "blur")
CHUNK_BYTES = 8 * 2**20  # a few tiles x all their steps per stack (cache-friendly)
ProbFn = Callable[[np.ndarray], np.ndarray]


# -- pure pieces ----------------------------------------------------------------------------------------
def pixel_order(
    attributions: np.ndarray, seed: int, most_relevant_first: bool = True, tile_ids: np.ndarray | None = None
) -> np.ndarray:
    """(N, H*W) pixel indices sorted by attribution (descending for MoRF, ascending for LeRF); ties are
    broken by a random key drawn per tile from ``[seed, tile, 1729]`` (``tile_ids`` default 0..N-1)."""
    a = np.asarray(attributions, dtype=np.float64)
    a = a.reshape(a.shape[0], -1)
    a = np.nan_to_num(a, nan=0.0, posinf=0.0, neginf=0.0)
    ids = np.arange(a.shape[0]) if tile_ids is None else np.asarray(tile_ids)
    tie = (
        np.stack([np.random.default_rng([int(seed), int(i), 1729]).random(a.shape[1]) for i in ids])
        if len(ids)
        else np.zeros(a.shape)
    )
    return np.lexsort((tie, -a if most_relevant_first else a), axis=-1)


def step_counts(n_pixels: int, steps: int) -> np.ndarray:
    """Pixels perturbed after each step s = 0..steps: round(s * P / steps)."""
    return (np.arange(steps + 1) * n_pixels + steps // 2) // steps


def distinct_steps(images: np.ndarray, baseline: np.ndarray, order: np.ndarray, steps: int) -> np.ndarray:
    """(N, steps+1) bool: the steps whose perturbed image differs from the previous step's.

    Only pixels where the baseline differs from the tile change anything; since the perturbed set grows
    along ``order``, step s repeats step s-1 exactly when no such pixel entered between them. With the
    twin baseline (bit-identical outside the planted structures) most steps of a map that ranks the
    structures first repeat their neighbour, and are not sent to the model again."""
    n, _, h, w = images.shape
    p = h * w
    differs = (np.asarray(baseline) != np.asarray(images)).any(axis=1).reshape(n, p)
    entered = np.cumsum(np.take_along_axis(differs, np.asarray(order), axis=1), axis=1, dtype=np.int64)
    ks = step_counts(p, steps)
    count = np.where(ks[None, :] > 0, entered[:, np.maximum(ks - 1, 0)], 0)
    new = np.ones((n, steps + 1), dtype=bool)
    new[:, 1:] = count[:, 1:] != count[:, :-1]
    return new


def perturbation_curves(
    prob_fn: ProbFn,
    images: np.ndarray,
    targets: np.ndarray,
    baseline: np.ndarray,
    order: np.ndarray,
    steps: int,
    mode: str = "deletion",
    chunk_bytes: int = CHUNK_BYTES,
) -> np.ndarray:
    """Target-class score after each step (N, steps+1), batched over tiles and steps.

    ``deletion``: step s replaces the first k_s pixels of ``order`` by the baseline (step 0 = the tile).
    ``insertion``: step s starts from the baseline and restores the first k_s pixels (step 0 = baseline).
    The perturbed images of many tiles and steps are stacked (about ``chunk_bytes`` at a time) and
    scored together; a step that repeats the previous step's image exactly (:func:`distinct_steps`)
    takes that step's score instead of a model call.
    """
    images = np.asarray(images, dtype=np.float32)
    baseline = np.asarray(baseline, dtype=np.float32)
    n, c, h, w = images.shape
    p = h * w
    targets = np.asarray(targets)
    out = np.empty((n, steps + 1))
    if n == 0:
        return out
    order = np.asarray(order)
    rank = np.empty((n, p), dtype=np.int32)
    np.put_along_axis(rank, order, np.arange(p, dtype=np.int32)[None, :].repeat(n, 0), axis=1)
    ks = step_counts(p, steps).astype(np.int32)
    src, repl = (images, baseline) if mode == "deletion" else (baseline, images)
    new = distinct_steps(images, baseline, order, steps)
    budget = max(1, int(chunk_bytes // (c * p * 4)))  # images per stack
    per_tile = new.sum(axis=1)
    start = 0
    while start < n:
        stop = start + 1
        total = int(per_tile[start])
        while stop < n and total + per_tile[stop] <= budget:
            total += int(per_tile[stop])
            stop += 1
        tile_idx, step_idx = np.nonzero(new[start:stop])
        tile_idx += start
        if len(tile_idx) == (stop - start) * (steps + 1):  # every step is new: broadcast, no gathers
            sel = (rank[start:stop, None, :] < ks[None, :, None]).reshape(stop - start, steps + 1, 1, h, w)
            stack = np.where(sel, repl[start:stop, None], src[start:stop, None]).reshape(-1, c, h, w)
        else:
            sel = (rank[tile_idx] < ks[step_idx][:, None]).reshape(-1, 1, h, w)
            stack = np.where(sel, repl[tile_idx], src[tile_idx])
        probs = prob_fn(stack)
        scores = np.full((stop - start, steps + 1), np.nan)
        scores[tile_idx - start, step_idx] = probs[np.arange(len(tile_idx)), targets[tile_idx]]
        # each repeated step takes the score of the last distinct step before it
        last = np.maximum.accumulate(np.where(new[start:stop], np.arange(steps + 1)[None, :], 0), axis=1)
        out[start:stop] = np.take_along_axis(scores, last, axis=1)
        start = stop
    return out


def perturbation_curves_loop(
    prob_fn: ProbFn,
    images: np.ndarray,
    targets: np.ndarray,
    baseline: np.ndarray,
    order: np.ndarray,
    steps: int,
    mode: str = "deletion",
) -> np.ndarray:
    """The straightforward reference: one tile at a time, one model call per step (slow; tests, bench)."""
    images = np.asarray(images, dtype=np.float32)
    baseline = np.asarray(baseline, dtype=np.float32)
    n, c, h, w = images.shape
    ks = step_counts(h * w, steps)
    out = np.empty((n, steps + 1))
    for i in range(n):
        for s, k in enumerate(ks):
            x = (images[i] if mode == "deletion" else baseline[i]).copy().reshape(c, -1)
            idx = order[i, :k]
            x[:, idx] = (baseline[i] if mode == "deletion" else images[i]).reshape(c, -1)[:, idx]
            out[i, s] = prob_fn(x.reshape(1, c, h, w))[0, targets[i]]
    return out


def curve_auc(curves: np.ndarray) -> np.ndarray:
    """Area under each curve (N, steps+1) over the perturbed fraction in [0, 1] (trapezoid rule)."""
    steps = curves.shape[1] - 1
    return np.trapezoid(curves, dx=1.0 / steps, axis=1)


def aopc(curves: np.ndarray) -> np.ndarray:
    """Area over the perturbation curve (Samek et al. 2017): mean over k = 0..L of f(x_0) - f(x_k)."""
    return curves[:, 0] - curves.mean(axis=1)


def constant_rows(x: np.ndarray, rtol: float = 1e-12) -> np.ndarray:
    """Rows whose spread is zero or at rounding level relative to their magnitude."""
    scale = np.abs(x).max(axis=1)
    return np.ptp(x, axis=1) <= rtol * scale


def pearson_rows(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Pearson correlation per row; NaN when either row is constant."""
    ok = ~constant_rows(x) & ~constant_rows(y)
    x = x - x.mean(axis=1, keepdims=True)
    y = y - y.mean(axis=1, keepdims=True)
    den = np.sqrt((x * x).sum(axis=1) * (y * y).sum(axis=1))
    ok &= den > 0
    out = np.full(x.shape[0], np.nan)
    out[ok] = np.clip((x * y).sum(axis=1)[ok] / den[ok], -1.0, 1.0)
    return out


def random_subsets(
    n_tiles: int, n_pixels: int, size: int, runs: int, seed: int, tile_ids: np.ndarray | None = None
) -> np.ndarray:
    """(N, runs, size) random pixel subsets, drawn per tile from ``[seed, tile, 11]`` (so the draw of a tile
    does not depend on which other tiles are scored)."""
    ids = np.arange(n_tiles) if tile_ids is None else np.asarray(tile_ids)
    out = np.empty((len(ids), runs, size), dtype=np.int64)
    for j, i in enumerate(ids):
        keys = np.random.default_rng([int(seed), int(i), 11]).random((runs, n_pixels))
        out[j] = np.argpartition(keys, size - 1, axis=1)[:, :size]
    return out


def subset_drop_correlation_scores(
    prob_fn: ProbFn,
    images: np.ndarray,
    targets: np.ndarray,
    attributions: np.ndarray,
    baseline: np.ndarray,
    subsets: np.ndarray,
    chunk_bytes: int = CHUNK_BYTES,
) -> tuple[np.ndarray, np.ndarray]:
    """(attribution sums over each subset, score drops f(x) - f(x with the subset set to the baseline)),
    both (N, runs), batched over tiles and runs."""
    sums = subset_attribution_sums(attributions, subsets)
    return sums, subset_score_drops(prob_fn, images, targets, baseline, subsets, chunk_bytes)


def subset_attribution_sums(attributions: np.ndarray, subsets: np.ndarray) -> np.ndarray:
    """(N, runs) sums of each tile's attribution over its random pixel subsets (N, runs, size)."""
    a = np.asarray(attributions, dtype=np.float64)
    a = a.reshape(a.shape[0], -1)
    return np.take_along_axis(a[:, None, :].repeat(subsets.shape[1], 1), subsets, axis=2).sum(axis=2)


def subset_score_drops(
    prob_fn: ProbFn,
    images: np.ndarray,
    targets: np.ndarray,
    baseline: np.ndarray,
    subsets: np.ndarray,
    chunk_bytes: int = CHUNK_BYTES,
) -> np.ndarray:
    """Score drops f(x) - f(x with the subset set to the baseline), (N, runs): the model's half of
    :func:`subset_drop_correlation_scores`, which does not depend on the attributions."""
    images = np.asarray(images, dtype=np.float32)
    baseline = np.asarray(baseline, dtype=np.float32)
    n, c, h, w = images.shape
    p = h * w
    runs = subsets.shape[1]
    base_scores = prob_fn(images)[np.arange(n), targets]
    drops = np.empty((n, runs))
    tiles = max(1, int(chunk_bytes // (runs * c * p * 4)))
    for start in range(0, n, tiles):
        sl = slice(start, min(n, start + tiles))
        t = sl.stop - sl.start
        sel = np.zeros((t, runs, p), dtype=bool)
        np.put_along_axis(sel, subsets[sl], True, axis=2)
        stack = np.where(sel.reshape(t, runs, 1, h, w), baseline[sl][:, None], images[sl][:, None])
        probs = prob_fn(stack.reshape(t * runs, c, h, w))
        scores = probs[np.arange(t * runs), np.repeat(targets[sl], runs)].reshape(t, runs)
        drops[sl] = base_scores[sl][:, None] - scores
    return drops


# -- runners --------------------------------------------------------------------------------------------
_FAITH_DOC = {
    "baseline": "replacement for perturbed pixels: twin (structure-free twin), zero, mean (the tile's "
    "band means), blur (Gaussian-blurred tile)",
    "steps": "number of perturbation steps (the curve has steps+1 points)",
    "blur_sigma": "Gaussian sigma in pixels for the blur baseline",
}
_FAITH_FIELDS = {
    "baseline": Field("str", "twin", choices=BASELINES, doc=_FAITH_DOC["baseline"]),
    "steps": Field("int", 20, low=1, high=10_000, doc=_FAITH_DOC["steps"]),
    "blur_sigma": Field("number", BLUR_SIGMA, low=0.0, high=1e4, doc=_FAITH_DOC["blur_sigma"]),
}
_PETSIUK = "Petsiuk, Das, Saenko. RISE: randomized input sampling for explanation of black-box models. BMVC 2018."
_SAMEK = (
    "Samek, Binder, Montavon, Lapuschkin, Mueller. Evaluating the visualization of what a deep neural "
    "network has learned. IEEE TNNLS 2017."
)


def _twin_missing(inputs: MetricInputs, settings: dict[str, Any]) -> str | None:
    if settings["baseline"] == "twin" and inputs.twins is None:
        return "needs twins for the 'twin' baseline (no twins given; choose baseline zero, mean or blur)"
    return None


def _prob_fn(inputs: MetricInputs) -> ProbFn:
    assert inputs.model is not None
    return model_scorer(inputs.model)


def _curves(inputs: MetricInputs, settings: dict[str, Any], mode: str, morf: bool) -> np.ndarray:
    """Per-tile curves (N, steps+1), NaN rows for tiles with non-finite attributions; cached on the inputs
    so deletion-auc and aopc-morf share one pass."""
    steps = int(settings["steps"])
    key = inputs.cache_key(
        "curve", mode, morf, settings["baseline"], steps, float(settings["blur_sigma"]), id(inputs.twins)
    )
    if key in inputs._cache:
        return inputs._cache[key]
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    n = inputs.n_tiles
    out = np.full((n, steps + 1), np.nan)
    if good.size:
        images = np.asarray(inputs.images, dtype=np.float32)[good]
        twins = None if inputs.twins is None else np.asarray(inputs.twins)[good]
        base = make_baseline(images, settings["baseline"], twins, float(settings["blur_sigma"]), where="metric")
        order_key = inputs.cache_key("pixel-order", morf)  # deletion and insertion share the MoRF order
        if order_key not in inputs._cache:
            attributions = np.asarray(inputs.attributions)[good]
            inputs._cache[order_key] = pixel_order(attributions, inputs.seed, most_relevant_first=morf, tile_ids=good)
        order = inputs._cache[order_key]
        out[good] = perturbation_curves(
            _prob_fn(inputs), images, np.asarray(inputs.targets)[good], base, order, steps, mode
        )
    inputs._cache[key] = out
    return out


def _faith_runner(
    key: str, mode: str, morf: bool, summary: Callable[[np.ndarray], np.ndarray], curve_name: str
) -> Callable[..., MetricResult]:
    def run(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
        missing = _twin_missing(inputs, settings)
        if missing:
            return nan_result(get_metric(key), inputs, truth, missing, settings)
        curves = _curves(inputs, settings, mode, morf)
        values = np.full(inputs.n_tiles, np.nan)
        ok = np.isfinite(curves).all(axis=1)
        values[ok] = summary(curves[ok])
        reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(~ok)}
        return tile_result(key, truth, values, reasons, settings, curves={curve_name: curves.copy()})

    return run


_FAITH: dict[str, Any] = dict(
    family="response", needs=("model", "twins"), per_tile=True, settings=_FAITH_FIELDS, settings_doc=_FAITH_DOC
)

register_metric(
    "deletion-auc",
    definition="area under the target score as the most relevant pixels are replaced by the baseline",
    citation=_PETSIUK,
    value_range=(0, 1),
    higher_is_better=False,
    **_FAITH,
)(_faith_runner("deletion-auc", "deletion", True, curve_auc, "deletion"))
register_metric(
    "insertion-auc",
    definition="area under the target score as the most relevant pixels are restored into the baseline",
    citation=_PETSIUK,
    value_range=(0, 1),
    higher_is_better=True,
    **_FAITH,
)(_faith_runner("insertion-auc", "insertion", True, curve_auc, "insertion"))
register_metric(
    "aopc-morf",
    definition="mean drop of the target score over steps, most relevant pixels perturbed first",
    citation=_SAMEK,
    value_range=(-1, 1),
    higher_is_better=True,
    **_FAITH,
)(_faith_runner("aopc-morf", "deletion", True, aopc, "deletion"))
register_metric(
    "aopc-lerf",
    definition="mean drop of the target score over steps, least relevant pixels perturbed first",
    citation=_SAMEK,
    value_range=(-1, 1),
    higher_is_better=False,
    **_FAITH,
)(_faith_runner("aopc-lerf", "deletion", False, aopc, "deletion-lerf"))


@register_metric(
    "subset-drop-corr",
    definition="Pearson correlation, over random pixel subsets, of the attribution sum and the score drop "
    "when the subset is set to the baseline",
    citation="Bhatt, Weller, Moura. Evaluating and aggregating feature-based model explanations. IJCAI 2020.",
    value_range=(-1, 1),
    higher_is_better=True,
    family="response",
    needs=("model", "twins"),
    per_tile=True,
    settings={
        "baseline": _FAITH_FIELDS["baseline"],
        "fraction": Field("number", 0.1, low=0.0, high=1.0, low_open=True, doc="share of the pixels per subset"),
        "runs": Field("int", 32, low=2, high=100_000, doc="random subsets per tile"),
        "blur_sigma": _FAITH_FIELDS["blur_sigma"],
    },
    settings_doc={
        "baseline": _FAITH_DOC["baseline"],
        "fraction": "share of the tile's pixels in each subset",
        "runs": "random subsets per tile",
        "blur_sigma": _FAITH_DOC["blur_sigma"],
    },
)
def _subset_drop_corr(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "subset-drop-corr"
    missing = _twin_missing(inputs, settings)
    if missing:
        return nan_result(get_metric(key), inputs, truth, missing, settings)
    n = inputs.n_tiles
    h, w = np.shape(inputs.attributions)[1:]
    size = max(1, int(round(float(settings["fraction"]) * h * w)))
    runs = int(settings["runs"])
    bad = bad_attribution_tiles(inputs.attributions)
    good = np.flatnonzero(~bad)
    values = np.full(n, np.nan)
    reasons = {int(i): NONFINITE_REASON for i in np.flatnonzero(bad)}
    if good.size:
        subsets = random_subsets(n, h * w, size, runs, inputs.seed, tile_ids=good)

        def drops_of_model() -> np.ndarray:  # the same for every explainer of the model: shared
            images = np.asarray(inputs.images, dtype=np.float32)[good]
            twins = None if inputs.twins is None else np.asarray(inputs.twins)[good]
            base = make_baseline(images, settings["baseline"], twins, float(settings["blur_sigma"]), where="metric")
            return subset_score_drops(_prob_fn(inputs), images, np.asarray(inputs.targets)[good], base, subsets)

        drops = inputs.shared_work(
            drops_of_model, key, settings["baseline"], float(settings["blur_sigma"]), size, runs, good.tobytes()
        )
        sums = subset_attribution_sums(np.asarray(inputs.attributions)[good], subsets)
        corr = pearson_rows(sums, drops)
        values[good] = corr
        for j in np.flatnonzero(~np.isfinite(corr)):
            i = int(good[j])
            if constant_rows(sums[j : j + 1])[0]:
                reasons[i] = "attribution sums are equal over all subsets (constant attribution): correlation undefined"
            else:
                reasons[i] = "the model's score did not change over the subsets: correlation undefined"
    return tile_result(key, truth, values, reasons, settings)


# -- explainer self-checks ----------------------------------------------------------------------------------
COMPLETENESS_WARN = 0.05  # a gap above 5% of the score change is reported


def completeness_warning(values: np.ndarray, limit: float = COMPLETENESS_WARN) -> str | None:
    """A warning text when any tile's completeness gap exceeds ``limit`` (a share of the score change)."""
    v = np.asarray(values, dtype=np.float64)
    bad = np.isfinite(v) & (v > limit)
    if not bad.any():
        return None
    return (
        f"completeness gap above {limit:.0%} of the score change on {int(bad.sum())} of {int(np.isfinite(v).sum())} "
        f"tiles (largest {np.nanmax(v):.1%}, median {np.nanmedian(v):.1%}): the map's total does not equal the "
        "model's change from the baseline (more integration steps, or a model whose non-linearities captum "
        "can follow, narrow it)"
    )


@register_metric(
    "completeness-gap",
    definition="|sum of the attributions - (f(tile) - f(baseline))| / |f(tile) - f(baseline)| of the target "
    "logit: the explainer's own completeness error (captum's convergence delta), integrated gradients and "
    "DeepLIFT only",
    citation="Sundararajan, Taly, Yan. Axiomatic attribution for deep networks. ICML 2017 (completeness); "
    "Shrikumar, Greenside, Kundaje. ICML 2017 (summation-to-delta).",
    value_range=(0, np.inf),
    higher_is_better=False,
    family="response",
    needs=(),
    per_tile=True,
)
def _completeness_gap(inputs: MetricInputs, truth: str, settings: dict[str, Any]) -> MetricResult:
    key = "completeness-gap"
    checks = inputs.self_checks or {}
    if key not in checks:
        spec = get_metric(key)
        reason = "the explainer records no completeness gap (only integrated-gradients and deeplift do)"
        return nan_result(spec, inputs, truth, reason, settings)
    values = np.asarray(checks[key], dtype=np.float64).reshape(-1)[: inputs.n_tiles]
    reasons = {
        int(i): "the target logit barely changes from the baseline to the tile: relative gap undefined"
        for i in np.flatnonzero(~np.isfinite(values))
    }
    warning = completeness_warning(values)
    return tile_result(key, truth, values, reasons, {**settings, **({"warning": warning} if warning else {})})
