"""Metrics with a real model: a tiny CNN trained here on a synthetic problem built here, the captum
references for max-sensitivity and infidelity, and the cascading randomization.

The problem: 16x16 tiles with 3 bands of smooth noise; class 1 tiles hold a bright 4x4 square (the planted
structure), class 0 tiles do not. Each tile's twin is the same noise without the square.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from captum.metrics import infidelity as captum_infidelity
from captum.metrics import sensitivity_max as captum_sensitivity_max
from scipy import ndimage
from torch import nn

from xbench.metrics import MetricInputs, compute_metric
from xbench.metrics.model_dependence import parametrised_layers
from xbench.metrics.steadiness import (
    infidelity_perturbations,
    sensitivity_perturbations,
    square_perturbations,
    square_side,
)
from xbench.models.base import ModelHandle

H = W = 16


class Tiny(nn.Module):
    def __init__(self, c: int = 3, k: int = 2):
        super().__init__()
        self.conv1 = nn.Conv2d(c, 8, 3, padding=1)
        self.relu1 = nn.ReLU()
        self.conv2 = nn.Conv2d(8, 8, 3, padding=1)
        self.relu2 = nn.ReLU()
        self.gap = nn.AdaptiveMaxPool2d(1)
        self.flat = nn.Flatten()
        self.head = nn.Linear(8, k)

    def forward(self, x):
        return self.head(self.flat(self.gap(self.relu2(self.conv2(self.relu1(self.conv1(x)))))))


def make_tiles(n: int, seed: int):
    rng = np.random.default_rng(seed)
    noise = ndimage.gaussian_filter(rng.random((n, 3, H, W)), sigma=(0, 0, 1.5, 1.5))
    twins = (0.2 + 0.3 * noise).astype(np.float32)
    labels = rng.integers(0, 2, n)
    masks = np.zeros((n, H, W), bool)
    images = twins.copy()
    for i in np.flatnonzero(labels):
        r, c = rng.integers(0, H - 4, 2)
        masks[i, r : r + 4, c : c + 4] = True
        images[i, 0][masks[i]] += 0.45
        images[i, 1][masks[i]] -= 0.1
    return images, labels, masks, twins


@pytest.fixture(scope="module")
def trained():
    """A tiny CNN trained to detect the square (local stand-in for the suite's trained_small)."""
    torch.manual_seed(0)
    x, y, _, _ = make_tiles(128, seed=0)
    model = Tiny()
    opt = torch.optim.Adam(model.parameters(), lr=0.03)
    xt, yt = torch.from_numpy(x), torch.from_numpy(y)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # a model this small trains fastest on one thread
    try:
        for _ in range(30):
            opt.zero_grad()
            loss = nn.functional.cross_entropy(model(xt), yt)
            loss.backward()
            opt.step()
    finally:
        torch.set_num_threads(threads)
    handle = ModelHandle("tiny", 2, module=model.eval())
    images, labels, masks, twins = make_tiles(64, seed=1)
    acc = (handle.predict(images) == labels).mean()
    assert acc > 0.9, f"test accuracy {acc}"
    pos = labels == 1
    return handle, images[pos], masks[pos], twins[pos]


@pytest.fixture(scope="module")
def fresh():
    """An untrained tiny CNN (unsaturated probabilities, so score drops are not all ~0) and tiles."""
    torch.manual_seed(1)
    images, _, _, _ = make_tiles(8, seed=2)
    return ModelHandle("fresh", 2, module=Tiny().eval()), images


def test_oracle_deletes_faster_and_inserts_faster_than_random(trained):
    handle, images, masks, twins = trained
    n = len(images)
    rng = np.random.default_rng(7)
    oracle = masks.astype(np.float32)
    random = rng.random(masks.shape).astype(np.float32)
    results = {}
    for name, attr in (("oracle", oracle), ("random", random)):
        inputs = MetricInputs(attr, images, np.ones(n, int), model=handle, twins=twins, planted=masks, seed=3)
        results[name] = {
            k: compute_metric(k, inputs, steps=16)[0].values for k in ("deletion-auc", "insertion-auc", "aopc-morf")
        }
        results[name]["mass"] = compute_metric("mass-accuracy", inputs)[0].values
    # Petsiuk et al. 2018: a faithful map deletes faster (lower AUC) and inserts faster (higher AUC).
    assert results["oracle"]["deletion-auc"].mean() + 0.2 < results["random"]["deletion-auc"].mean()
    assert results["oracle"]["insertion-auc"].mean() > results["random"]["insertion-auc"].mean() + 0.2
    assert (results["oracle"]["deletion-auc"] < results["random"]["deletion-auc"]).mean() > 0.9
    assert results["oracle"]["aopc-morf"].mean() > results["random"]["aopc-morf"].mean()
    np.testing.assert_allclose(results["oracle"]["mass"], 1.0)  # the oracle's mass accuracy on its own mask


def _input_gradient(handle: ModelHandle, images: np.ndarray, targets: np.ndarray) -> np.ndarray:
    x = torch.from_numpy(np.ascontiguousarray(images, dtype=np.float32)).requires_grad_(True)
    with torch.enable_grad():  # captum's metrics call explanation functions under no_grad
        out = handle.logits_tensor(x)
        out[torch.arange(len(x)), torch.from_numpy(np.asarray(targets))].sum().backward()
    return x.grad.abs().amax(dim=1).numpy()


def test_max_sensitivity_agrees_with_captum(fresh):
    handle, images = fresh
    images, n, samples, radius, seed = images[:5], 5, 4, 0.05, 11
    targets = np.ones(n, int)
    inputs = MetricInputs(
        _input_gradient(handle, images, targets),
        images,
        targets,
        model=handle,
        rerun_explainer=_input_gradient,
        seed=seed,
    )
    ours = compute_metric("max-sensitivity", inputs, samples=samples, radius=radius)[0].values
    noise = np.concatenate([sensitivity_perturbations(seed, i, images.shape[1:], samples, radius) for i in range(n)])

    def perturb(x, r):  # captum repeats each tile `samples` times (repeat_interleave): same layout as ours
        return x + torch.from_numpy(noise)

    def explain(x, target):
        if isinstance(x, tuple):  # captum passes the unperturbed inputs as a tuple and wants one back
            return (explain(x[0], target),)
        return torch.from_numpy(_input_gradient(handle, x.detach().numpy(), target.numpy()))

    # reference: captum.metrics.sensitivity_max on the same perturbations (Yeh et al. 2019)
    ref = captum_sensitivity_max(
        explain,
        torch.from_numpy(images),
        perturb_func=perturb,
        n_perturb_samples=samples,
        target=torch.from_numpy(targets),
    ).numpy()
    np.testing.assert_allclose(ours, ref, rtol=1e-4, atol=1e-7)
    assert np.all(ours > 0)


@pytest.mark.parametrize("normalize", [True, False])
def test_infidelity_agrees_with_captum(fresh, normalize):
    handle, images = fresh
    images, n, samples, noise_sd, seed = images[:6], 6, 8, 0.05, 5
    c = images.shape[1]
    targets = np.ones(n, int)
    attr = _input_gradient(handle, images, targets)
    inputs = MetricInputs(attr, images, targets, model=handle, seed=seed)
    (res,) = compute_metric(
        "infidelity",
        inputs,
        perturbation="gaussian",
        score="probability",
        samples=samples,
        noise=noise_sd,
        normalize=normalize,
    )
    ours = res.values
    pert = np.concatenate([infidelity_perturbations(seed, i, (H, W), samples, noise_sd) for i in range(n)])
    pert = torch.from_numpy(np.repeat(pert[:, None], c, axis=1))  # shared by every band

    def perturb(x):
        return pert, x - pert

    def forward(x):
        return torch.softmax(handle.module(x).double(), dim=1)

    # captum wants the attribution in the input's shape: spread each pixel's value evenly over the bands,
    # so that the dot product with a band-shared perturbation is the same as ours.
    spread = torch.from_numpy(np.repeat(attr[:, None] / c, c, axis=1))
    # reference: captum.metrics.infidelity on the same perturbations (Yeh et al. 2019)
    ref = captum_infidelity(
        forward,
        perturb,
        torch.from_numpy(images),
        spread,
        target=torch.from_numpy(targets),
        n_perturb_samples=samples,
        normalize=normalize,
    ).numpy()
    assert np.all(ref > 1e-9)  # not a vacuous comparison
    np.testing.assert_allclose(ours, ref, rtol=1e-3, atol=0)


def test_cascading_randomization(trained):
    handle, images, _, _ = trained
    images = images[:6]
    targets = np.ones(6, int)
    state = {k: v.clone() for k, v in handle.module.state_dict().items()}
    inputs = MetricInputs(
        _input_gradient(handle, images, targets), images, targets, model=handle, rerun_explainer=_input_gradient, seed=2
    )
    with handle.counting() as calls:
        (sp,) = compute_metric("randomization-spearman", inputs, cascade_steps="all")
        (ss,) = compute_metric("randomization-ssim", inputs, cascade_steps="all")
    example = torch.from_numpy(images[:1])
    layers = parametrised_layers(handle.module, example)
    assert layers == ["conv1", "conv2", "head"]
    assert sp.curve_labels["randomization-spearman"] == ["head", "conv2", "conv1"]  # top layer first
    assert sp.curves["randomization-spearman"].shape == (6, 3)
    np.testing.assert_array_equal(sp.values, np.abs(sp.curves["randomization-spearman"][:, -1]))  # |rho|
    assert np.all((sp.values >= 0) & (sp.values <= 1)) and np.all((ss.values >= 0) & (ss.values <= 1))
    # gradients depend on the weights (Adebayo et al. 2018): after the full cascade they no longer match
    assert np.nanmean(sp.values) < 0.6
    # the original model is untouched and its call counter did not see the copies
    for k, v in handle.module.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert calls.forward == 0 and calls.backward == 0

    # a model-independent map (Sobel edges of the tile) is not changed at all by the cascade
    def edges(model, ims, t):
        g = np.asarray(ims).mean(axis=1)
        return np.hypot(ndimage.sobel(g, axis=1), ndimage.sobel(g, axis=2))

    inputs = MetricInputs(edges(None, images, None), images, targets, model=handle, rerun_explainer=edges)
    (sp,) = compute_metric("randomization-spearman", inputs, cascade_steps="all")
    (ss,) = compute_metric("randomization-ssim", inputs)
    np.testing.assert_allclose(sp.curves["randomization-spearman"], 1.0)
    np.testing.assert_allclose(ss.values, 1.0)
    (top,) = compute_metric("randomization-spearman", inputs, max_layers=1, cascade_steps="all")
    assert top.curve_labels["randomization-spearman"] == ["head"]


@pytest.mark.parametrize("score", ["log-odds", "probability"])
def test_square_infidelity_agrees_with_captum(fresh, score):
    # Yeh et al.'s square removal: I is the square's indicator, x - I the tile with the square set to the
    # baseline (here its zero image). captum.metrics.infidelity computes the same quantity when its perturb_func
    # returns (indicator spread over the bands, the tile with the square removed) and f is our target score.
    handle, images = fresh
    images, n, samples, seed = images[:6], 6, 8, 4
    c = images.shape[1]
    targets = np.zeros(n, int)
    attr = _input_gradient(handle, images, targets)
    inputs = MetricInputs(attr, images, targets, model=handle, seed=seed)
    (res,) = compute_metric("infidelity", inputs, samples=samples, baseline="zero", side=0.3, score=score)
    side = square_side(0.3, (H, W))
    assert side == 5 and "5 x 5 px" in res.settings["calibrated"]
    squares = np.concatenate([square_perturbations(seed, i, (H, W), samples, side) for i in range(n)])
    squares = torch.from_numpy(np.repeat(squares[:, None], c, axis=1))

    def perturb(x):
        return squares, x * (1 - squares)

    def forward(x):
        p = torch.softmax(handle.module(x).double(), dim=1).clamp(1e-6, 1 - 1e-6)
        return p if score == "probability" else torch.log(p) - torch.log1p(-p)

    spread = torch.from_numpy(np.repeat(attr[:, None] / c, c, axis=1))
    # reference: captum.metrics.infidelity on the same perturbations (Yeh et al. 2019, square removal)
    ref = captum_infidelity(
        forward,
        perturb,
        torch.from_numpy(images),
        spread,
        target=torch.from_numpy(targets),
        n_perturb_samples=samples,
        normalize=True,
    ).numpy()
    assert np.all(ref > 1e-12)
    np.testing.assert_allclose(res.values, ref, rtol=1e-3, atol=0)


def test_square_perturbations_are_squares_inside_the_tile():
    squares = square_perturbations(3, 7, (12, 20), 50, 5)
    assert squares.shape == (50, 12, 20) and np.all(squares.sum(axis=(1, 2)) == 25)
    rows, cols = squares.any(axis=2), squares.any(axis=1)
    assert np.all(rows.sum(axis=1) == 5) and np.all(cols.sum(axis=1) == 5)  # one contiguous 5 x 5 block each
    np.testing.assert_array_equal(squares, square_perturbations(3, 7, (12, 20), 50, 5))  # seeded per tile
    assert square_side(0.01, (48, 48)) == 2 and square_side(1.0, (16, 48)) == 16


def test_infidelity_default_separates_oracle_from_random(trained):
    # The default (squares set to the twin, log-odds score): removing a square changes the score only where it
    # covers the planted square, so the oracle's sum over the square predicts the drop and a random map's does not
    # (Yeh et al. 2019: lower infidelity = more faithful).
    handle, images, masks, twins = trained
    n = len(images)
    rng = np.random.default_rng(11)
    maps = {"oracle": masks.astype(np.float32), "random": rng.random(masks.shape).astype(np.float32)}
    values = {}
    for name, attr in maps.items():
        inputs = MetricInputs(attr, images, np.ones(n, int), model=handle, twins=twins, seed=2)
        (res,) = compute_metric("infidelity", inputs)
        values[name] = res.values
    assert np.nanmean(values["oracle"]) < 0.5 * np.nanmean(values["random"])
    assert (values["oracle"] < values["random"]).mean() > 0.8
    # without twins the default baseline cannot be made: NaN with the reason, never a silent zero
    (res,) = compute_metric("infidelity", MetricInputs(maps["oracle"], images, np.ones(n, int), model=handle))
    assert np.isnan(res.values).all() and "twins" in res.skipped


def test_infidelity_gaussian_noise_is_calibrated(trained):
    # The gaussian variant's calibrated noise ('auto'): per-band noise a fraction of the band spread, halved until
    # at most 1% of the perturbed copies flip; the chosen level is recorded.
    handle, images, masks, _ = trained
    n = len(images)
    inputs = MetricInputs(masks.astype(np.float32), images, np.ones(n, int), model=handle, seed=2)
    (res,) = compute_metric("infidelity", inputs, perturbation="gaussian")
    flips = float(res.settings["calibrated"].split("; ")[1].split("%")[0]) / 100
    assert flips <= 0.01 and 0 < res.settings["fraction_used"] <= 0.5
    assert np.isfinite(res.values).all()


def test_max_sensitivity_default_radius_is_calibrated(trained):
    handle, images, masks, _ = trained
    n = 6
    attr = _input_gradient(handle, images[:n], np.ones(n, int))

    def rerun(model, imgs, targets, tiles=None):
        return _input_gradient(model, imgs, targets)

    inputs = MetricInputs(attr, images[:n], np.ones(n, int), model=handle, rerun_explainer=rerun, seed=4)
    (res,) = compute_metric("max-sensitivity", inputs, samples=4)
    assert "radius = " in res.settings["calibrated"] and np.isfinite(res.values).all()
    # the fixed radius still works and is not calibrated
    (fixed,) = compute_metric("max-sensitivity", inputs, samples=4, radius=0.01)
    assert "calibrated" not in fixed.settings and np.isfinite(fixed.values).all()


def test_work_shared_across_explainers_gives_the_same_values_without_model_calls(trained):
    # subset-drop-corr's subsets, infidelity's squares and max-sensitivity's calibration are drawn from the seed
    # alone, so the model's scores of them are the same for every explainer of the model: the runner keeps them
    # (MetricInputs.shared) and a second explainer's metrics must give the values it would compute itself, bit for
    # bit, without those model passes (only max-sensitivity's re-runs of the explainer remain).
    handle, images, masks, twins = trained
    n = 8
    images, masks, twins = images[:n], masks[:n], twins[:n]
    targets = np.ones(n, int)
    rng = np.random.default_rng(5)
    maps = {"oracle": masks.astype(np.float32), "random": rng.random(masks.shape).astype(np.float32)}

    def rerun(model, imgs, tgts, tiles=None):
        return _input_gradient(model, imgs, tgts)

    metrics = {"subset-drop-corr": {}, "infidelity": {}, "max-sensitivity": {"samples": 3}}
    shared: dict = {}
    for name, attr in maps.items():
        for metric, settings in metrics.items():
            alone = MetricInputs(attr, images, targets, model=handle, twins=twins, rerun_explainer=rerun, seed=2)
            kept = MetricInputs(
                attr, images, targets, model=handle, twins=twins, rerun_explainer=rerun, seed=2, shared=shared
            )
            (expected,) = compute_metric(metric, alone, **settings)
            with handle.counting() as calls:
                (got,) = compute_metric(metric, kept, **settings)
            np.testing.assert_array_equal(got.values, expected.values)
            assert got.settings == expected.settings
            if name == "random" and metric != "max-sensitivity":  # the first explainer computed them
                assert calls.forward == 0
    # a change of the weights (in place) or of the seed is another key: computed afresh, not reused
    before = len(shared)
    inputs = MetricInputs(maps["oracle"], images, targets, model=handle, twins=twins, seed=3, shared=shared)
    compute_metric("subset-drop-corr", inputs)
    assert len(shared) == before + 1
    module = handle.module
    assert module is not None
    saved = {k: v.clone() for k, v in module.state_dict().items()}
    try:
        with torch.no_grad():
            module.head.bias.add_(1.0)
        with handle.counting() as calls:
            compute_metric("subset-drop-corr", inputs)
        assert calls.forward > 0 and len(shared) == before + 2
    finally:
        module.load_state_dict(saved)
