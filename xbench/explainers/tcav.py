"""``tcav``: testing with concept activation vectors (Kim et al. 2018), written with scikit-learn and
scipy (captum's concept module trains and caches CAVs on disk through its own dataset classes; a
direct implementation on arrays is shorter and keeps everything in memory and seeded).

- Concept example sets come from ``context.concept_sets`` (see :mod:`xbench.explainers.concept_sets`):
  structure type -> tiles holding only that type, on varied backgrounds; ``random-0``, ``random-1``, ...
  -> random tiles. At least ``min_random`` (default 10) random sets are required.
- Layer (``layer``; default: a stated rule, :func:`tcav_default_layer`): the last ``nn.ReLU`` registered
  before the model's explain layer, i.e. the rectified output that feeds the last conv block (``cnn``:
  ``relu3``; ``resnet``: ``block3.relu2``; ``separable``: ``block4.depthwise_relu``). It gives the rows' TCAV
  score and spread, the CAVs and the pixel attribution. Why not the explain layer itself: between it and a
  global-pooling + linear head the gradient of a class logit with respect to the pooled activations is (nearly)
  the same vector on every tile, so every direction gets a score of about 0 or 1.
- Evidence (``evidence``, set test only; default ``"layer+relu-layers"``): two set tests, Bonferroni over the
  two (p = 2 min(p_layer, p_pooled), each before the correction over concepts): the test at ``layer`` and the
  test on the evidence of every ``nn.ReLU`` module of the model pooled (:func:`tcav_evidence_layers`, in
  registration order: ``cnn`` 4 layers, ``resnet`` 8, ``separable`` 9; a model whose only ReLU is ``layer``
  has one test, not doubled). ``"relu-layers"``: the pooled test alone; ``"layer"``: ``layer`` alone.
  Why: no single layer has power on every zoo model and seed. At the default layer the corrected p of the
  label-driving type on its class (road on ``roads``, clearing on ``clearings``) was above 0.05 in 7 of 18
  (task, model, seed) cells, and the layer that had power moved with the model, the task and the seed
  (resnet/roads: ``block3.relu1`` 8e-5, but 1.0 on clearings seed 0). The pooled test has power where the
  default layer has none, but the layers' effects can cancel (demo cnn, clearing: standard scores -0.6, -1.7,
  5.5, 2.2 over ``relu1``..``relu4``, pooled p = 0.6 against 0.00027 at ``relu3``), hence both. The rule reads
  the model's structure only (never the concept sets, the explained tiles or a measured power), so the set
  test's exchangeability under the null is untouched, and the Bonferroni step keeps the level of the pair.
  Pooling (:func:`pooled_statistics`): at each layer every set's mean statistic (the random sets' and the
  concept's) becomes a standard score over all of them; a set's pooled statistic is its mean standard score
  over the layers (Stouffer's combination of z-scores, Stouffer et al. 1949, with the mean scaled by the random
  sets' own spread instead of sqrt(layers), since the layers' scores are correlated); the concept's pooled
  statistic is tested as one new draw against the random sets' (below). Per-layer rows of every evidence layer
  (and of ``layers = [...]``) are in ``extras['layer_rows']``, each with its ``layer`` and that layer's own
  p-value; ``extras['evidence_rows']`` holds per (concept, class) both tests' p-values (``p_layer``,
  ``p_pooled``, corrected over concepts) and standard scores (``z_layer``, ``z_pooled``);
  ``extras['pooled_statistics'][concept]`` the pooled values (``concept``: per class; ``random``: per random
  set and class).
  Power, 20 random sets of 80 tiles, Bonferroni over 7 types, seeds 0 / 1 / 2: corrected p of the verdict
  (default ``layer`` alone; pooled alone), measured with ``python tests/bench/bench_tcav_layers.py
  TASK:MODEL:SEED`` when the CAVs came from liblinear's default tolerance (the exact solve used now moves
  these p-values by ~1e-3 of their value; the null simulation below was re-run with it: the same counts):
  roads/cnn 0.00044 / 0.0065 / 0.00055 (0.00043 / 0.0033 / 0.0014; 0.00022 / 0.25 / 0.00028);
  roads/resnet 0.00054 / 3.8e-6 / 0.0016 (0.13 / 0.13 / 1; 0.00027 / 1.9e-6 / 0.00079);
  roads/separable 0.00048 / 0.00053 / 5e-6 (0.0023 / 0.0057 / 0.00017; 0.00024 / 0.00027 / 2.5e-6);
  clearings/cnn 0.0022 / 0.00021 / 0.072 (0.0071 / 0.0095 / 0.34; 0.0011 / 0.0001 / 0.036);
  clearings/resnet 0.010 / 3.3e-6 / 2.2e-5 (0.032 / 0.067 / 0.013; 0.005 / 1.6e-6 / 1.1e-5);
  clearings/separable 0.023 / 5.9e-8 / 0.0024 (0.50 / 0.025 / 1; 0.011 / 2.9e-8 / 0.0012);
  demo/cnn seed 0, road 3.8e-6 (0.0055; 1.9e-6), clearing 0.00054 (0.00027; 0.6).
  Below 0.05 in 19 of 20 cells (the default layer alone: 13, pooled alone: 18); not on clearings/cnn seed 2
  (0.072; no single ReLU layer of that model reaches 0.05 either: smallest 0.10). Level under the null
  (``python tests/bench/bench_tcav_null.py --task demo --trials 50 --random-sets 20``; ``--task roads --model
  resnet``; ``--task clearings --model separable``: a fresh random set posing as the concept, 50 trials each):
  significant at p < 0.05 in 1 of 100 tests (demo cnn), 1 of 50 (roads resnet), 1 of 50 (clearings separable),
  3 of 200 = 1.5% in all; the same trials by each test alone: default layer 7 of 200 (3.5%), pooled 4 of 200.
  Cost: one forward and backward pass of the explained tiles reads every evidence layer; each example set runs
  through the model once for all of them (CAVs fitted per layer, cached).
- Features at the layer: ``pool = "mean"`` (default) averages the layer's (K, h, w) map over positions,
  so a CAV is a direction in channel space, independent of where the structure lies in the tile;
  ``pool = "none"`` uses the flattened map as in Kim et al. 2018.
- CAV: the unit normal of a logistic regression (L2, ``regularization`` = C, liblinear's objective with the
  intercept penalized) separating a positive set's activations from a negative set's, at the objective's
  exact optimum (:func:`logistic_directions`: all CAVs of a layer in one batched Newton solve, checked
  against scikit-learn's liblinear; liblinear's default tolerance stopped ~1e-4 short of it).
- TCAV score of a CAV for class k: the fraction of the explained tiles *of class k* (target k) whose
  directional derivative grad_A h_k . v is positive (Kim et al. 2018).
- Alignment (``statistic = "alignment"``, default): the mean over that class's tiles of the cosine between
  the class logit's gradient at the layer (summed over positions for ``pool = "mean"``) and the CAV. The TCAV
  score counts only signs: where the gradient points the same way on every tile (as on the zoo's cnn one block
  before the head), every direction, random ones included, scores near 0 or 1, and the score cannot tell a
  concept from a random direction (on the demo's cnn, 20 random sets posing as concepts scored from 0.01 to
  0.99 on class road). The cosine keeps how far the gradient leans towards the CAV: random directions lean
  little (null spread 0.06-0.12), concepts the model uses lean far (road on class road 0.31-0.36).
  ``statistic = "score"`` tests the TCAV score itself (Kim et al.).
- Significance (``test = "set"``, default): every random set posing as a concept against each of the others
  gives one null draw at the level of sets (its mean statistic); the concept's mean statistic over its runs
  against the random sets is tested as one new draw against them (two-sided; scipy ``ttest_ind`` with a sample
  of one, i.e. a t prediction interval). Under the null a concept set is one more random set, so the level
  holds by exchangeability: null simulation through this code (tests/bench/bench_tcav_null.py, a random set posing
  as the concept) on the demo's cnn with 20 random sets of 80 tiles, 2.5% of 200 tests significant at p < 0.05;
  on a hand-built network with 10 sets, 1% of 100. ``test = "runs"`` (Kim et al. 2018): concept run r = CAV of the
  concept examples against random set r; random-concept run r = CAV of random set r against random set r+1
  (mod R); the two-sided two-sample t-test (scipy ``ttest_ind``) of the concept runs' statistics against the
  random runs'. Its runs share the concept set's luck, so it runs above its level (GateNet, 10 random sets,
  100 trials, TCAV score: 20% significant at p < 0.05, 37% with 30 random sets): a variant for comparison with
  published numbers, not for verdicts. With ``resample = true`` (default; runs test only) the positive
  examples of each run are a bootstrap resample (seeded). Power on the zoo: see "Evidence layers" above.
  ``correction = "bonferroni"`` (default) multiplies p by the number of concepts (capped at 1),
  ``"none"`` reports raw p-values. Rows: ``score`` = the TCAV score (mean over the concept runs), ``spread`` =
  its standard deviation over the runs, ``p_value`` as above (for the tested statistic).
- ``type_importance[type]`` is taken on the class the type is meant to drive (the class whose label rule
  uses the type, from ``context.driving_types``): the concept's mean statistic minus its mean under the null
  (the random sets'; 0 = no effect beyond random directions); in the pooled modes, the concept's standard
  score against the random sets (``z_layer`` or ``z_pooled``, that of the test with the smaller p-value).
  A type that drives no class is scored on every class that some type drives, keeping the class with the
  largest value (a claim that it drives any of them). ``flagged[type]``: on such a class the effect is
  positive and the corrected p-value is below ``alpha``. A type whose class has no explained tile is left
  out (not assessable). Raw TCAV scores on that class: ``extras['tcav_scores']``; the class used:
  ``extras['type_class']``; the statistic per run: ``extras['concept_statistics']``.
- Pixel attribution (documented choice): concept-presence maps at the layer, weighted by how much the
  concept pushes the tile's target. For each concept C with mean CAV v and random-set mean activation mu,
  presence(i, j) = relu(v . (A(i, j) - mu)) (per position; for ``pool = "none"`` with the position's own
  CAV slice); attribution = sum_C effect_C(target) * presence_C with effect_C the concept's mean statistic
  minus its null mean on the tile's target class, upsampled bilinearly.
  The maps are read at ``layer`` with that layer's effect, whatever ``evidence`` says.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import torch
from scipy import stats
from scipy.special import expit
from torch import nn

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    LAYER_FIELD,
    ConceptReport,
    FitCache,
    as_numpy,
    as_tensor,
    backward_counted,
    batches,
    fit_content_key,
    layers_activations,
    signed_maps,
    torch_module,
    upsample,
)
from xbench.explainers.concept_sets import classes_of_type
from xbench.explainers.registry import register_explainer
from xbench.models.base import ModelHandle
from xbench.schema import Field

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


def tcav_default_layer(model: ModelHandle) -> str:
    """The stated default layer rule: the last ``nn.ReLU`` registered before the model's explain layer
    (the rectified map feeding the last conv block); the explain layer itself when none precedes it."""
    explain_layer = model.default_layer()
    previous = None
    for name, module in torch_module(model).named_modules():
        if name == explain_layer:
            break
        if isinstance(module, nn.ReLU):
            previous = name
    return previous or explain_layer


def tcav_evidence_layers(model: ModelHandle) -> list[str]:
    """The stated rule for the layers whose evidence the set test pools (``evidence = "relu-layers"``): every
    ``nn.ReLU`` module of the model, in registration order (the rectified maps of every block, stem to head);
    :func:`tcav_default_layer` alone when the model registers no ``nn.ReLU``. The rule reads the model's
    structure only (never the concept sets, the explained tiles or any measured power), so it is fixed before
    any test is run and the set test's exchangeability under the null is untouched."""
    relus = [name for name, module in torch_module(model).named_modules() if isinstance(module, nn.ReLU)]
    return relus or [tcav_default_layer(model)]


