"""Defaults fitted to the data: Grad-CAM reads the rectified output of the last conv block, and SmoothGrad's
default noise (a fraction of each band's spread) keeps the model's predictions on most noisy copies."""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from xbench.explainers import ExplainContext, explain
from xbench.explainers.gradients import SMOOTHGRAD_NOISE_FRACTION
from xbench.models.base import ModelHandle
from xbench.models.zoo import build_torch_model


def test_grad_cam_at_the_rectified_layer_equals_a_hand_computation() -> None:
    torch.manual_seed(0)
    module = build_torch_model("cnn", 6, 2, width=8).eval()
    model = ModelHandle("cnn", 2, module=module)
    x = np.random.default_rng(0).random((3, 6, 16, 16)).astype(np.float32)
    targets = np.array([0, 1, 1])
    assert model.default_layer() == "relu4"
    # Hand computation (Selvaraju et al. 2017, eqs. 1-2): A = the hooked rectified feature maps,
    # alpha_k = spatial mean of dS/dA_k, map = ReLU(sum_k alpha_k A_k), bilinearly upsampled.
    store = {}

    def hook(_m, _i, out):
        out.retain_grad()
        store["a"] = out

    handle = module.relu4.register_forward_hook(hook)
    try:
        logits = module(torch.from_numpy(x))
        logits[torch.arange(3), torch.from_numpy(targets)].sum().backward()
    finally:
        handle.remove()
    a, g = store["a"].detach(), store["a"].grad
    assert (a >= 0).all()  # rectified
    cam = F.relu((g.mean(dim=(2, 3), keepdim=True) * a).sum(dim=1, keepdim=True))
    hand = F.interpolate(cam, size=(16, 16), mode="bilinear", align_corners=False)[:, 0].numpy()
    ours = explain("grad-cam", model, x, targets, ExplainContext(batch_size=2)).attributions
    np.testing.assert_allclose(ours, hand, rtol=1e-4, atol=1e-6)


def test_smoothgrad_default_noise_keeps_most_predictions(trained_small) -> None:
    # Smilkov et al. 2017 suggest noise of 10-20% of the input range; ours is 15% of each band's spread on the
    # training split. Measured on the suite's small trained cnn: the share of noisy copies whose predicted
    # class equals the clean tile's (recorded in notes/truth.md).
    train, test = trained_small.data.train, trained_small.data.test
    spread = train.images.std(axis=(0, 2, 3), dtype=np.float64)
    images = test.images[:32]
    rng = np.random.default_rng(0)
    copies = 8
    noise = (
        rng.standard_normal((len(images), copies, *images.shape[1:]))
        * (SMOOTHGRAD_NOISE_FRACTION * spread)[None, None, :, None, None]
    )
    noisy = (images[:, None] + noise).reshape(-1, *images.shape[1:]).astype(np.float32)
    clean = trained_small.handle.predict(images)
    kept = float((trained_small.handle.predict(noisy) == np.repeat(clean, copies)).mean())
    assert kept >= 0.9, kept
    # the explainer takes the same rule from the context
    ctx = ExplainContext(batch_size=64, band_spread=spread)
    maps = explain("smoothgrad", trained_small.handle, images[:2], clean[:2], ctx, n_samples=4).attributions
    assert np.isfinite(maps).all() and maps.shape == (2, *images.shape[2:])


def test_infidelity_default_separates_the_oracle_from_random_on_a_pipeline_model(trained_small) -> None:
    # The suite's small cnn, trained by the pipeline on synthetic road tiles. Infidelity's default removes random
    # squares (set to the twin) and regresses the map's sum over the square on the drop of the target's log-odds
    # (Yeh et al. 2019): the planted mask predicts the drops (a square changes the score only where it covers
    # the road), a random map does not. Yeh et al.'s Gaussian noise separated nothing on the shipped tasks.
    from xbench.metrics import MetricInputs, compute_metric

    task, test = trained_small.task, trained_small.data.test
    targets = test.labels.astype(np.int64)
    road = [c for c, types in task.class_driving_types.items() if "road" in types][0]
    rows = np.flatnonzero(targets == road)[:16]
    planted = test.masks[rows, test.mask_names.index("road")].astype(np.float32)
    rng = np.random.default_rng(3)
    means = {}
    for name, attr in (("oracle", planted), ("random", rng.random(planted.shape).astype(np.float32))):
        inputs = MetricInputs(
            attr, test.images[rows], targets[rows], model=trained_small.handle, twins=test.twins[rows], seed=1
        )
        (res,) = compute_metric("infidelity", inputs)
        means[name] = float(np.nanmean(res.values))
    assert means["oracle"] < 0.8 * means["random"], means  # measured: 0.18 against 0.26
