"""The ``forest`` model: a scikit-learn extremely-randomised-trees ensemble on per-tile features.

It is used only as a black box (images in, class probabilities out): it shows that every black-box path
(perturbation explainers, truth, metrics) works for a model that is not a torch module.

Features per tile (all from the six reflectance bands): per-band mean, standard deviation and the 5/50/95
percentiles; NDVI (Rouse et al. 1974) mean, spread, percentiles and the fractions of pixels below 0.0,
0.3 and 0.5; and texture: mean and 95th percentile of the Sobel gradient magnitude (scikit-image) of
NDVI and of the band mean.

The fitted ensemble is exported to plain arrays (children, split feature, threshold, leaf class
fractions) so it can be cached in an ``.npz`` and scored without unpickling anything;
:func:`forest_predict_proba` reproduces ``predict_proba`` of the scikit-learn ensemble.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
from skimage.filters import sobel
from sklearn.ensemble import ExtraTreesClassifier

FOREST_DEFAULTS: dict[str, Any] = {"n_trees": 200, "max_depth": 14, "min_samples_leaf": 2, "max_features": "sqrt"}


def tile_features(images: np.ndarray, band_names: list[str] | None = None) -> np.ndarray:
    """Per-tile spectral and texture features (N, F) float32 from images (N, C, H, W)."""
    x = np.asarray(images, dtype=np.float32)
    n, c = x.shape[:2]
    flat = x.reshape(n, c, -1)
    names = list(band_names) if band_names is not None else None
    red = names.index("red") if names and "red" in names else min(2, c - 1)
    nir = names.index("nir") if names and "nir" in names else min(3, c - 1)
    feats = [flat.mean(axis=2), flat.std(axis=2)]
    feats += list(np.percentile(flat, [5, 50, 95], axis=2))
    ndvi = (x[:, nir] - x[:, red]) / np.maximum(x[:, nir] + x[:, red], 1e-6)
    nd = ndvi.reshape(n, -1)
    feats += [nd.mean(axis=1, keepdims=True), nd.std(axis=1, keepdims=True)]
    feats += [p[:, None] for p in np.percentile(nd, [5, 25, 50, 75, 95], axis=1)]
    feats += [(nd < t).mean(axis=1, keepdims=True) for t in (0.0, 0.3, 0.5)]
    brightness = x.mean(axis=1)
    for plane in (ndvi, brightness):
        grad = np.stack([sobel(p) for p in plane]).reshape(n, -1)
        feats += [grad.mean(axis=1, keepdims=True), np.percentile(grad, 95, axis=1)[:, None]]
    return np.concatenate(feats, axis=1).astype(np.float32)


def fit_forest(
    features: np.ndarray, labels: np.ndarray, n_classes: int, seed: int, params: dict[str, Any]
) -> dict[str, np.ndarray]:
    """Fit the ensemble (single-threaded, seeded) and export it to arrays."""
    p = {**FOREST_DEFAULTS, **params}
    clf = ExtraTreesClassifier(
        n_estimators=p["n_trees"],
        max_depth=p["max_depth"],
        min_samples_leaf=p["min_samples_leaf"],
        max_features=p["max_features"],
        class_weight="balanced",
        random_state=seed,
        n_jobs=1,
    )
    clf.fit(features, labels)
    return export_forest(clf, n_classes)


def export_forest(clf: ExtraTreesClassifier, n_classes: int) -> dict[str, np.ndarray]:
    """Concatenate the trees' node arrays; leaf values become class fractions over all ``n_classes``."""
    left, right, feature, threshold, value, offsets = [], [], [], [], [], [0]
    classes = clf.classes_.astype(int)
    for est in clf.estimators_:
        t = est.tree_
        base = offsets[-1]
        cl, cr = t.children_left.astype(np.int64), t.children_right.astype(np.int64)
        left.append(np.where(cl >= 0, cl + base, -1))
        right.append(np.where(cr >= 0, cr + base, -1))
        feature.append(t.feature.astype(np.int64))
        threshold.append(t.threshold.astype(np.float64))
        v = t.value[:, 0, :].astype(np.float64)
        v = v / np.maximum(v.sum(axis=1, keepdims=True), 1e-300)
        full = np.zeros((v.shape[0], n_classes))
        full[:, classes] = v
        value.append(full)
        offsets.append(base + t.node_count)
    return {
        "left": np.concatenate(left),
        "right": np.concatenate(right),
        "feature": np.concatenate(feature),
        "threshold": np.concatenate(threshold),
        "value": np.concatenate(value),
        "roots": np.asarray(offsets[:-1], dtype=np.int64),
    }


def forest_predict_proba(arrays: dict[str, np.ndarray], features: np.ndarray) -> np.ndarray:
    """Mean of the trees' leaf class fractions (N, n_classes), as scikit-learn's ``predict_proba``.

    scikit-learn compares float32 features with float64 thresholds (``X <= threshold`` goes left); the
    features are cast to float32 first to take the same branches.
    """
    x = np.asarray(features, dtype=np.float32).astype(np.float64)
    n = x.shape[0]
    roots = arrays["roots"]
    node = np.repeat(roots[None, :], n, axis=0)  # (N, T)
    rows = np.arange(n)[:, None]
    left, right, feat, thr = arrays["left"], arrays["right"], arrays["feature"], arrays["threshold"]
    while True:
        internal = left[node] >= 0
        if not internal.any():
            break
        go_left = x[rows, np.where(internal, feat[node], 0)] <= thr[node]
        node = np.where(internal, np.where(go_left, left[node], right[node]), node)
    return arrays["value"][node].mean(axis=1)


def forest_hash(arrays: dict[str, np.ndarray]) -> str:
    h = hashlib.sha256()
    for key in sorted(arrays):
        a = np.ascontiguousarray(arrays[key])
        h.update(key.encode())
        h.update(str(a.dtype).encode())
        h.update(str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


class ForestPredictor:
    """A callable ``images (N, C, H, W) -> probabilities (N, n_classes)`` for :class:`ModelHandle`."""

    def __init__(self, arrays: dict[str, np.ndarray], band_names: list[str] | None = None):
        self.arrays = arrays
        self.band_names = band_names

    def __call__(self, images: np.ndarray) -> np.ndarray:
        return forest_predict_proba(self.arrays, tile_features(images, self.band_names))
