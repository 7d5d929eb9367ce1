"""Pixel explainers and controls checked against analytic results, published properties and direct
captum calls (sources named beside each check). Small hand-built torch models only."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from captum.attr import (
    DeepLift,
    GuidedBackprop,
    InputXGradient,
    IntegratedGradients,
    KernelShap,
    LayerAttribution,
    LayerGradCam,
    Occlusion,
    Saliency,
)
from scipy import ndimage
from skimage.filters import sobel
from torch import nn

from xbench.errors import XbenchInputError
from xbench.explainers import ExplainContext, explain, list_explainers
from xbench.explainers.perturbation import rise_masks, superpixels
from xbench.models.base import ModelHandle

C, H, W, K = 3, 16, 16, 3


# Tiny models run fastest on one torch thread (fixture in conftest.py).
pytestmark = pytest.mark.usefixtures("one_torch_thread")


class SmallNet(nn.Module):
    """conv-act-conv-act-GAP-linear with separate activation modules (captum hook requirements)."""

    def __init__(self, act=nn.ReLU, n_classes=K, seed=0):
        super().__init__()
        g = torch.Generator().manual_seed(seed)
        self.conv1 = nn.Conv2d(C, 8, 3, padding=1)
        self.act1 = act()
        self.conv2 = nn.Conv2d(8, 8, 3, padding=1)
        self.act2 = act()
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(8, n_classes)
        with torch.no_grad():
            for p in self.parameters():
                p.copy_(torch.randn(p.shape, generator=g) * 0.5)

    def forward(self, x):
        return self.fc(self.pool(self.act2(self.conv2(self.act1(self.conv1(x))))).flatten(1))


class GapNet(nn.Module):
    """conv-relu-conv, then global average pooling and a linear head: the CAM architecture
    (the last conv layer feeds the pooling directly)."""

    def __init__(self, seed=1):
        super().__init__()
        g = torch.Generator().manual_seed(seed)
        self.conv1 = nn.Conv2d(C, 8, 3, padding=1)
        self.relu1 = nn.ReLU()
        self.conv2 = nn.Conv2d(8, 6, 3, padding=1)
        self.fc = nn.Linear(6, K)
        with torch.no_grad():
            for p in self.parameters():
                p.copy_(torch.randn(p.shape, generator=g) * 0.5)

    def features(self, x):
        return self.conv2(self.relu1(self.conv1(x)))

    def forward(self, x):
        return self.fc(self.features(x).mean(dim=(2, 3)))


class LinearNet(nn.Module):
    """f_k(x) = w_k . x (no bias)."""

    def __init__(self, seed=2):
        super().__init__()
        g = torch.Generator().manual_seed(seed)
        self.flat = nn.Flatten()
        self.fc = nn.Linear(C * H * W, K, bias=False)
        with torch.no_grad():
            self.fc.weight.copy_(torch.randn(K, C * H * W, generator=g))

    def forward(self, x):
        return self.fc(self.flat(x))


def images(n=4, seed=0):
    rng = np.random.default_rng(seed)
    x = ndimage.gaussian_filter(rng.random((n, C, H, W)), sigma=(0, 0, 1.5, 1.5))
    return (0.1 + 0.5 * x).astype(np.float32)


def handle(module, name="net"):
    return ModelHandle(name, K, module=module.eval())


TARGETS = np.array([0, 1, 2, 1])


# ---------------------------------------------------------------------------------------------------
# Integrated gradients completeness (Sundararajan et al. 2017)
# ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("baseline", ["zero", "mean", "blur", "twin"])
def test_integrated_gradients_completeness(baseline):
    # Sundararajan, Taly, Yan 2017 (completeness): sum of attributions = f(x) - f(baseline).
    net = SmallNet(act=nn.Softplus)
    model = handle(net)
    x = images()
    twins = (x * 0.7).astype(np.float32)
    ctx = ExplainContext(twins=twins, batch_size=4)
    exp = explain("integrated-gradients", model, x, TARGETS, ctx, baseline=baseline, n_steps=64)
    from xbench.explainers.base import make_baseline

    base = make_baseline(x, baseline, ctx.twins)
    with torch.no_grad():
        fx = net(torch.from_numpy(x))[np.arange(4), TARGETS]
        fb = net(torch.from_numpy(base))[np.arange(4), TARGETS]
    diff = (fx - fb).numpy()
    total = exp.attributions.reshape(4, -1).sum(axis=1)
    assert np.all(np.abs(total - diff) <= 0.01 * np.abs(diff) + 1e-6), (total, diff)


# ---------------------------------------------------------------------------------------------------
# Linear model: analytic attributions
# ---------------------------------------------------------------------------------------------------


def test_linear_model_ixg_equals_ig_equals_w_times_x():
    # Analytic: for f(x) = w.x, input x gradient = w*x, and IG with a zero baseline = (x - 0) * w
    # (Shrikumar et al. 2016; Sundararajan et al. 2017); summed over bands.
    net = LinearNet()
    model = handle(net)
    x = images()
    w = net.fc.weight.detach().numpy().reshape(K, C, H, W)
    expected = (w[TARGETS] * x).sum(axis=1)
    ixg = explain("input-x-gradient", model, x, TARGETS).attributions
    ig = explain("integrated-gradients", model, x, TARGETS, baseline="zero", n_steps=64).attributions
    np.testing.assert_allclose(ixg, expected, rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(ig, expected, rtol=1e-4, atol=1e-5)


def test_linear_model_occlusion_patch_drop():
    # Analytic: zeroing a patch changes f(x) = w.x by w.x restricted to the patch (all bands).
    net = LinearNet()
    model = handle(net)
    x = images()
    w = net.fc.weight.detach().numpy().reshape(K, C, H, W)
    exp = explain("occlusion", model, x, TARGETS, window=4, stride=4, baseline="zero", score="logit")
    for i, t in enumerate(TARGETS):
        for r in range(0, H, 4):
            for c in range(0, W, 4):
                drop = float((w[t, :, r : r + 4, c : c + 4] * x[i, :, r : r + 4, c : c + 4]).sum())
                np.testing.assert_allclose(exp.attributions[i, r : r + 4, c : c + 4], drop, rtol=1e-4, atol=1e-4)


# ---------------------------------------------------------------------------------------------------
# Grad-CAM = CAM for GAP + linear (Zhou et al. 2016; Selvaraju et al. 2017)
# ---------------------------------------------------------------------------------------------------


def test_grad_cam_equals_cam_up_to_positive_scale():
    # Selvaraju et al. 2017 (Sec. 3.1) / Zhou et al. 2016: with global average pooling and a linear head,
    # Grad-CAM at the last conv layer is CAM = sum_k w_k^c A_k times 1/(h*w) (a positive scale).
    net = GapNet()
    model = handle(net)
    x = images()
    with torch.no_grad():
        a = net.features(torch.from_numpy(x)).numpy()
    wts = net.fc.weight.detach().numpy()
    cam = np.einsum("nkij,nk->nij", a, wts[TARGETS])
    exp = explain("grad-cam", model, x, TARGETS, layer="conv2", relu=False)
    for i in range(4):
        scale = exp.attributions[i].ravel() @ cam[i].ravel() / (cam[i].ravel() @ cam[i].ravel())
        assert scale > 0
        np.testing.assert_allclose(exp.attributions[i], scale * cam[i], rtol=1e-4, atol=1e-6)
        np.testing.assert_allclose(scale, 1.0 / (H * W), rtol=1e-4)
    relu = explain("grad-cam", model, x, TARGETS, layer="conv2").attributions
    np.testing.assert_allclose(relu, np.maximum(cam, 0) / (H * W), rtol=1e-4, atol=1e-6)


def test_grad_cam_pp_matches_paper_formula():
    # Chattopadhay et al. 2018, eq. 19 with Y = exp(S): alpha = g^2 / (2 g^2 + sum_ab A g^3),
    # w_k = sum_ij alpha relu(g); map = relu(sum_k w_k A_k); computed here by hand with autograd.
    net = SmallNet()
    model = handle(net)
    x = images()
    store = {}
    hook = net.conv2.register_forward_hook(lambda m, i, o: store.__setitem__("a", o))
    logits = net(torch.from_numpy(x))
    hook.remove()
    a = store["a"]
    g = torch.autograd.grad(logits[np.arange(4), TARGETS].sum(), a)[0].double()
    a = a.detach().double()
    denom = 2 * g**2 + a.sum(dim=(2, 3), keepdim=True) * g**3
    alpha = g**2 / torch.where(denom != 0, denom, torch.ones_like(denom))
    wk = (alpha * torch.relu(g)).sum(dim=(2, 3), keepdim=True)
    expected = torch.relu((wk * a).sum(dim=1)).numpy()
    exp = explain("grad-cam-pp", model, x, TARGETS, layer="conv2")
    np.testing.assert_allclose(exp.attributions, expected, rtol=1e-4, atol=1e-7)
    assert exp.cost.forward_calls == 4 and exp.cost.backward_calls == 4


def test_grad_cam_upsamples_a_coarse_layer():
    net = nn.Sequential(
        nn.Conv2d(C, 4, 3, padding=1),
        nn.ReLU(),
        nn.MaxPool2d(4),
        nn.Conv2d(4, 4, 1),
        nn.ReLU(),
        nn.AdaptiveAvgPool2d(1),
        nn.Flatten(),
        nn.Linear(4, K),
    )
    model = handle(net)
    exp = explain("grad-cam", model, images(), TARGETS, layer="3")
    assert exp.attributions.shape == (4, H, W) and exp.attributions.dtype == np.float32
    assert exp.settings["layer"] == "3"
    assert explain("grad-cam", model, images(), TARGETS).settings["layer"] == "3"  # last Conv2d


# ---------------------------------------------------------------------------------------------------
# Our wrappers equal direct captum calls
# ---------------------------------------------------------------------------------------------------


def _direct(method_attr, x, t):
    return method_attr(torch.from_numpy(x), torch.from_numpy(t)).detach().numpy()


def test_wrappers_equal_direct_captum_calls():
    # Reference library: captum (same inputs, same settings); our channel reductions applied after.
    net = SmallNet()
    model = handle(net)
    x = images()
    t = TARGETS

    def ours(key, **kw):
        return explain(key, model, x, t, ExplainContext(batch_size=64), **kw).attributions

    sal = _direct(lambda a, b: Saliency(net).attribute(a, target=b, abs=False), x, t)
    np.testing.assert_allclose(ours("gradient"), np.abs(sal).max(axis=1), rtol=1e-5, atol=1e-7)
    ixg = _direct(lambda a, b: InputXGradient(net).attribute(a, target=b), x, t)
    np.testing.assert_allclose(ours("input-x-gradient"), ixg.sum(axis=1), rtol=1e-5, atol=1e-7)
    ig = _direct(lambda a, b: IntegratedGradients(net).attribute(a, baselines=a * 0, target=b, n_steps=64), x, t)
    np.testing.assert_allclose(ours("integrated-gradients"), ig.sum(axis=1), rtol=1e-4, atol=1e-6)
    gb = _direct(lambda a, b: GuidedBackprop(net).attribute(a, target=b), x, t)
    np.testing.assert_allclose(ours("guided-backprop"), np.abs(gb).max(axis=1), rtol=1e-5, atol=1e-7)
    dl = _direct(lambda a, b: DeepLift(net).attribute(a, baselines=a * 0, target=b), x, t)
    np.testing.assert_allclose(ours("deeplift"), dl.sum(axis=1), rtol=1e-4, atol=1e-6)
    gc = _direct(
        lambda a, b: LayerAttribution.interpolate(
            LayerGradCam(net, net.conv2).attribute(a, target=b, relu_attributions=True), (H, W), "bilinear"
        ),
        x,
        t,
    )
    np.testing.assert_allclose(ours("grad-cam", layer="conv2"), gc[:, 0], rtol=1e-5, atol=1e-7)
    # SmoothGrad (Smilkov et al. 2017): the mean captum Saliency gradient over noisy copies; our noise per tile
    # is N(0, (0.15 x band spread)^2) drawn from [seed, tile, 11], so the copies can be rebuilt here.
    spread = x.std(axis=(0, 2, 3), dtype=np.float64)
    noisy = np.stack(
        [
            x[i] + np.random.default_rng([5, i, 11]).standard_normal((8, *x.shape[1:])) * 0.15 * spread[:, None, None]
            for i in range(x.shape[0])
        ]
    ).astype(np.float32)
    grads = np.stack(
        [
            _direct(lambda a, b: Saliency(net).attribute(a, target=b, abs=False), noisy[i], np.repeat(t[i], 8))
            for i in range(x.shape[0])
        ]
    )
    ctx = ExplainContext(seed=5, batch_size=64, band_spread=spread)
    ours_sg = explain("smoothgrad", model, x, t, ctx, n_samples=8).attributions
    np.testing.assert_allclose(ours_sg, np.abs(grads.mean(axis=1)).max(axis=1), rtol=1e-4, atol=1e-6)
    # no noise: plain gradients (captum Saliency)
    sal = _direct(lambda a, b: Saliency(net).attribute(a, target=b, abs=False), x, t)
    flat = explain("smoothgrad", model, x, t, ctx, n_samples=2, noise_fraction=0.0).attributions
    np.testing.assert_allclose(flat, np.abs(sal).max(axis=1), rtol=1e-5, atol=1e-7)

    def probs(a):
        return torch.softmax(net(a).double(), dim=1).float()

    with torch.no_grad():
        occ = _direct(
            lambda a, b: Occlusion(probs).attribute(
                a, sliding_window_shapes=(C, 4, 4), strides=(C, 2, 2), baselines=a * 0, target=b
            ),
            x,
            t,
        )
    np.testing.assert_allclose(
        ours("occlusion", window=4, stride=2, baseline="zero"), occ.mean(axis=1), rtol=1e-4, atol=1e-6
    )


def test_kernel_shap_equals_direct_captum_call():
    # Reference library: captum KernelShap with the same SLIC feature mask and the same torch seed.
    net = SmallNet()
    model = handle(net)
    x = images(2)
    t = TARGETS[:2]
    ours = explain(
        "kernel-shap", model, x, t, ExplainContext(seed=3), n_segments=12, n_samples=40, baseline="zero"
    ).attributions
    for i in range(2):
        seg = superpixels(x[i], 12, 1.0)
        assert seg.shape == (H, W) and seg.min() == 0
        mask = torch.from_numpy(np.broadcast_to(seg, (1, C, H, W)).copy())
        with torch.random.fork_rng():
            torch.manual_seed(int(np.random.SeedSequence([3, i]).generate_state(1)[0]))
            ref = KernelShap(lambda a: torch.softmax(net(a).double(), 1).float()).attribute(
                torch.from_numpy(x[i : i + 1]),
                baselines=0.0,
                target=int(t[i]),
                feature_mask=mask,
                n_samples=40,
                perturbations_per_eval=64,
            )
        np.testing.assert_allclose(ours[i], ref[0].mean(dim=0).numpy(), rtol=1e-4, atol=1e-6)
        # each superpixel carries one value
        for s in np.unique(seg):
            assert np.ptp(ours[i][seg == s]) < 1e-6


def test_kernel_shap_coalition_inputs_equal_captums_default_transform():
    # Reference library: captum's default_from_interp_rep_transform (mask * tile + (1 - mask) * baseline),
    # which our select replaces; equal bit for bit on finite tiles and baselines of either sign.
    from captum.attr._core.lime import default_from_interp_rep_transform

    from xbench.explainers.perturbation import _coalition_input

    rng = np.random.default_rng(5)
    seg = torch.from_numpy(rng.integers(0, 9, size=(1, 1, H, W)))
    tile = torch.from_numpy(rng.normal(size=(1, C, H, W)).astype(np.float32))
    base = torch.from_numpy(rng.normal(size=(1, C, H, W)).astype(np.float32))
    for _ in range(20):
        coalition = torch.from_numpy(rng.integers(0, 2, size=(1, 9)))
        ours = _coalition_input(coalition, tile, feature_mask=seg, baselines=base)
        ref = default_from_interp_rep_transform(coalition, tile, feature_mask=seg, baselines=base)
        assert torch.equal(ours, ref)


# ---------------------------------------------------------------------------------------------------
# RISE (written here; Petsiuk et al. 2018)
# ---------------------------------------------------------------------------------------------------


def test_rise_masks_and_linear_expectation():
    # Petsiuk et al. 2018: masks are upsampled binary grids in [0, 1] with mean about p.
    rng = np.random.default_rng(0)
    m = rise_masks(400, 4, 0.5, (H, W), rng)
    assert m.shape == (400, H, W) and m.min() >= 0 and m.max() <= 1
    assert abs(m.mean() - 0.5) < 0.05
    # Analytic: for f(x) = w.x and a zero baseline, E[f(x*M) M(p)] / p ~ sum_q w_q x_q E[M_q M_p] / p; the
    # map correlates strongly with the per-pixel contribution w.x smoothed by the mask correlation.
    net = LinearNet()
    model = handle(net)
    x = images(1)
    exp = explain("rise", model, x, TARGETS[:1], n_masks=2000, grid=4, score="logit")
    w = net.fc.weight.detach().numpy().reshape(K, C, H, W)
    contrib = ndimage.gaussian_filter((w[TARGETS[0]] * x[0]).sum(axis=0), 3)
    r = np.corrcoef(exp.attributions[0].ravel(), contrib.ravel())[0, 1]
    assert r > 0.6, r


# ---------------------------------------------------------------------------------------------------
# Black-box path
# ---------------------------------------------------------------------------------------------------


def black_box():
    rng = np.random.default_rng(4)
    w = rng.normal(size=(K, C, H, W))

    def predict(batch):
        s = np.einsum("nchw,kchw->nk", batch, w) / 50.0
        e = np.exp(s - s.max(axis=1, keepdims=True))
        return e / e.sum(axis=1, keepdims=True)

    return ModelHandle("callable", K, predict_fn=predict), predict


@pytest.mark.parametrize(
    "key,settings",
    [
        ("occlusion", {"window": 4, "stride": 4}),
        ("rise", {"n_masks": 64}),
        ("kernel-shap", {"n_segments": 10, "n_samples": 30}),
        ("random", {}),
        ("edges", {}),
        ("oracle", {}),
    ],
)
def test_black_box_explainers_run_on_a_plain_callable(key, settings):
    model, predict = black_box()
    x = images()
    masks = np.zeros((4, 2, H, W), bool)
    masks[:, 0, 2:5] = True
    masks[:, 1, 8:12, 8:12] = True
    ctx = ExplainContext(
        masks=masks,
        mask_names=["road", "building"],
        driving_types={0: [], 1: ["road"], 2: ["road", "building"]},
        batch_size=16,
    )
    exp = explain(key, model, x, TARGETS, ctx, **settings)
    assert exp.attributions.shape == (4, H, W) and exp.attributions.dtype == np.float32
    assert np.isfinite(exp.attributions).all()
    assert exp.cost.backward_calls == 0
    if key in ("random", "edges", "oracle"):
        assert exp.cost.forward_calls == 0
    else:
        assert exp.cost.forward_calls > 4


def test_black_box_occlusion_matches_probability_drop():
    # Analytic (definition of occlusion, Zeiler and Fergus 2014): with non-overlapping windows the value
    # on a patch is p_t(x) - p_t(x with the patch at the baseline).
    model, predict = black_box()
    x = images(2)
    exp = explain("occlusion", model, x, TARGETS[:2], window=8, stride=8, baseline="zero")
    for i in range(2):
        occluded = x[i : i + 1].copy()
        occluded[:, :, 8:, :8] = 0
        drop = predict(x[i : i + 1])[0, TARGETS[i]] - predict(occluded)[0, TARGETS[i]]
        np.testing.assert_allclose(exp.attributions[i, 8:, :8], drop, rtol=1e-4, atol=1e-6)


def test_gradient_method_on_black_box_is_a_clear_error():
    model, _ = black_box()
    for key in ("gradient", "integrated-gradients", "grad-cam", "activation-clusters", "tcav"):
        with pytest.raises(XbenchInputError, match="black box") as err:
            explain(key, model, images(), TARGETS)
        assert "occlusion" in str(err.value)  # names the explainers that do work
    with pytest.raises(XbenchInputError, match="no logits"):
        explain("occlusion", model, images(), TARGETS, score="logit")


# ---------------------------------------------------------------------------------------------------
# Controls
# ---------------------------------------------------------------------------------------------------


def test_controls():
    model = handle(SmallNet())
    x = images()
    masks = np.zeros((4, 2, H, W), bool)
    masks[:, 0, 2:5] = True
    masks[:, 1, 8:12, 8:12] = True
    ctx = ExplainContext(
        seed=9,
        masks=masks,
        mask_names=["road", "building"],
        driving_types={0: [], 1: ["road"], 2: ["road", "building"]},
    )
    # edges: Sobel magnitude (reference: scikit-image sobel), mean over bands; ignores the model
    ref = np.stack([np.mean([sobel(x[i, b].astype(np.float64)) for b in range(C)], axis=0) for i in range(4)])
    edges = explain("edges", model, x, TARGETS, ctx)
    np.testing.assert_allclose(edges.attributions, ref, rtol=1e-5, atol=1e-7)
    assert edges.cost.forward_calls == 0
    # oracle: union of the target's driving-type masks
    oracle = explain("oracle", model, x, TARGETS, ctx).attributions
    assert oracle[0].sum() == 0
    np.testing.assert_array_equal(oracle[1], masks[1, 0])
    np.testing.assert_array_equal(oracle[2], masks[2].any(axis=0))
    # random: seeded
    a = explain("random", model, x, TARGETS, ctx).attributions
    b = explain("random", model, x, TARGETS, ctx).attributions
    c = explain("random", model, x, TARGETS, ExplainContext(seed=10)).attributions
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c) and a.min() >= 0 and a.max() < 1
    with pytest.raises(XbenchInputError, match="driving"):
        explain("oracle", model, x, TARGETS, ExplainContext(masks=masks, mask_names=["road", "building"]))
    with pytest.raises(XbenchInputError, match="unknown structure types"):
        explain(
            "oracle",
            model,
            x,
            TARGETS,
            ExplainContext(masks=masks, mask_names=["road", "building"], driving_types={1: ["field"]}),
        )
    with pytest.raises(XbenchInputError, match="masks"):
        explain("oracle", model, x, TARGETS)


# ---------------------------------------------------------------------------------------------------
# Protocol: determinism, batching, cost, every explainer on one model
# ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "key,settings",
    [("smoothgrad", {"n_samples": 4}), ("rise", {"n_masks": 32}), ("kernel-shap", {"n_segments": 8, "n_samples": 20})],
)
def test_deterministic_for_a_seed_and_batch_independent(key, settings):
    model = handle(SmallNet())
    x = images()
    a = explain(key, model, x, TARGETS, ExplainContext(seed=1, batch_size=64), **settings).attributions
    b = explain(key, model, x, TARGETS, ExplainContext(seed=1, batch_size=64), **settings).attributions
    c = explain(key, model, x, TARGETS, ExplainContext(seed=2, batch_size=64), **settings).attributions
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    if key != "smoothgrad":  # rise / kernel-shap: a tile's map ignores the other tiles and the batch size
        d = explain(key, model, x, TARGETS, ExplainContext(seed=1, batch_size=3), **settings).attributions
        np.testing.assert_allclose(a, d, rtol=1e-5, atol=1e-7)


def test_batching_does_not_change_gradient_maps_and_costs_are_counted():
    model = handle(SmallNet())
    x = images()
    one = explain("integrated-gradients", model, x, TARGETS, ExplainContext(batch_size=1), n_steps=8)
    all_ = explain("integrated-gradients", model, x, TARGETS, ExplainContext(batch_size=64), n_steps=8)
    np.testing.assert_allclose(one.attributions, all_.attributions, rtol=1e-5, atol=1e-7)
    assert one.cost.forward_calls == 4 * 8 and one.cost.backward_calls == 4 * 8
    g = explain("gradient", model, x, TARGETS).cost
    assert (g.forward_calls, g.backward_calls) == (4, 4) and g.seconds > 0
    gc = explain("grad-cam", model, x, TARGETS).cost
    assert (gc.forward_calls, gc.backward_calls) == (4, 4)
    occ = explain("occlusion", model, x, TARGETS, window=8, stride=8).cost
    assert occ.forward_calls == 4 * (4 + 1) and occ.backward_calls == 0  # 4 windows + the original


def test_every_pixel_explainer_gives_finite_float32_maps():
    model = handle(SmallNet())
    x = images()
    fast = {
        "rise": {"n_masks": 16},
        "kernel-shap": {"n_segments": 6, "n_samples": 12},
        "integrated-gradients": {"n_steps": 4},
        "smoothgrad": {"n_samples": 2},
        "occlusion": {"window": 8, "stride": 8},
    }
    masks = np.zeros((4, 1, H, W), bool)
    masks[:, 0, 4:8] = True
    ctx = ExplainContext(masks=masks, mask_names=["road"], driving_types={1: ["road"]})
    for spec in list_explainers():
        if spec.kind == "concept" or spec.source != "xbench":
            continue
        exp = explain(spec.key, model, x, TARGETS, ctx, **fast.get(spec.key, {}))
        assert exp.attributions.shape == (4, H, W), spec.key
        assert exp.attributions.dtype == np.float32 and np.isfinite(exp.attributions).all(), spec.key
        assert "Explainer" not in spec.citation and len(spec.citation) > 10


def test_deeplift_and_guided_backprop_report_unsupported_modules_clearly():
    class Reused(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(C, 4, 3, padding=1)
            self.relu = nn.ReLU()
            self.fc = nn.Linear(4, K)

        def forward(self, x):  # the same ReLU module used twice: captum's DeepLift refuses
            return self.fc(self.relu(self.relu(self.conv(x)) - 0.1).mean(dim=(2, 3)))

    class Functional(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(C, 4, 3, padding=1)
            self.fc = nn.Linear(4, K)

        def forward(self, x):  # functional relu: captum would silently fall back to plain gradients
            return self.fc(torch.relu(self.conv(x)).mean(dim=(2, 3)))

    with pytest.raises(XbenchInputError, match="nn.ReLU"):
        explain("deeplift", handle(Reused()), images(), TARGETS)
    for key in ("deeplift", "guided-backprop"):
        with pytest.raises(XbenchInputError, match="no nn.ReLU"):
            explain(key, handle(Functional()), images(), TARGETS)


def test_completeness_gap_is_the_relative_convergence_delta():
    # Sundararajan et al. 2017 (completeness): sum of IG attributions = f(x) - f(baseline); the self-check is
    # |sum - (f(x) - f(b))| / |f(x) - f(b)| of the target logit, computed here by hand from the model.
    from xbench.explainers.gradients import COMPLETENESS_KEY

    x = images()
    for key, steps, act in (("integrated-gradients", {"n_steps": 4}, nn.Softplus), ("deeplift", {}, nn.Sigmoid)):
        net = SmallNet(act=act)
        model = handle(net)
        checks: dict = {}
        ctx = ExplainContext(batch_size=3, self_checks=checks)
        exp = explain(key, model, x, TARGETS, ctx, baseline="zero", **steps)
        with torch.no_grad():
            change = (net(torch.from_numpy(x)) - net(torch.zeros_like(torch.from_numpy(x))))[np.arange(4), TARGETS]
        total = exp.attributions.reshape(4, -1).sum(axis=1)
        expected = np.abs(total - change.numpy()) / np.abs(change.numpy())
        np.testing.assert_allclose(checks[COMPLETENESS_KEY], expected, rtol=1e-3, atol=1e-5)
        # the self-check costs no counted model calls
        plain = explain(key, model, x, TARGETS, ExplainContext(batch_size=3), baseline="zero", **steps)
        assert plain.cost.forward_calls == exp.cost.forward_calls
    assert checks[COMPLETENESS_KEY].max() > 0  # not exact on these nets: a non-vacuous check