def pooled_statistics(per_layer: list[np.ndarray]) -> np.ndarray:
    """Pool per-layer statistics of the same sets into one per set: ``per_layer[l]`` is (n_sets,) with the
    same sets in the same order at every layer (the random sets, then the concept). Each layer's values are
    standardised over all the sets (mean 0, sd 1, ddof 1; a layer with no spread is left out) and the result
    is their mean over layers. The map is the same function for every set (a symmetric function of the sets),
    so a concept exchangeable with the random sets stays exchangeable with them."""
    values = np.asarray(per_layer, dtype=np.float64)  # (layers, n_sets)
    sd = values.std(axis=1, ddof=1, keepdims=True)
    keep = (sd[:, 0] > 0) & np.isfinite(sd[:, 0])
    if not keep.any():
        return np.zeros(values.shape[1])
    z = (values[keep] - values[keep].mean(axis=1, keepdims=True)) / sd[keep]
    return z.mean(axis=0)


def layer_gradients(
    model: ModelHandle, images: np.ndarray, targets: np.ndarray, layers: list[str], batch_size: int
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per layer: the gradient of each tile's target logit with respect to the layer's output and the output
    itself, float32 (N, K, h, w) each, for several layers from one forward and one backward pass per batch (the
    backward pass is counted once per tile, however many layers are read)."""
    module = torch_module(model)
    names = list(dict.fromkeys(layers))
    recorded: dict[str, torch.Tensor] = {}

    def hook_for(name: str):
        def hook(_module, _args, out):
            if name in recorded:
                raise XbenchInputError(
                    f"explainer '{KEY}': layer '{name}'",
                    "the layer runs more than once per forward pass (a reused module)",
                    expected="a layer used once, e.g. a distinct conv layer",
                )
            if not isinstance(out, torch.Tensor) or out.ndim != 4:
                raise XbenchInputError(
                    f"explainer '{KEY}': layer '{name}'",
                    "output is not a spatial feature map",
                    expected="a 4-D tensor (N, channels, h, w), e.g. a conv layer",
                    found=tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__,
                )
            if not out.requires_grad:  # frozen weights upstream: start the graph here
                out = out.detach().requires_grad_(True) * 1.0
                recorded[name] = out
                return out
            recorded[name] = out
            return None

        return hook

    handles = [model.get_layer(name).register_forward_hook(hook_for(name)) for name in names]
    grads: dict[str, list[np.ndarray]] = {name: [] for name in names}
    acts: dict[str, list[np.ndarray]] = {name: [] for name in names}
    try:
        for sl in batches(images.shape[0], batch_size):
            x = as_tensor(images[sl])
            idx = torch.from_numpy(np.asarray(targets[sl], dtype=np.int64))
            recorded.clear()
            with torch.enable_grad(), backward_counted(model, x.shape[0]):
                logits = module(x)
                missing = [name for name in names if name not in recorded]
                if missing:
                    raise XbenchInputError(
                        f"explainer '{KEY}': layer '{missing[0]}'", "the layer did not run in the model's forward pass"
                    )
                tensors = [recorded[name] for name in names]
                found = torch.autograd.grad(logits.gather(1, idx[:, None]).sum(), tensors, allow_unused=True)
            for name, t, g in zip(names, tensors, found, strict=True):
                grads[name].append(as_numpy(g) if g is not None else np.zeros(tuple(t.shape), np.float32))
                acts[name].append(as_numpy(t.detach()))
    finally:
        for h in handles:
            h.remove()
    return {name: (np.concatenate(grads[name]), np.concatenate(acts[name])) for name in names}


def standard_score(value: float, null: np.ndarray) -> float:
    """(value - mean) / sd of the null draws (ddof 1); 0 when the null has no spread."""
    sd = float(np.std(null, ddof=1)) if len(null) > 1 else 0.0
    return float((value - np.mean(null)) / sd) if sd > 0 and np.isfinite(sd) else 0.0


def logistic_directions(x: np.ndarray, y: np.ndarray, regularization: float, *, max_iter: int = 100) -> np.ndarray:
    """Weights (intercept dropped) of ``B`` L2-regularized logistic regressions at once, each at its optimum.

    ``x``: (B, n, d) features, ``y``: (B, n) labels in {0, 1}; returns (B, d). Each problem minimizes
    liblinear's primal L2-regularized logistic loss with the intercept as one more feature of value 1, penalized
    like the weights (Fan et al. 2008, JMLR 9, eq. 2; scikit-learn's ``LogisticRegression(solver="liblinear")``
    with ``intercept_scaling=1``):

        0.5 ||w||^2 + C sum_i log(1 + exp(-s_i w . z_i)),   z_i = (x_i, 1),  s_i = 2 y_i - 1,  C = regularization.

    The objective is strictly convex, so its optimum is unique; Newton's method with a backtracking (Armijo)
    line search reaches it to float64 precision. Why not scikit-learn: a CAV fit is a 160 x 65 problem, and the
    set test fits 350 of them per layer; about half of the ~1.2 ms scikit-learn takes per fit is validation and
    setup around liblinear, while here a layer's problems are one batched solve (~0.4 ms each). With more features
    than examples (``pool = "none"``) the weights lie in the span of the examples (representer theorem), so the
    problem is solved in the examples' coordinates of a thin QR factorization, exactly.
    Checked against scikit-learn's liblinear run to a tight tolerance (tests/test_explainers_concepts.py).
    """
    x = np.asarray(x, np.float64)
    if x.ndim != 3 or not np.isfinite(x).all():
        raise ValueError(f"logistic_directions needs finite features shaped (B, n, d), got shape {x.shape}")
    b, n, d = x.shape
    z = np.concatenate([x, np.ones((b, n, 1))], axis=2)
    basis = None
    if d + 1 > n:  # w = Q u: features z Q (n x n), same norms
        basis, r = np.linalg.qr(np.swapaxes(z, 1, 2))  # z^T = Q R: (b, d+1, n), (b, n, n)
        z = np.swapaxes(r, 1, 2)
    s = 2.0 * np.asarray(y, np.float64) - 1.0
    c = float(regularization)
    p = z.shape[2]
    z32 = z.astype(np.float32)  # the Hessian in float32: only the rate of convergence depends on it
    w = np.zeros((b, p))

    def objective(w: np.ndarray, rows: np.ndarray) -> np.ndarray:
        margins = s[rows] * (z[rows] @ w[..., None])[..., 0]
        return 0.5 * np.sum(w * w, axis=1) + c * np.logaddexp(0.0, -margins).sum(axis=1)

    active = np.arange(b)
    eye = np.eye(p, dtype=np.float32)
    for _ in range(max_iter):
        if active.size == 0:
            break
        every = active.size == b  # views, not copies, while every problem is still running
        za, sa, wa = (z, s, w) if every else (z[active], s[active], w[active])
        margins = sa * (za @ wa[..., None])[..., 0]
        tail = expit(-margins)  # -d/dm log(1 + exp(-m))
        grad = wa - c * (np.swapaxes(za, 1, 2) @ (sa * tail)[..., None])[..., 0]
        curvature = (tail * (1.0 - tail)).astype(np.float32)
        za32 = z32 if every else z32[active]
        hess = eye + np.float32(c) * (np.swapaxes(za32 * curvature[..., None], 1, 2) @ za32)
        step = np.linalg.solve(hess, grad[..., None].astype(np.float32))[..., 0].astype(np.float64)
        decrement = np.sum(grad * step, axis=1)  # Newton decrement squared: ~ 2 (f(w) - f*)
        f0 = 0.5 * np.sum(wa * wa, axis=1) + c * np.logaddexp(0.0, -margins).sum(axis=1)
        # this close, one full step lands at the optimum to float64 precision (quadratic convergence)
        last = decrement <= 1e-10 * np.maximum(1.0, f0)
        t = np.ones(len(active))
        pending = ~last
        for _halving in range(40):  # Armijo: accept f(w - t step) <= f(w) - 1e-4 t decrement
            if not pending.any():
                break
            rows = np.flatnonzero(pending)
            trial = objective(wa[rows] - t[rows, None] * step[rows], active[rows])
            ok = trial <= f0[rows] - 1e-4 * t[rows] * decrement[rows]
            pending[rows[ok]] = False
            t[rows[~ok]] *= 0.5
        t[pending] = 0.0  # no decrease even for a tiny step: rounding hides any further progress
        w[active] = wa - t[:, None] * step
        active = active[~(last | pending)]
    if active.size:  # not seen on these strictly convex problems; never a silent half-solved CAV
        raise RuntimeError(f"logistic fits did not converge in {max_iter} Newton steps ({active.size} of {b})")
    if basis is not None:
        w = (basis @ w[..., None])[..., 0]
    return w[:, :d]


def _cavs(pairs: list[tuple[np.ndarray, np.ndarray]], regularization: float) -> list[np.ndarray]:
    """Unit normals of logistic regressions separating each pair's positives (1) from its negatives (0),
    pointing towards the positives (:func:`logistic_directions`, problems of equal shape solved together)."""
    out: list[np.ndarray] = [np.empty(0)] * len(pairs)
    groups: dict[tuple[int, int, int], list[int]] = {}
    for i, (pos, neg) in enumerate(pairs):
        if not (np.isfinite(pos).all() and np.isfinite(neg).all()):
            raise XbenchInputError(
                f"explainer '{KEY}': context.concept_sets",
                "the model's activations of an example set at the layer are not finite (NaN or inf)",
            )
        groups.setdefault((len(pos), len(neg), pos.shape[1]), []).append(i)
    for (n_pos, n_neg, d), members in groups.items():
        chunk = max(1, int(8e6 // ((n_pos + n_neg) * (d + 1) * 8)))  # ~8 MB of features per solve
        for start in range(0, len(members), chunk):
            part = members[start : start + chunk]
            x = np.stack([np.concatenate(pairs[i]) for i in part])
            # a common scale per problem keeps the Newton steps well-conditioned; undone on the weights
            scale = x.std(axis=1).mean(axis=1)
            scale[scale == 0] = 1.0
            y = np.concatenate([np.ones(n_pos), np.zeros(n_neg)])
            w = logistic_directions(x / scale[:, None, None], np.broadcast_to(y, x.shape[:2]), regularization)
            w = w / scale[:, None]
            for i, v in zip(part, w, strict=True):
                norm = np.linalg.norm(v)
                out[i] = v / norm if norm > 0 else v
    return out


def ttest_runs(a: np.ndarray, b: np.ndarray) -> float:
    """Two-sided two-sample t-test (scipy ``ttest_ind``) of run scores; constant samples give 1.0
    (equal) or 0.0 (different)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    if np.ptp(a) == 0 and np.ptp(b) == 0:
        return 1.0 if a[0] == b[0] else 0.0
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # near-identical samples: precision note only
        p = float(stats.ttest_ind(a, b).pvalue)
    return p if np.isfinite(p) else 1.0


def ttest_runs_columns(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """:func:`ttest_runs` of every column pair (``a[:, j]``, ``b[:, j]``) in one vectorized scipy call: the
    same p-values as one call per column (a cell tests every concept, class and layer, and the metrics re-run
    the explainer dozens of times)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # near-identical samples: precision note only
        p = np.atleast_1d(np.asarray(stats.ttest_ind(a, b, axis=0).pvalue, dtype=float))
    p = np.where(np.isfinite(p), p, 1.0)
    constant = (np.ptp(a, axis=0) == 0) & (np.ptp(b, axis=0) == 0)
    return np.where(constant, np.where(a[0] == b[0], 1.0, 0.0), p)


def _per_class(values: np.ndarray, targets: np.ndarray, classes: np.ndarray) -> np.ndarray:
    """(n, M) per-tile values -> (M, classes): the mean over each class's tiles."""
    return np.stack([values[targets == k].mean(axis=0) for k in classes], axis=-1)


def run_scores(gfeat: np.ndarray, targets: np.ndarray, classes: np.ndarray, v: np.ndarray) -> np.ndarray:
    """TCAV score of direction ``v`` per class: the share of that class's tiles with grad . v > 0.
    ``v`` (d,) gives (classes,); a stack of directions (M, d) gives (M, classes) in one product."""
    out = _per_class((gfeat @ np.atleast_2d(v).T) > 0, targets, classes)
    return out[0] if np.ndim(v) == 1 else out


def run_alignments(gfeat: np.ndarray, targets: np.ndarray, classes: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Alignment of the unit direction ``v`` per class: the mean over that class's tiles of the cosine between
    the class logit's gradient at the layer and ``v`` (0 where a tile's gradient is zero). ``v`` (d,) or a
    stack (M, d), as in :func:`run_scores`."""
    norms = np.linalg.norm(gfeat, axis=1)[:, None]
    proj = gfeat @ np.atleast_2d(v).T
    cosine = np.divide(proj, norms, out=np.zeros_like(proj), where=norms > 0)
    out = _per_class(cosine, targets, classes)
    return out[0] if np.ndim(v) == 1 else out


def run_statistics(
    gfeat: np.ndarray, targets: np.ndarray, classes: np.ndarray, v: np.ndarray, statistic: str
) -> np.ndarray:
    """The tested statistic of direction ``v`` (or a stack of them) per class: ``score`` (TCAV score) or
    ``alignment``."""
    fn = run_scores if statistic == "score" else run_alignments
    return fn(gfeat, targets, classes, v)


# CAVs fitted in this process by content (model weights, layer, example sets, settings, seed): metrics re-run
# the explainer on perturbed copies of the tiles with the same model, and the CAVs do not depend on the tiles.
# one entry per (model weights, layer, sets, settings): the pooled test fits every ReLU layer (up to 9 on the
# zoo), and the metrics re-run the explainer; a few small vectors per entry, so room for many
_CAV_FITS = FitCache(size=64)


def _set_features(
    model: ModelHandle,
    sets: dict[str, np.ndarray],
    concepts: list[str],
    randoms: list[str],
    layers: list[str],
    *,
    pool: str,
    batch_size: int,
) -> dict[str, dict[str, Any]]:
    """Every example set's features at every layer in ``layers``, from one forward pass of each set through
    the model (not one per layer): layer -> ``feats`` (set -> (N, features) float64), ``shapes`` (set -> the
    layer map's shape) and ``mu`` (the random sets' mean activation)."""
    out: dict[str, dict[str, Any]] = {layer: {"feats": {}, "shapes": {}} for layer in layers}
    shapes: dict[str, tuple[int, ...]] = {}

    def pooled(layer: str, acts: torch.Tensor) -> torch.Tensor:
        # the mean over positions before the maps leave torch: full maps are never copied out. In float32
        # (torch sums in cascades: relative error ~1e-7, far below any difference a CAV can show); a float64
        # reduction of the same maps took 12x as long (1.2 s of the demo's TCAV cells)
        shapes[layer] = tuple(acts.shape[1:])
        return acts.mean(dim=(2, 3)) if pool == "mean" else acts

    for name in concepts + randoms:
        for layer, a in layers_activations(KEY, model, layers, sets[name], batch_size, reduce=pooled).items():
            at = out[layer]
            at["shapes"][name] = shapes[layer]
            at["feats"][name] = a.reshape(a.shape[0], -1).astype(np.float64, copy=False)
    for at in out.values():
        # the random sets' mean activation: per channel over examples and positions ("mean"; every example
        # has the same number of positions), per position and channel over examples ("none")
        at["mu"] = np.concatenate([at["feats"][name] for name in randoms]).mean(axis=0)
        if pool == "none":
            at["mu"] = at["mu"].reshape(at["shapes"][randoms[0]])
    return out


def _fit_cavs(
    features: dict[str, Any],
    concepts: list[str],
    randoms: list[str],
    *,
    regularization: float,
    resample: bool,
    test: str,
    seed: int,
) -> dict[str, Any]:
    """Every CAV of one layer from its :func:`_set_features`: the random runs', the random pairs' (set test),
    the concept runs' and each concept's mean direction; the random sets' mean activation; each set's layer
    map shape."""
    feats, shapes = features["feats"], features["shapes"]

    def positives(name: str, salt: int, r: int) -> np.ndarray:
        f = feats[name]
        if not resample or test == "set":  # the set test compares whole sets: the concept's as the random ones'
            return f
        rng = np.random.default_rng([seed, salt, r])
        return f[rng.integers(0, len(f), len(f))]

    n_r = len(randoms)
    # every CAV of the layer in one batched fit: the random runs', the random pairs' (set test), the concepts'
    pairs = [(positives(randoms[r], 7919, r), feats[randoms[(r + 1) % n_r]]) for r in range(n_r)]
    pair_index = [(i, j) for i in range(n_r) for j in range(i + 1, n_r)] if test == "set" else []
    pairs += [(feats[randoms[i]], feats[randoms[j]]) for i, j in pair_index]
    pairs += [(positives(concept, ci, r), feats[randoms[r]]) for ci, concept in enumerate(concepts) for r in range(n_r)]
    fitted = _cavs(pairs, regularization)
    random_cavs = fitted[:n_r]
    pair_cavs = dict(zip(pair_index, fitted[n_r : n_r + len(pair_index)], strict=True))
    concept_cavs, cavs = {}, {}
    for ci, concept in enumerate(concepts):
        start = n_r + len(pair_index) + ci * n_r
        vs = fitted[start : start + n_r]
        concept_cavs[concept] = vs
        v = np.mean(vs, axis=0)
        cavs[concept] = v / (np.linalg.norm(v) or 1.0)
    return {
        "random_cavs": random_cavs,
        "pair_cavs": pair_cavs,
        "concept_cavs": concept_cavs,
        "cavs": cavs,
        "mu": features["mu"],
        "shapes": shapes,
    }


def _run_layer(
    model: ModelHandle,
    images: np.ndarray,
    targets: np.ndarray,
    sets: dict[str, np.ndarray],
    concepts: list[str],
    randoms: list[str],
    layer: str,
    tapped: tuple[np.ndarray, np.ndarray],
    features_at: Callable[[str], dict[str, Any]],
    *,
    pool: str,
    regularization: float,
    resample: bool,
    test: str,
    statistic: str,
    seed: int,
) -> dict[str, Any]:
    """Concept and random-concept runs at one layer: per-class scores of every run, plus what the pixel
    attribution needs (activations, CAVs, random mean). ``tapped`` = the layer's (gradients, activations) on
    the explained tiles (from :func:`layer_gradients`); ``features_at(layer)`` the example sets' features
    there (:func:`_set_features`), read only when the layer's CAVs are not cached."""
    n = images.shape[0]
    grads_a, acts_a = tapped
    gfeat = grads_a.sum(axis=(2, 3)) if pool == "mean" else grads_a.reshape(n, -1)
    gfeat = gfeat.astype(np.float64)
    settings = (layer, pool, regularization, resample, test, seed, tuple(concepts), tuple(randoms))
    key = fit_content_key(model, [sets[name] for name in concepts + randoms], settings)
    fit = _CAV_FITS.get_or_fit(
        key,
        lambda: _fit_cavs(
            features_at(layer),
            concepts,
            randoms,
            regularization=regularization,
            resample=resample,
            test=test,
            seed=seed,
        ),
    )
    for name, shape in fit["shapes"].items():
        if pool == "none" and shape != acts_a.shape[1:]:
            raise XbenchInputError(
                f"explainer '{KEY}': context.concept_sets['{name}']",
                "layer map size differs from the explained tiles' (pool = 'none' needs equal sizes)",
                expected=acts_a.shape[1:],
                found=shape,
            )
    classes = np.unique(targets)
    random_cavs = fit["random_cavs"]
    random_runs = run_scores(gfeat, targets, classes, np.array(random_cavs))  # (runs, classes)
    random_stats = run_statistics(gfeat, targets, classes, np.array(random_cavs), statistic)
    set_means = None
    if test == "set":  # each random set posing as a concept against the others: its mean statistic is one null draw
        n_r = len(randoms)
        pair = np.full((n_r, n_r, len(classes)), np.nan)
        index = list(fit["pair_cavs"])
        if index:
            rows, cols = np.array(index).T
            vs = np.array([fit["pair_cavs"][ij] for ij in index])
            pair[rows, cols] = run_statistics(gfeat, targets, classes, vs, statistic)
            pair[cols, rows] = run_statistics(gfeat, targets, classes, -vs, statistic)  # j against i: the other way
        set_means = np.nanmean(pair, axis=1)  # (n_r, classes)
    concept_runs, concept_stats = {}, {}
    for concept in concepts:
        vs = np.array(fit["concept_cavs"][concept])
        concept_runs[concept] = run_scores(gfeat, targets, classes, vs)
        concept_stats[concept] = run_statistics(gfeat, targets, classes, vs, statistic)
    cavs, mu = fit["cavs"], fit["mu"]
    null = set_means if set_means is not None else random_stats
    return {
        "classes": classes,
        "random_runs": random_runs,
        "random_stats": random_stats,
        "set_means": set_means,
        "null_mean": null.mean(axis=0),  # (classes,): the tested statistic's mean under the null
        "concept_runs": concept_runs,
        "concept_stats": concept_stats,
        "cavs": cavs,
        "acts": acts_a,
        "mu": mu,
    }


def _rows(res: dict[str, Any], concepts: list[str], class_names: list[str], correction: str, test: str) -> list[dict]:
    m_tests = len(concepts) if correction == "bonferroni" else 1
    rows = []
    for concept in concepts:
        c_runs, c_stats = res["concept_runs"][concept], res["concept_stats"][concept]
        if test == "runs":
            p_values = ttest_runs_columns(c_stats, res["random_stats"])
        else:  # the concept's mean statistic as one new draw against the random sets' mean statistics
            p_values = ttest_runs_columns(c_stats.mean(axis=0, keepdims=True), res["set_means"])
        for j, k in enumerate(res["classes"]):
            p = float(p_values[j])
            rows.append(
                {
                    "concept": concept,
                    "class_name": class_names[int(k)] if int(k) < len(class_names) else str(int(k)),
                    "score": float(c_runs[:, j].mean()),
                    "spread": float(c_runs[:, j].std(ddof=1)) if len(c_runs) > 1 else None,
                    "p_value": min(1.0, p * m_tests),
                    "matched_type": concept,
                    "iou": None,
                    "purity": None,
                }
            )
    return rows


@register_explainer(
    KEY,
    citation=CITE_TCAV,
    needs={"gradients", "layer", "concept-sets"},
    kind="concept",
    settings={
        "layer": LAYER_FIELD,
        "layers": Field("list", [], item=Field("str"), doc="more layers to test besides 'layer'"),
        "pool": Field("str", "mean", choices=("mean", "none"), doc="spatial pooling of the activations"),
        "regularization": Field("number", 1.0, low=0.0, low_open=True, doc="inverse strength C of the CAV's fit"),
        "resample": Field("bool", True, doc="each run draws its own concept examples"),
        "test": Field("str", "set", choices=("set", "runs"), doc="significance over sets, or over runs (Kim et al.)"),
        "evidence": Field(
            "str",
            "layer+relu-layers",
            choices=("layer+relu-layers", "relu-layers", "layer"),
            doc="set test on 'layer' and on every ReLU layer pooled (Bonferroni over the two), the pool, or 'layer'",
        ),
        "statistic": Field("str", "alignment", choices=("alignment", "score"), doc="the tested statistic"),
        "correction": Field("str", "bonferroni", choices=("bonferroni", "none"), doc="over concepts"),
        "alpha": Field("number", 0.05, low=0.0, high=1.0, low_open=True, doc="significance level"),
        "min_random": Field("int", 10, low=2, doc="random example sets needed at least"),
    },
    description="concept activation vectors from example sets (logistic regression at a layer); TCAV "
    "score per (concept, class) on that class's tiles; significance of the gradient's alignment with the CAV "
    "against random sets posing as concepts (Kim et al.'s runs test as a variant), Bonferroni over concepts; "
    "attribution = weighted concept-presence maps",
)
@signed_maps(True)  # concept presence weighted by the concept's effect: negative for counter-evidence
def tcav(
    model,
    images,
    targets,
    context,
    *,
    layer,
    layers,
    pool,
    regularization,
    resample,
    test,
    evidence,
    statistic,
    correction,
    alpha,
    min_random,
):
    for name in layers:
        model.get_layer(name)  # raises, listing the model's layers
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
    class_names = (
        list(context.class_names) if context.class_names is not None else [str(i) for i in range(model.n_classes)]
    )
    common = dict(
        test=test,
        statistic=statistic,
        pool=pool,
        regularization=regularization,
        resample=resample,
        seed=int(context.seed),
    )
    pooled_mode = evidence != "layer" and test == "set"  # the runs test reads 'layer' alone
    evidence_layers = tcav_evidence_layers(model) if pooled_mode else [layer]
    read = list(dict.fromkeys([layer] + evidence_layers + list(layers)))
    tapped = layer_gradients(model, images, targets, read, context.batch_size)
    computed: dict[str, dict[str, Any]] = {}

    def features_at(name: str) -> dict[str, Any]:
        # the first layer whose CAVs are not cached reads every layer's features in one pass per set
        if not computed:
            computed.update(
                _set_features(model, sets, concepts, randoms, read, pool=pool, batch_size=context.batch_size)
            )
        return computed[name]

    per_layer = {
        name: _run_layer(model, images, targets, sets, concepts, randoms, name, tapped[name], features_at, **common)
        for name in read
    }
    res = per_layer[layer]
    rows = _rows(res, concepts, class_names, correction, test)
    layer_rows = []
    for other in dict.fromkeys(evidence_layers + list(layers) if pooled_mode else list(layers)):
        layer_rows += [{"layer": other, **r} for r in _rows(per_layer[other], concepts, class_names, correction, test)]

    classes = [int(k) for k in res["classes"]]
    null_mean = res["null_mean"]  # (classes,): the tested statistic's mean under the null
    effects: dict[str, np.ndarray] = {
        concept: res["concept_stats"][concept].mean(axis=0) - null_mean for concept in concepts
    }  # (classes,) per concept: the concept's mean statistic at 'layer' minus its null mean
    pooled: dict[str, dict[str, np.ndarray]] = {}
    evidence_rows: list[dict[str, Any]] = []
    if pooled_mode:
        m_tests = len(concepts) if correction == "bonferroni" else 1
        for concept in concepts:
            concept_pooled, random_pooled = np.zeros(len(classes)), np.zeros((len(randoms), len(classes)))
            for j in range(len(classes)):
                values = [
                    np.append(
                        per_layer[name]["set_means"][:, j], per_layer[name]["concept_stats"][concept][:, j].mean()
                    )
                    for name in evidence_layers
                ]
                both = pooled_statistics(values)
                concept_pooled[j], random_pooled[:, j] = both[-1], both[:-1]
            pooled[concept] = {"concept": concept_pooled, "random": random_pooled}
        labels = [class_names[k] if k < len(class_names) else str(k) for k in classes]
        for r in rows:  # the pooled test's p-value replaces the single layer's; score and spread stay at 'layer'
            concept, j = r["concept"], labels.index(r["class_name"])
            c_layer = res["concept_stats"][concept][:, j].mean()
            z_layer = standard_score(c_layer, res["set_means"][:, j])
            p_layer = ttest_runs(np.array([c_layer]), res["set_means"][:, j])
            pooled_one = pooled[concept]
            z_pooled = standard_score(pooled_one["concept"][j], pooled_one["random"][:, j])
            p_pooled = ttest_runs(pooled_one["concept"][j : j + 1], pooled_one["random"][:, j])
            if evidence == "relu-layers" or p_pooled <= p_layer:
                p, effects[concept][j] = p_pooled, z_pooled
            else:
                p, effects[concept][j] = p_layer, z_layer
            if evidence == "layer+relu-layers" and evidence_layers != [layer]:
                p = min(1.0, 2.0 * p)  # Bonferroni over the two tests (the layer's, the pooled one)
            r["p_value"] = min(1.0, p * m_tests)
            evidence_rows.append(
                {
                    "concept": concept,
                    "class_name": r["class_name"],
                    "p_layer": min(1.0, p_layer * m_tests),
                    "p_pooled": min(1.0, p_pooled * m_tests),
                    "z_layer": z_layer,
                    "z_pooled": z_pooled,
                }
            )
    by_key = {(r["concept"], r["class_name"]): r for r in rows}
    importance: dict[str, float] = {}
    flagged: dict[str, bool] = {}
    tcav_scores: dict[str, float] = {}
    type_class: dict[str, str] = {}
    for concept in concepts:
        best = None
        for k in classes_of_type(concept, context.driving_types, classes):
            if k not in classes:
                continue  # no explained tile of that class
            j = classes.index(k)
            row = by_key[(concept, class_names[k] if k < len(class_names) else str(k))]
            effect = float(effects[concept][j])
            hit = effect > 0 and row["p_value"] < alpha
            if best is None or (hit, effect) > (best[1], best[0]):
                best = (effect, hit, row["score"], row["class_name"])
        if best is None:
            continue
        importance[concept], flagged[concept], tcav_scores[concept], type_class[concept] = best

    # pixel attribution: concept presence maps weighted by the concept's effect on the tile's target
    acts_a, mu = res["acts"], res["mu"]
    n = images.shape[0]
    low = np.zeros((n,) + acts_a.shape[2:], dtype=np.float64)
    centred = acts_a - (mu[None, :, None, None] if pool == "mean" else mu[None])
    col = np.searchsorted(res["classes"], targets)
    for concept in concepts:
        v = res["cavs"][concept]
        if pool == "mean":
            presence = np.einsum("nkij,k->nij", centred, v)
        else:
            presence = (centred * v.reshape(acts_a.shape[1:])[None]).sum(axis=1)
        effect = res["concept_stats"][concept].mean(axis=0) - null_mean
        low += effect[col][:, None, None] * np.maximum(presence, 0.0)
    attributions = upsample(low.astype(np.float32), images.shape[2:], "bilinear")

    report = ConceptReport(
        rows=rows,
        type_importance=importance,
        flagged=flagged,
        extras={
            "layer": layer,
            "pool": pool,
            "n_random": len(randoms),
            "cavs": res["cavs"],
            "correction": correction,
            "random_runs": res["random_runs"],
            "set_means": res["set_means"],
            "test": test,
            "statistic": statistic,
            "concept_runs": res["concept_runs"],
            "concept_statistics": res["concept_stats"],
            "null_mean": res["null_mean"],
            "tcav_scores": tcav_scores,
            "type_class": type_class,
            "classes": classes,
            "class_names": class_names,
            "layer_rows": layer_rows,
            "evidence": evidence if pooled_mode else "layer",
            "evidence_rows": evidence_rows,
            "evidence_layers": evidence_layers,
            "pooled_statistics": pooled,
        },
    )
    return attributions, report


tcav.default_layer = tcav_default_layer  # type: ignore[attr-defined]  # read by the registry
