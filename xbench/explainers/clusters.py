"""``activation-clusters``: candidate concepts as Gaussian-mixture clusters of a layer's per-position
activation vectors, each tested by replacing it inside the network (in the spirit of Ghorbani et al. 2019,
with clusters found by EM, Dempster et al. 1977).

Steps (any torch model whose chosen layer outputs a (N, K, h, w) map: plain conv stacks, residual and
U-shaped networks alike, since only a forward hook on the named layer is used):

1. Collect the layer's activation vectors at every position of the fitting set (``context.fit_images``;
   correctly classified tiles), subsampled to ``max_positions``.
2. If the layer is wider than ``pca_components`` channels, reduce with PCA (scikit-learn).
3. Fit a Gaussian mixture by EM (scikit-learn ``GaussianMixture``); ``n_clusters`` is an integer or
   ``"bic"`` (the k in ``cluster_range`` with the lowest BIC).
4. Assign every position of every explained tile (and of the fitting set) to a cluster.
5. For each tile and cluster, replace the cluster's activation vectors by a baseline (``fit-mean``: the
   fitting set's mean activation vector; or ``zero``) inside a forward hook and record the drop of every
   class score (``score``: probability by default, or logit).

Outputs
- attributions: for each tile, the cluster map with each position carrying the drop of the tile's target
  score when its cluster is replaced, upsampled (bilinear) to the input size.
- Overlap: IoU = |cluster & type| / |cluster | type| and purity = |cluster & type| / |cluster| over all
  cells of the fitting set (``fit_masks``; else the explained tiles' ``masks``) at the layer's resolution,
  a cell counting for a type when the type covers any of its pixels (when the tile size is not a multiple
  of the layer's, over pixels with the cluster maps upsampled by nearest neighbour), for every
  (cluster, type): ``extras['overlap_rows']`` and the matrices
  ``iou`` / ``purity`` (n_clusters, K). A cluster is *labelled* with the type of best IoU only when that
  IoU is at least ``min_iou`` (default 0.2); below it the cluster stands for no type.
- ConceptReport rows, one per (cluster, class) for the classes among the targets: ``score`` = mean drop
  of that class's score when the cluster is replaced, over the tiles *of that class* where the cluster
  occurs (positive = the cluster supports the class), ``spread`` = its standard deviation, ``p_value`` =
  two-sided one-sample t-test of those drops against 0 (scipy), Bonferroni-adjusted over the clusters
  (min(1, p * n_clusters); None with fewer than two tiles), ``matched_type`` = the label (None below
  ``min_iou``), ``iou`` / ``purity`` = the cluster's overlap with its best-overlapping type (given even
  when it is below ``min_iou``, so a weak match stays visible).
- ``type_importance[t]`` is taken on the class t is meant to drive (the class whose label rule uses t,
  ``context.driving_types``; a type that drives no class: every class some type drives, keeping the
  largest): the mean drop of that class's score when the cluster labelled t (best IoU >= ``min_iou``) is
  replaced, over that class's tiles where it occurs; 0 when no cluster is labelled t (the method found no
  concept for it). ``flagged[t]``: that mean drop is significant (two-sided one-sample t-test over the
  tiles, Bonferroni over the types, level ``alpha``) and positive: the flagging rule shared by every family
  (xbench/metrics/concepts.py), with the practical floor of the truth's relied-on rule (a drop of at
  least ``min_drop`` = 0.02 in probability, as ``Reliance.relied_types``), since a consistent but
  negligible drop is not "use". ``extras['type_samples'][t]`` holds the
  per-tile drops behind it.
- extras (also attributes of the report): ``cluster_maps`` int (N, h, w) of the explained tiles,
  ``score_changes`` (n_clusters, N, n_classes) = drop of class j's score (original minus replaced) on
  tile i, NaN unless tile i is of class j and holds the cluster (the samples behind the rows),
  ``all_drops`` the same for every tile and class (0 where the cluster is absent), ``fit_cluster_maps``,
  ``matched_types``, ``mask_names``, ``class_names``, ``n_clusters``, ``bic``, ``layer``.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import torch
from scipy import stats
from sklearn.decomposition import PCA
from sklearn.mixture import GaussianMixture

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    LAYER_FIELD,
    ConceptReport,
    FitCache,
    LayerTap,
    as_tensor,
    batches,
    fit_content_key,
    layer_activations,
    nearest_index_upsample,
    signed_maps,
    upsample,
)
from xbench.explainers.concept_sets import classes_of_type
from xbench.explainers.registry import register_explainer
from xbench.models.base import one_blas_thread
from xbench.schema import Field, Where

CITE_CLUSTERS = (
    "Ghorbani, Wexler, Zou, Kim. Towards automatic concept-based explanations. NeurIPS 2019; "
    "Gaussian mixtures by EM: Dempster, Laird, Rubin. J. Royal Statistical Society B, 1977."
)
KEY = "activation-clusters"


def _positions(acts: np.ndarray) -> np.ndarray:
    """(N, K, h, w) -> (N*h*w, K) float64."""
    n, k, h, w = acts.shape
    return acts.transpose(0, 2, 3, 1).reshape(-1, k).astype(np.float64)


def _fit_mixture(
    x: np.ndarray, n_clusters, cluster_range, covariance: str, seed: int
) -> tuple[GaussianMixture, dict[int, float]]:
    candidates: range | list[int]
    if n_clusters == "bic":
        lo, hi = cluster_range
        candidates = range(lo, hi + 1)
    else:
        candidates = [int(n_clusters)]
    best, best_bic, bics = None, np.inf, {}
    for k in candidates:
        if k > x.shape[0]:
            break
        gm = GaussianMixture(
            n_components=k, covariance_type=covariance, reg_covar=1e-4, n_init=1, max_iter=200, random_state=seed
        )
        with one_blas_thread():  # tiny problems: BLAS threads only add contention
            gm.fit(x)
            bic = float(gm.bic(x))
        bics[k] = bic
        if best is None or bic < best_bic:
            best, best_bic = gm, bic
    if best is None:
        raise XbenchInputError(
            f"explainer '{KEY}'",
            "too few activation positions to fit the mixture",
            expected=f"at least {min(candidates)} positions",
            found=x.shape[0],
        )
    return best, bics


def _overlap(cluster_maps: np.ndarray, masks: np.ndarray, n_clusters: int) -> tuple[np.ndarray, np.ndarray]:
    """IoU and purity (n_clusters, K) of each upsampled cluster region against each planted type."""
    n, k_types, h, w = masks.shape
    ch, cw = cluster_maps.shape[1:]
    if h % ch == 0 and w % cw == 0:
        # at the layer's resolution: a cell belongs to a type when the type covers any of its pixels
        # (a cluster cannot be thinner than one cell, so a thin road is compared with the cells it crosses)
        full = cluster_maps
        masks = np.asarray(masks.reshape(n, k_types, ch, h // ch, cw, w // cw).any(axis=(3, 5)))
    else:
        full = nearest_index_upsample(cluster_maps, (h, w))
    m = masks.transpose(1, 0, 2, 3).reshape(k_types, -1)
    type_area = m.sum(axis=1).astype(np.float64)
    iou = np.zeros((n_clusters, k_types))
    purity = np.zeros((n_clusters, k_types))
    flat = full.reshape(-1)
    for c in range(n_clusters):
        region = flat == c
        area = region.sum()
        if area == 0:
            continue
        inter = (m & region[None]).sum(axis=1).astype(np.float64)
        union = area + type_area - inter
        iou[c] = np.divide(inter, union, out=np.zeros_like(inter), where=union > 0)
        purity[c] = inter / area
    return iou, purity


def _ttest(d: np.ndarray) -> float | None:
    """Two-sided one-sample t-test of d against 0 (scipy); None with fewer than 2 values."""
    if d.size < 2:
        return None
    if np.ptp(d) == 0:
        return 1.0 if d[0] == 0 else 0.0
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # near-identical drops: a precision note only
        p = float(stats.ttest_1samp(d, 0.0).pvalue)
    return p if np.isfinite(p) else 1.0


def _n_clusters(value: Any, where: Where) -> Any:
    if value == "bic":
        return value
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise where.error("not an allowed value", expected="'bic' or an integer >= 1", found=value)
    return value


def _ordered(value: list[int], where: Where) -> list[int]:
    if value[0] > value[1]:
        raise where.error("low above high", expected="[k_min, k_max] with k_min <= k_max", found=value)
    return value


# Fitted cluster models of this process, by (model weights, layer, fitting set, seed, fit settings).
_FITS = FitCache()


def _fit_clusters(
    model, layer, context, bs, n_clusters, cluster_range, pca_components, covariance, max_positions
) -> tuple[np.ndarray, PCA | None, GaussianMixture, dict[int, float], np.ndarray]:
    """Steps 1-3 and the fitting set's cluster maps: (fit activations, PCA or None, mixture, BIC per k,
    fit cluster maps (N_fit, h, w))."""
    seed = int(context.seed)
    fit_acts = layer_activations(KEY, model, layer, context.fit_images, bs)
    _, width, h, w = fit_acts.shape
    fit_x = _positions(fit_acts)
    rng = context.rng(stream=3)
    sample = (
        fit_x
        if fit_x.shape[0] <= max_positions
        else fit_x[np.sort(rng.choice(fit_x.shape[0], max_positions, replace=False))]
    )
    pca = None
    if width > pca_components:
        with one_blas_thread():  # tiny problems: BLAS threads only add contention
            pca = PCA(n_components=pca_components, random_state=seed).fit(sample)

    def project(x: np.ndarray) -> np.ndarray:
        return pca.transform(x) if pca is not None else x

    gm, bics = _fit_mixture(project(sample), n_clusters, tuple(cluster_range), covariance, seed)
    with one_blas_thread():
        fit_maps = gm.predict(project(fit_x)).reshape(-1, h, w)
    return fit_acts, pca, gm, bics, fit_maps


@register_explainer(
    KEY,
    citation=CITE_CLUSTERS,
    needs={"layer", "fit-set"},
    kind="concept",
    settings={
        "layer": LAYER_FIELD,
        "n_clusters": Field("any", "bic", check=_n_clusters, doc="'bic' (chosen in cluster_range) or a count"),
        "cluster_range": Field(
            "list",
            [2, 8],
            item=Field("int", low=1),
            min_len=2,
            max_len=2,
            check=_ordered,
            doc="[k_min, k_max]",
        ),
        "pca_components": Field("int", 8, low=1, doc="PCA components of the activation vectors"),
        "covariance": Field("str", "full", choices=("full", "diag", "tied", "spherical"), doc="mixture covariance"),
        "max_positions": Field("int", 4000, low=2, doc="activation vectors sampled for the fit at most"),
        "baseline": Field("str", "fit-mean", choices=("fit-mean", "zero"), doc="what replaces a cluster's vectors"),
        "score": Field("str", "probability", choices=("probability", "logit"), doc="the score whose drop counts"),
        "alpha": Field("number", 0.05, low=0.0, high=1.0, low_open=True, doc="level of the per-cluster drop test"),
        "min_drop": Field("number", 0.02, low=0.0, doc="smallest mean score drop that makes a cluster matter"),
        "min_iou": Field("number", 0.2, low=0.0, high=1.0, doc="IoU with a structure type for a cluster's label"),
    },
    description="Gaussian-mixture clusters of a layer's activation vectors (fitting set), "
    "each replaced by a baseline inside the network; attribution = cluster "
    "maps weighted by the target-score drop; reports IoU/purity per type",
)
@signed_maps(True)
def activation_clusters(
    model,
    images,
    targets,
    context,
    *,
    layer,
    n_clusters,
    cluster_range,
    pca_components,
    covariance,
    max_positions,
    baseline,
    score,
    alpha,
    min_drop,
    min_iou,
):
    seed = int(context.seed)
    bs = context.batch_size

    # 1-3: fit the mixture on the fitting set's activation vectors (once per model state, layer, fitting set,
    # seed and fit settings in a process: metrics re-run the explainer on the same model many times)
    settings = (layer, seed, n_clusters, tuple(cluster_range), pca_components, covariance, max_positions)
    fit_key = None if context.fit_images is None else fit_content_key(model, [context.fit_images], settings)
    fitted = _FITS.get_or_fit(
        fit_key,
        lambda: _fit_clusters(
            model, layer, context, bs, n_clusters, cluster_range, pca_components, covariance, max_positions
        ),
    )
    fit_acts, pca, gm, bics, fit_maps = fitted
    _, width, h, w = fit_acts.shape

    def assign(x: np.ndarray) -> np.ndarray:
        with one_blas_thread():  # tiny problems: BLAS threads only add contention
            return gm.predict(pca.transform(x) if pca is not None else x)

    k = int(gm.n_components)

    # 4: assign positions
    acts = layer_activations(KEY, model, layer, images, bs)
    if acts.shape[1:] != fit_acts.shape[1:]:
        raise XbenchInputError(
            f"explainer '{KEY}': layer '{layer}'",
            "feature map size differs between the fitting set and the explained tiles",
            expected=fit_acts.shape[1:],
            found=acts.shape[1:],
        )
    n = images.shape[0]
    cluster_maps = assign(_positions(acts)).reshape(n, h, w)
    base_vec = fit_acts.mean(axis=(0, 2, 3)) if baseline == "fit-mean" else np.zeros(width, np.float32)
    base_t = torch.from_numpy(base_vec.astype(np.float32))[None, :, None, None]

    # 5: replace each cluster inside the network; record every class score's drop
    drops = np.zeros((k, n, model.n_classes), dtype=np.float64)
    current: dict[str, torch.Tensor | None] = {"mask": None}

    def replace(out: torch.Tensor) -> torch.Tensor:
        m = current["mask"]
        if m is None:
            return out
        return torch.where(m[:, None], base_t.to(out.dtype), out)

    def scores(logits: torch.Tensor) -> np.ndarray:
        if score == "probability":
            return torch.softmax(logits.double(), dim=1).numpy()
        return logits.double().numpy()

    with LayerTap(KEY, model, layer, mode="read", replace=replace) as t, torch.no_grad():
        for sl in batches(n, bs):
            x = as_tensor(images[sl])
            current["mask"] = None
            s0 = scores(t.forward(x))
            maps = torch.from_numpy(cluster_maps[sl])
            for c in range(k):
                present = (cluster_maps[sl] == c).reshape(x.shape[0], -1).any(axis=1)
                if not present.any():
                    continue
                present_rows = np.flatnonzero(present)
                current["mask"] = maps[present_rows] == c
                drops[c, np.arange(sl.start, sl.stop)[present_rows]] = s0[present_rows] - scores(
                    t.forward(x[present_rows])
                )
            current["mask"] = None

    # attribution: each position carries its cluster's target-score drop
    target_drop = drops[:, np.arange(n), targets]  # (k, n)
    low = target_drop[cluster_maps, np.arange(n)[:, None, None]]  # (n, h, w)
    attributions = upsample(low.astype(np.float32), images.shape[2:], "bilinear")

    # overlap with planted types
    names = list(context.mask_names) if context.mask_names is not None else []
    if context.fit_masks is not None:
        iou, purity = _overlap(fit_maps, np.asarray(context.fit_masks, bool), k)
    elif context.masks is not None:
        iou, purity = _overlap(cluster_maps, np.asarray(context.masks, bool), k)
    else:  # no masks: no type to compare with (an empty type axis, so nothing below is matched)
        iou = purity = np.zeros((k, 0))
        names = []
    has_overlap = context.fit_masks is not None or context.masks is not None

    class_names = (
        list(context.class_names) if context.class_names is not None else [str(i) for i in range(model.n_classes)]
    )
    present_all = np.stack([(cluster_maps == c).reshape(n, -1).any(axis=1) for c in range(k)])  # (k, n)
    # the samples of the per-class importance: class j's drop on the tiles of class j where c occurs
    class_drops = np.full_like(drops, np.nan)
    for j in np.unique(targets):
        sel = present_all & (targets == j)[None, :]
        class_drops[:, :, j] = np.where(sel, drops[:, :, j], np.nan)
    best_type = np.argmax(iou, axis=1) if iou.shape[1] else None
    matched: list[str | None] = [
        names[int(best_type[c])] if best_type is not None and iou[c, best_type[c]] >= max(min_iou, 1e-12) else None
        for c in range(k)
    ]
    rows = []
    for c in range(k):
        for cls in np.unique(targets):
            d = class_drops[c, :, cls]
            d = d[np.isfinite(d)]
            p = _ttest(d)
            rows.append(
                {
                    "concept": f"cluster-{c}",
                    "class_name": class_names[int(cls)] if int(cls) < len(class_names) else str(int(cls)),
                    "score": float(d.mean()) if d.size else None,
                    "spread": float(d.std(ddof=1)) if d.size > 1 else None,
                    "p_value": None if p is None else min(1.0, p * k),  # Bonferroni over the clusters
                    "matched_type": matched[c],
                    "iou": float(iou[c, best_type[c]]) if best_type is not None else None,
                    "purity": float(purity[c, best_type[c]]) if best_type is not None else None,
                }
            )
    overlap_rows = [
        {"concept": f"cluster-{c}", "type": t, "iou": float(iou[c, j]), "purity": float(purity[c, j])}
        for c in range(k)
        for j, t in enumerate(names)
    ]

    # per type: the cluster matched to it (best IoU, at least min_iou), its drop on the class the type drives
    importance: dict[str, float] = {}
    flagged: dict[str, bool] = {}
    samples: dict[str, np.ndarray] = {}
    type_class: dict[str, str] = {}
    classes = [int(j) for j in np.unique(targets)]
    for j, name in enumerate(names):
        c = int(np.argmax(iou[:, j]))
        candidates = [q for q in classes_of_type(name, context.driving_types, classes) if q in classes]
        if not candidates:
            continue  # no explained tile of the class it drives: not assessable
        best = None
        for q in candidates:
            if iou[c, j] < min_iou or iou[c, j] == 0:
                d = np.zeros(0)  # no cluster stands for the type: no evidence that it is used
            else:
                d = class_drops[c, :, q]
                d = d[np.isfinite(d)]
            mean = float(d.mean()) if d.size else 0.0
            p = _ttest(d)
            hit = bool(p is not None and p * max(len(names), 1) < alpha and mean >= max(min_drop, 1e-12))
            if best is None or (hit, mean) > (best[1], best[0]):
                best = (mean, hit, d, q)
        assert best is not None  # candidates is not empty, so the loop chose one
        importance[name], flagged[name], samples[name] = best[0], best[1], best[2]
        type_class[name] = class_names[best[3]] if best[3] < len(class_names) else str(best[3])

    report = ConceptReport(
        rows=rows,
        type_importance=importance,
        flagged=flagged,
        extras={
            "cluster_maps": cluster_maps.astype(np.int64),
            "score_changes": class_drops.astype(np.float32),
            "all_drops": drops.astype(np.float32),
            "overlap_rows": overlap_rows,
            "matched_types": matched,
            "type_samples": samples,
            "type_class": type_class,
            "fit_cluster_maps": fit_maps.astype(np.int64),
            "iou": iou if has_overlap else None,
            "purity": purity if has_overlap else None,
            "mask_names": names,
            "class_names": class_names,
            "n_clusters": k,
            "bic": dict(bics),
            "layer": layer,
            "score": score,
            "baseline_vector": base_vec.astype(np.float32),
        },
    )
    return attributions, report
