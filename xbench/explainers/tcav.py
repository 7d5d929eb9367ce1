"""``tcav``: testing with concept activation vectors (Kim et al. 2018), written with scikit-learn and
scipy (captum's concept module trains and caches CAVs on disk through its own dataset classes; a
direct implementation on arrays is shorter and keeps everything in memory and seeded).

- Concept example sets come from ``context.concept_sets`` (see :mod:`xbench.explainers.concept_sets`):
  structure type -> tiles holding only that type, on varied backgrounds; ``random-0``, ``random-1``, ...
  -> random tiles. At least ``min_random`` (default 10) random sets are required.
- Features at the layer: ``pool = "mean"`` (default) averages the layer's (K, h, w) map over positions,
  so a CAV is a direction in channel space, independent of where the structure lies in the tile (the
  directional derivative is then that of the target logit when the direction is added at every position);
  ``pool = "none"`` uses the flattened map as in Kim et al. 2018.
- CAV: the unit normal of a logistic regression (scikit-learn, L2, ``regularization`` = C) separating the
  concept's activations from one random set's.
- TCAV score of a concept for class k: the fraction of explained tiles with target k whose directional
  derivative grad_A h_k . v_C is positive. Each concept is scored against every random set (one CAV each);
  ``score`` = mean over those, ``spread`` = standard deviation.
- Significance (``test``), two-sided t-tests (scipy ``ttest_ind``) against at least ``min_random`` random
  concepts. ``set`` (default): every random set in turn plays a concept against the other random sets
  (the CAV of set j against set i is minus that of i against j); its mean TCAV score is one draw from the
  null distribution of *set-level* scores, and the concept's mean score is tested against these draws
  (``ttest_ind`` with a sample of one: the t-test for one new observation). ``runs``: Kim et al. 2018's
  comparison of the concept's per-CAV scores with the per-CAV scores of ``random-0`` against the other
  random sets. Scores within one group share their positive set, so ``runs`` counts set-level luck as
  signal: in our random-versus-random trials (a random set posing as the concept) it came out significant
  in 45-70% of the trials at the 5% level, ``set`` in 0-7% (tests/test_explainers_concepts.py).
  ``p_value`` is Bonferroni-adjusted over the concepts tested for a class: min(1, p * n_concepts).
  Power: the score is a fraction of signs, so when the class gradient at the layer points the same way on
  most tiles (typically the last conv layer before global pooling and a linear head), random directions
  already score near 0 or 1 and no concept can stand out against ten random sets; use an earlier layer
  or more random sets.
- ``type_importance[type]``: the TCAV score over all explained tiles, each with its own target (the class
  score when all tiles share one target), centred: score - 0.5, so that 0 means no effect as for the
  other concept methods and the truth (the raw scores are in ``extras['tcav_scores']``);
  ``flagged[type]``: that score is above 0.5 and significant (Bonferroni over the concepts, level
  ``alpha``).
- Pixel attribution (documented choice): concept-presence maps at the layer, weighted by how much the
  concept pushes the tile's target. For each concept C with mean CAV v and random-set mean activation mu,
  presence(i, j) = relu(v . (A(i, j) - mu)) (per position; for ``pool = "none"`` with the position's own
  CAV slice); attribution = sum_C (TCAV_C(target) - 0.5) * presence_C, upsampled bilinearly. It is large
  where concepts that raise the target score appear, negative where concepts that lower it appear.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import torch
from scipy import stats
from sklearn.linear_model import LogisticRegression
from threadpoolctl import threadpool_limits

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    ConceptReport,
    LayerTap,
    as_numpy,
    as_tensor,
    backward_counted,
    batches,
    check_choice,
    check_float,
    check_int,
    layer_activations,
    signed_maps,
    upsample,
)
from xbench.explainers.registry import register_explainer

CITE_TCAV = (
    "Kim, Wattenberg, Gilmer, Cai, Wexler, Viegas, Sayres. Interpretability beyond feature "
    "attribution: quantitative testing with concept activation vectors (TCAV). ICML 2018."
)
KEY = "tcav"
_RANDOM = re.compile(r"random-(\d+)")


def split_sets(sets: dict[str, np.ndarray]) -> tuple[list[str], list[str]]:
    """(concept names in given order, random set names ordered by their number)."""
    randoms = sorted((k for k in sets if _RANDOM.fullmatch(k)), key=lambda k: int(k.split("-")[1]))
    concepts = [k for k in sets if not _RANDOM.fullmatch(k)]
    return concepts, randoms


def _features(acts: np.ndarray, pool: str) -> np.ndarray:
    if pool == "mean":
        return acts.mean(axis=(2, 3)).astype(np.float64)
    return acts.reshape(acts.shape[0], -1).astype(np.float64)


def _cav(pos: np.ndarray, neg: np.ndarray, regularization: float, seed: int) -> np.ndarray:
    """Unit normal of a logistic regression separating pos (1) from neg (0), pointing towards pos."""
    x = np.concatenate([pos, neg])
    y = np.concatenate([np.ones(len(pos)), np.zeros(len(neg))])
    scale = x.std(axis=0).mean() or 1.0  # a common scale keeps the solver well-conditioned
    clf = LogisticRegression(C=regularization, solver="liblinear", max_iter=2000, random_state=seed)
    with threadpool_limits(1):  # tiny problems: BLAS threads only add contention
        clf.fit(x / scale, y)
    v = clf.coef_[0] / scale
    norm = np.linalg.norm(v)
    return v / norm if norm > 0 else v


def _ttest_ind(a: np.ndarray, b: np.ndarray) -> float:
    """Two-sided two-sample t-test (scipy); constant samples give 1.0 (equal) or 0.0 (different)."""
    if np.ptp(a) == 0 and np.ptp(b) == 0:
        return 1.0 if a[0] == b[0] else 0.0
    if len(a) == 1 and np.ptp(b) == 0:
        return 1.0 if a[0] == b[0] else 0.0
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # near-identical samples: precision note only
        p = float(stats.ttest_ind(a, b).pvalue)
    return p if np.isfinite(p) else 1.0


@register_explainer(
    KEY,
    citation=CITE_TCAV,
    needs={"gradients", "layer", "concept-sets"},
    kind="concept",
    defaults={"layer": None, "pool": "mean", "regularization": 1.0, "test": "set", "alpha": 0.05, "min_random": 10},
    description="concept activation vectors from example sets (logistic regression at a "
    "layer); TCAV score per class and concept, t-test against >= 10 random "
    "concepts with Bonferroni; attribution = weighted concept-presence maps",
)
@signed_maps(True)  # concept presence weighted by (TCAV score - 0.5): negative for counter-evidence
def tcav(model, images, targets, context, *, layer, pool, regularization, test, alpha, min_random):
    pool = check_choice(KEY, "pool", pool, ("mean", "none"))
    test = check_choice(KEY, "test", test, ("set", "runs"))
    regularization = check_float(KEY, "regularization", regularization, 0.0, inclusive_min=False)
    alpha = check_float(KEY, "alpha", alpha, 0.0, 1.0, inclusive_min=False)
    min_random = check_int(KEY, "min_random", min_random, 2)
    sets = context.concept_sets
    concepts, randoms = split_sets(sets)
    if len(randoms) < min_random:
        raise XbenchInputError(
            f"explainer '{KEY}': context.concept_sets",
            "too few random sets",
            expected=f"at least {min_random} sets named random-0, random-1, ...",
            found=len(randoms),
        )
    if not concepts:
        raise XbenchInputError(
            f"explainer '{KEY}': context.concept_sets",
            "no concept sets",
            expected="structure type -> example tiles, besides the random sets",
            found=sorted(sets),
        )
    seed = int(context.seed)
    bs = context.batch_size
    n = images.shape[0]

    # gradients of each tile's target logit w.r.t. the layer, and the layer's activations
    grads, acts = [], []
    with LayerTap(KEY, model, layer, mode="grad") as t:
        for sl in batches(n, bs):
            x = as_tensor(images[sl])
            idx = torch.from_numpy(targets[sl])
            with torch.enable_grad(), backward_counted(model, x.shape[0]):
                logits = t.forward(x)
                (g,) = torch.autograd.grad(logits.gather(1, idx[:, None]).sum(), t.activation)
            grads.append(as_numpy(g))
            acts.append(as_numpy(t.activation))
    grads_a, acts_a = np.concatenate(grads), np.concatenate(acts)
    gfeat = grads_a.sum(axis=(2, 3)).astype(np.float64) if pool == "mean" else grads_a.reshape(n, -1).astype(np.float64)

    feats, raw = {}, {}
    for name in concepts + randoms:
        a = layer_activations(KEY, model, layer, sets[name], bs)
        if pool == "none" and a.shape[1:] != acts_a.shape[1:]:
            raise XbenchInputError(
                f"explainer '{KEY}': context.concept_sets['{name}']",
                "layer map size differs from the explained tiles' (pool = 'none' needs equal sizes)",
                expected=acts_a.shape[1:],
                found=a.shape[1:],
            )
        raw[name] = a
        feats[name] = _features(a, pool)

    classes = np.unique(targets)

    def scores(v: np.ndarray) -> tuple[np.ndarray, float]:
        positive = (gfeat @ v) > 0
        per_class = np.array([positive[targets == k].mean() for k in classes])
        return per_class, float(positive.mean())

    def mean_scores_of(pos: np.ndarray, negs: list[str], salt: int) -> tuple[np.ndarray, np.ndarray, list]:
        """TCAV scores of the CAVs of ``pos`` (features) against each random set in ``negs``."""
        per_class, pooled, vs = [], [], []
        for i, neg in enumerate(negs):
            v = _cav(pos, feats[neg], regularization, seed + salt + i)
            pc, pl = scores(v)
            per_class.append(pc)
            pooled.append(pl)
            vs.append(v)
        return np.array(per_class), np.array(pooled), vs  # (runs, classes), (runs,)

    # random versus random: each random set in turn plays a concept against the other random sets
    n_r = len(randoms)
    pair_class = np.full((n_r, n_r, len(classes)), np.nan)
    pair_pooled = np.full((n_r, n_r), np.nan)
    for i in range(n_r):
        for j in range(i + 1, n_r):
            v = _cav(feats[randoms[i]], feats[randoms[j]], regularization, seed + 1000 + i * n_r + j)
            pair_class[i, j], pair_pooled[i, j] = scores(v)
            pair_class[j, i], pair_pooled[j, i] = scores(-v)  # the CAV of j against i points the other way
    null_class = np.nanmean(pair_class, axis=1)  # (n_r, classes): each random set's mean score
    null_pooled = np.nanmean(pair_pooled, axis=1)
    kim_class, kim_pooled = pair_class[0, 1:], pair_pooled[0, 1:]  # random-0 against the others

    def pvalue(c_runs: np.ndarray, null: np.ndarray, kim: np.ndarray) -> float:
        if test == "set":
            return _ttest_ind(np.array([c_runs.mean()]), null)
        return _ttest_ind(c_runs, kim)

    class_names = (
        list(context.class_names) if context.class_names is not None else [str(i) for i in range(model.n_classes)]
    )
    m_tests = len(concepts)  # Bonferroni family: the concepts tested for one class
    rows, importance, flagged, mean_scores, cavs, pooled_scores = [], {}, {}, {}, {}, {}
    for concept in concepts:
        c_class, c_pooled, vs = mean_scores_of(feats[concept], randoms, 0)
        for j, k in enumerate(classes):
            p = pvalue(c_class[:, j], null_class[:, j], kim_class[:, j])
            rows.append(
                {
                    "concept": concept,
                    "class_name": class_names[int(k)] if int(k) < len(class_names) else str(int(k)),
                    "score": float(c_class[:, j].mean()),
                    "spread": float(c_class[:, j].std(ddof=1)),
                    "p_value": min(1.0, p * m_tests),
                    "matched_type": concept,
                    "iou": None,
                    "purity": None,
                }
            )
        p_pooled = min(1.0, pvalue(c_pooled, null_pooled, kim_pooled) * m_tests)
        pooled_scores[concept] = float(c_pooled.mean())
        importance[concept] = pooled_scores[concept] - 0.5  # signed: 0 = no effect (as clusters, truth)
        flagged[concept] = bool(p_pooled < alpha and c_pooled.mean() > 0.5)
        mean_scores[concept] = c_class.mean(axis=0)
        v = np.mean(vs, axis=0)
        cavs[concept] = v / (np.linalg.norm(v) or 1.0)

    # pixel attribution: concept presence maps weighted by (TCAV score for the tile's target - 0.5)
    mu = np.concatenate([raw[r] for r in randoms])
    mu = mu.mean(axis=(0, 2, 3)) if pool == "mean" else mu.mean(axis=0)
    class_pos = {int(k): j for j, k in enumerate(classes)}
    low = np.zeros((n,) + acts_a.shape[2:], dtype=np.float64)
    for concept in concepts:
        v = cavs[concept]
        centred = acts_a - (mu[None, :, None, None] if pool == "mean" else mu[None])
        if pool == "mean":
            presence = np.einsum("nkij,k->nij", centred, v)
        else:
            presence = (centred * v.reshape(acts_a.shape[1:])[None]).sum(axis=1)
        weight = np.array([mean_scores[concept][class_pos[int(k)]] - 0.5 for k in targets])
        low += weight[:, None, None] * np.maximum(presence, 0.0)
    attributions = upsample(low.astype(np.float32), images.shape[2:], "bilinear")

    report = ConceptReport(
        rows=rows,
        type_importance=importance,
        flagged=flagged,
        extras={
            "layer": layer,
            "pool": pool,
            "n_random": len(randoms),
            "cavs": cavs,
            "test": test,
            "null_scores": null_class,
            "tcav_scores": pooled_scores,
            "classes": [int(k) for k in classes],
            "class_names": class_names,
        },
    )
    return attributions, report
