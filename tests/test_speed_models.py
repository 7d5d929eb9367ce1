"""The handle's fast paths change nothing but speed: batched scoring equals one-tile-at-a-time scoring, and
running the zoo models in channels-last memory format leaves every explainer's maps equal (within float
tolerance) to those of the ordinary NCHW layout."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import torch
from scipy import ndimage
from torch import nn

from xbench.explainers import ExplainContext, explain, list_explainers
from xbench.models.base import PROCESS_CALLS, ModelHandle, counting_all, preferred_batch
from xbench.models.zoo import build_torch_model

C, H, W, K = 6, 16, 16, 3
# Cheap settings: the comparison is between layouts, not about the methods' own accuracy.
FAST = {
    "integrated-gradients": {"n_steps": 8},
    "smoothgrad": {"n_samples": 4},
    "occlusion": {"window": 4, "stride": 4},
    "rise": {"n_masks": 40},
    "kernel-shap": {"n_samples": 30, "n_segments": 12},
}
# Float tolerance of the layout change: the two layouts sum the same products in a different order
# (float32 rounding, ~1e-7 relative per operation), so maps agree to a small fraction of their scale, or
# to 1e-6 in the units of the explained score (probability or logit) where the map itself is tiny.
MAP_RTOL, MAP_ATOL = 1e-4, 1e-6

pytestmark = pytest.mark.usefixtures("one_torch_thread")


def tiles(n: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = ndimage.gaussian_filter(rng.random((n, C, H, W)), sigma=(0, 0, 1.5, 1.5))
    return (0.1 + 0.5 * x).astype(np.float32)


def zoo_module(kind: str) -> nn.Module:
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(3)
        module = build_torch_model(kind, C, K)
        for m in module.modules():  # non-trivial batch-norm statistics, so every layer matters
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.2, 0.2)
                m.running_var.uniform_(0.5, 1.5)
    return module.eval()


def test_batch_rule_is_a_power_of_two_near_the_measured_pixels_per_call():
    assert preferred_batch(48, 48) == 32  # the demo's tiles: the batch measured fastest
    assert preferred_batch(32, 32) == 64 and preferred_batch(64, 64) == 16
    assert preferred_batch(4, 4) == 256 and preferred_batch(512, 512) == 4  # clamped
    assert preferred_batch(48, 48, limit=8) == 8


def test_batched_scores_equal_one_tile_at_a_time_and_are_counted():
    x = tiles(70)
    model = ModelHandle("cnn", K, module=zoo_module("cnn"))
    with counting_all() as total, model.counting() as own:
        batched = model.probabilities(x)  # 70 tiles in even chunks of the preferred batch
    single = np.concatenate([model.probabilities(x[i : i + 1]) for i in range(len(x))])
    np.testing.assert_allclose(batched, single, rtol=0, atol=1e-6)  # float32 logits, float64 softmax
    assert own.forward == 70 and total.forward == 70
    logits = model.scores(x, "logit")
    with torch.no_grad():
        reference = model.module(torch.from_numpy(x).contiguous()).double().numpy()
    np.testing.assert_allclose(logits, reference, rtol=1e-5, atol=1e-5)
    # process-wide totals include handles built on the fly (e.g. a metric's randomized copy)
    before = PROCESS_CALLS.forward
    ModelHandle("other", K, module=zoo_module("resnet")).probabilities(x[:5])
    assert PROCESS_CALLS.forward == before + 5


def test_modules_that_reject_channels_last_fall_back_to_nchw():
    class Viewing(nn.Module):  # .view on a spatial tensor fails on channels-last activations
        def __init__(self):
            super().__init__()
            self.conv = nn.Conv2d(C, 2, 3, padding=1)
            self.fc = nn.Linear(2 * H * W, K)

        def forward(self, x):
            y = self.conv(x)
            return self.fc(y.view(y.shape[0], -1))

    model = ModelHandle("viewing", K, module=Viewing().eval())
    x = tiles(3)
    with pytest.warns(UserWarning, match="NCHW"):
        p = model.probabilities(x)
    assert model.layout == "nchw" and p.shape == (3, K)
    assert model.calls.forward == 3  # the layout check is not counted as a model call


def test_handles_survive_pickling_with_their_counters_and_layout():
    model = ModelHandle("cnn", K, module=zoo_module("cnn"))
    x = tiles(4)
    before = model.probabilities(x)
    copy = pickle.loads(pickle.dumps(model))
    assert copy.layout == "channels_last" and copy.calls.forward == 4
    np.testing.assert_array_equal(copy.probabilities(x), before)
    assert copy.calls.forward == 8 and model.calls.forward == 4


def _context(x: np.ndarray, targets: np.ndarray) -> ExplainContext:
    masks = np.zeros((len(x), 1, H, W), dtype=bool)
    masks[:, 0, 4:10, 4:10] = True
    fit = tiles(24, seed=5)
    fit_masks = np.zeros((24, 1, H, W), dtype=bool)
    fit_masks[::2, 0, 2:8, 2:8] = True
    sets = {"road": tiles(10, seed=7) * 1.3}
    sets.update({f"random-{i}": tiles(6, seed=20 + i) for i in range(10)})
    return ExplainContext(
        seed=4,
        batch_size=16,
        twins=x * 0.8,
        masks=masks,
        mask_names=["road"],
        driving_types={0: [], 1: ["road"], 2: ["road"]},
        class_names=["a", "b", "c"],
        fit_images=fit,
        fit_labels=np.arange(24) % K,
        fit_masks=fit_masks,
        concept_sets=sets,
    )


@pytest.mark.parametrize("kind", ["cnn", "resnet", "separable"])
def test_channels_last_leaves_every_explainers_maps_equal(kind):
    module = zoo_module(kind)
    fast = ModelHandle(kind, K, module=module)
    slow = ModelHandle(kind, K, module=zoo_module(kind), channels_last=False)
    x = tiles(4)
    targets = np.array([0, 1, 2, 1])
    fast.probabilities(x[:1])  # the first call settles the layout
    assert fast.layout == "channels_last" and slow.layout == "nchw"
    checked = []
    for spec in list_explainers():
        if spec.source != "xbench":
            continue
        settings = FAST.get(spec.key, {})
        a = explain(spec.key, fast, x, targets, _context(x, targets), **settings).attributions
        b = explain(spec.key, slow, x, targets, _context(x, targets), **settings).attributions
        scale = max(float(np.abs(b).max()), 1e-12)
        assert np.abs(a - b).max() <= MAP_RTOL * scale + MAP_ATOL, (spec.key, np.abs(a - b).max(), scale)
        checked.append(spec.key)
    assert len(checked) >= 16
