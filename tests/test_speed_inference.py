"""The handle's frozen inference copy changes nothing but speed: it scores like the eager module on every zoo
model, follows weight changes, steps aside when something hooks the module, and is never used for a module
that branches on its input. The activation-clusters fit kept per process gives the maps of a fresh fit."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import torch
from torch import nn

from xbench.explainers import ExplainContext, explain
from xbench.explainers import clusters as clusters_module
from xbench.models.base import ModelHandle
from xbench.models.zoo import build_torch_model

C, H, W, K = 6, 16, 16, 3
# Float tolerance: the frozen copy folds batch-norm into the convolution weights and sums in another order
# (float32 rounding, ~1e-7 relative per operation), so logits agree to ~1e-6; probabilities to less.
LOGIT_ATOL = 1e-5

pytestmark = pytest.mark.usefixtures("one_torch_thread")


def tiles(n: int, seed: int = 0) -> np.ndarray:
    return (0.1 + 0.5 * np.random.default_rng(seed).random((n, C, H, W))).astype(np.float32)


def zoo_module(kind: str) -> nn.Module:
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(11)
        module = build_torch_model(kind, C, K)
        for m in module.modules():  # non-trivial batch-norm statistics: folding them must be exact
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.3, 0.3)
                m.running_var.uniform_(0.5, 1.5)
                m.weight.data.uniform_(0.5, 1.5)
                m.bias.data.uniform_(-0.2, 0.2)
    return module.eval()


@pytest.mark.parametrize("kind", ["cnn", "resnet", "separable"])
def test_frozen_copy_scores_like_the_eager_module(kind):
    fast = ModelHandle(kind, K, module=zoo_module(kind))
    eager = ModelHandle(kind, K, module=zoo_module(kind), fast_inference=False)
    x = tiles(37)  # chunks of several sizes (the copy is traced on 2 tiles)
    a, b = fast.scores(x, "logit"), eager.scores(x, "logit")
    assert any(v is not None for v in fast._inference.values())  # the frozen path did run
    np.testing.assert_allclose(a, b, rtol=0, atol=LOGIT_ATOL)
    np.testing.assert_allclose(fast.probabilities(x), eager.probabilities(x), rtol=0, atol=LOGIT_ATOL)
    assert fast.calls.forward == eager.calls.forward == 74  # counted like eager calls


def test_frozen_copy_follows_weight_changes_and_pickling():
    module = zoo_module("cnn")
    handle = ModelHandle("cnn", K, module=module)
    x = tiles(8)
    before = handle.scores(x, "logit")
    with torch.no_grad():
        module.head.weight.mul_(-1.0)  # in place, as a metric's re-initialisation does
    after = handle.scores(x, "logit")
    with torch.no_grad():
        reference = module(torch.from_numpy(x)).double().numpy()
    np.testing.assert_allclose(after, reference, rtol=0, atol=LOGIT_ATOL)
    assert np.abs(after - before).max() > 1e-3
    copy = pickle.loads(pickle.dumps(handle))  # the frozen copy is not pickled; it is rebuilt on arrival
    np.testing.assert_allclose(copy.scores(x, "logit"), after, rtol=0, atol=LOGIT_ATOL)


def test_a_hooked_module_runs_eagerly():
    handle = ModelHandle("cnn", K, module=zoo_module("cnn"))
    x = tiles(4)
    handle.scores(x)  # builds the frozen copy
    seen = []
    hook = handle.module.relu4.register_forward_hook(lambda _m, _a, out: seen.append(out.shape[0]))
    try:
        handle.scores(x)
    finally:
        hook.remove()
    assert seen == [4]  # the hook saw the pass: the eager module ran
    assert handle.calls.forward == 8


def test_a_module_that_branches_on_its_input_is_never_frozen():
    class Branching(nn.Module):
        def __init__(self):
            super().__init__()
            self.a = nn.Conv2d(C, K, 3, padding=1)
            self.b = nn.Conv2d(C, K, 1)

        def forward(self, x):
            y = self.a(x) if float(x.mean()) > 0.5 else self.b(x)  # a trace would freeze one branch
            return y.mean(dim=(2, 3))

    handle = ModelHandle("branching", K, module=Branching().eval())
    low, high = tiles(3) * 0.5, tiles(3) * 0.5 + 0.6
    for x in (low, high):
        with torch.no_grad():
            reference = handle.module(torch.from_numpy(x)).double().numpy()
        np.testing.assert_allclose(handle.scores(x, "logit"), reference, rtol=0, atol=1e-6)
    assert all(v is None for v in handle._inference.values())


def test_kept_cluster_fit_gives_the_maps_of_a_fresh_fit():
    module = zoo_module("cnn")
    handle = ModelHandle("cnn", K, module=module)
    x = tiles(6, seed=1)
    fit = tiles(20, seed=2)
    fit_masks = np.zeros((20, 1, H, W), dtype=bool)
    fit_masks[::2, 0, 2:8, 2:8] = True
    context = ExplainContext(
        seed=3,
        batch_size=8,
        mask_names=["road"],
        driving_types={0: [], 1: ["road"], 2: ["road"]},
        class_names=["a", "b", "c"],
        fit_images=fit,
        fit_labels=np.arange(20) % K,
        fit_masks=fit_masks,
    )
    targets = np.array([0, 1, 2, 1, 0, 2])
    settings = {"cluster_range": [2, 3]}
    clusters_module._FITS.clear()
    first = explain("activation-clusters", handle, x, targets, context, **settings)
    assert len(clusters_module._FITS) == 1
    kept = explain("activation-clusters", handle, x, targets, context, **settings)
    assert len(clusters_module._FITS) == 1  # reused, not refitted
    np.testing.assert_array_equal(kept.attributions, first.attributions)
    assert kept.concepts.rows == first.concepts.rows
    with torch.no_grad():
        module.conv4.weight.mul_(0.5)  # another model state: another fit
    explain("activation-clusters", handle, x, targets, context, **settings)
    assert len(clusters_module._FITS) == 2
    clusters_module._FITS.clear()


def test_fit_keys_follow_the_bytes_and_remember_only_arrays_that_cannot_change():
    import hashlib

    from xbench.explainers import base as explainer_base
    from xbench.explainers.base import array_digest

    data = np.arange(24, dtype=np.float32).reshape(2, 3, 4)
    reference = hashlib.blake2b(data.tobytes(), digest_size=16).digest()  # hashlib over the C-order bytes
    assert array_digest(data) == reference
    assert array_digest(np.asfortranarray(data)) == reference  # the layout does not matter, the values do
    data[0, 0, 0] = 99.0  # a writeable array is hashed again every time
    assert array_digest(data) != reference
    frozen = data.copy()
    frozen.flags.writeable = False
    view = frozen[1:]
    first = array_digest(view)
    assert first == hashlib.blake2b(view.tobytes(), digest_size=16).digest()
    # entries of this array (an id alone could also match an entry of a dead array that had the same id)
    remembered = [k for k, (owner, _) in explainer_base._FROZEN_DIGESTS.items() if owner() is frozen]
    assert len(remembered) == 1 and array_digest(frozen[1:]) == first  # a new view of the same place
    assert array_digest(frozen[:1]) != first  # another place in the same array


@pytest.mark.parametrize("kind", ["cnn", "resnet", "separable"])
def test_one_pass_for_many_layers_reads_what_one_pass_per_layer_reads(kind):
    # TCAV reads every ReLU layer of the example sets: one forward pass per batch with all the taps gives the
    # same arrays, bit for bit, as one pass per layer (the same eager module runs the same operations)
    from xbench.explainers.base import layer_activations, layers_activations
    from xbench.explainers.tcav import tcav_evidence_layers

    handle = ModelHandle(kind, K, module=zoo_module(kind))
    names = tcav_evidence_layers(handle)
    images = tiles(10, seed=3)
    with handle.counting() as calls:
        together = layers_activations("test", handle, names, images, batch_size=4)
    assert calls.forward == 10  # one pass for all the layers
    for name in names:
        assert np.array_equal(together[name], layer_activations("test", handle, name, images, batch_size=4)), name
    # a reduction applied in torch (TCAV's mean over positions, in float64) equals the same mean taken of
    # the full maps afterwards, to float32 rounding of the maps' sums
    pooled = layers_activations(
        "test", handle, names, images, 4, reduce=lambda _, a: a.mean(dim=(2, 3), dtype=torch.float64)
    )
    for name in names:
        assert pooled[name].dtype == np.float64 and pooled[name].shape == together[name].shape[:2]
        assert np.allclose(pooled[name], together[name].astype(np.float64).mean(axis=(2, 3)), rtol=1e-6, atol=1e-7)


class _Slow(nn.Module):
    """Sleeps a known time forward and backward (a custom autograd function): the handle's clock must see
    those seconds inside the model's passes and nothing of what the caller does around them."""

    FORWARD, BACKWARD = 0.05, 0.08

    def __init__(self):
        super().__init__()
        self.linear = nn.Linear(C * H * W, K)

    def forward(self, x):
        import time

        class SleepBack(torch.autograd.Function):
            @staticmethod
            def forward(ctx, t):
                return t.view_as(t)

            @staticmethod
            def backward(ctx, g):
                time.sleep(_Slow.BACKWARD)
                return g

        time.sleep(self.FORWARD)
        return self.linear(SleepBack.apply(x).flatten(1))


def test_the_handle_times_the_model_passes_not_the_work_around_them():
    import time

    handle = ModelHandle("slow", K, module=_Slow(), channels_last=False, fast_inference=False)
    x = torch.from_numpy(tiles(2)).requires_grad_(True)
    with handle.counting() as calls:
        time.sleep(0.1)  # the caller's own work: not the model's
        out = handle.logits_tensor(x)
        time.sleep(0.1)
        out[:, 0].sum().backward()
    assert (calls.forward, calls.backward) == (2, 2)
    # known answer (time.sleep's documented minimum duration, Python library reference): 0.05 s forward +
    # 0.08 s backward slept inside the passes; the 0.2 s outside are not
    # counted (allowance 0.05 s for the hooks' own work and a busy machine's scheduling)
    assert _Slow.FORWARD + _Slow.BACKWARD <= calls.seconds < _Slow.FORWARD + _Slow.BACKWARD + 0.05
