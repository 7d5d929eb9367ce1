"""The separable model family (depthwise-separable convolutions after Howard et al. 2017) works with every
layer-based explainer on its layers, and the tcav default-layer rule picks the ReLU feeding its last conv."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from xbench.explainers import ExplainContext, explain
from xbench.explainers.tcav import tcav_default_layer
from xbench.models.base import ModelHandle
from xbench.models.zoo import build_torch_model

pytestmark = pytest.mark.usefixtures("one_torch_thread")

LAYER_EXPLAINERS = ("grad-cam", "grad-cam-pp", "tcav", "activation-clusters")


@pytest.fixture(scope="module")
def separable_case():
    torch.manual_seed(0)
    model = ModelHandle("separable", 2, module=build_torch_model("separable", 3, 2, width=4).eval())
    rng = np.random.default_rng(0)
    x = rng.random((4, 3, 32, 32), dtype=np.float32)
    masks = np.zeros((4, 1, 32, 32), bool)
    masks[:, 0, 8:16, :] = True
    x[:, 0][masks[:, 0]] += 0.5
    sets = {
        "road": x[:2].repeat(2, axis=0),
        **{f"random-{i}": rng.random((4, 3, 32, 32), dtype=np.float32) for i in range(10)},
    }
    ctx = ExplainContext(fit_images=x, fit_masks=masks, masks=masks, mask_names=["road"], concept_sets=sets)
    return model, x, np.array([0, 1, 0, 1]), ctx


@pytest.mark.parametrize("layer", ["stem_relu", "block2.depthwise_relu", "block3.pointwise", "block4.pointwise_relu"])
def test_layer_explainers_on_separable_layers(separable_case, layer):
    model, x, y, ctx = separable_case
    for key in LAYER_EXPLAINERS:
        settings = {"n_clusters": 2} if key == "activation-clusters" else {}
        exp = explain(key, model, x, y, ctx, layer=layer, **settings)
        assert exp.attributions.shape == (4, 32, 32) and np.isfinite(exp.attributions).all(), (key, layer)
        assert exp.settings["layer"] == layer


def test_default_layers_of_the_separable_model(separable_case):
    model, x, y, ctx = separable_case
    assert model.default_layer() == "block4.pointwise_relu"  # the rectified output of the last conv block
    # tcav's stated rule: the last ReLU registered before the explain layer
    assert tcav_default_layer(model) == "block4.depthwise_relu"
    assert explain("tcav", model, x, y, ctx).settings["layer"] == "block4.depthwise_relu"
    assert explain("grad-cam", model, x, y, ctx).settings["layer"] == "block4.pointwise_relu"
