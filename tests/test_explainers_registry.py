"""The explainer registry: validation of bad input, plugins (decorator and entry points) and the
`xbench explainers` listing."""

from __future__ import annotations

import importlib.metadata
import json
import sys
import textwrap

import numpy as np
import pytest
import torch
from torch import nn

from xbench.cli import main
from xbench.errors import XbenchInputError
from xbench.explainers import (
    ExplainContext,
    NonFiniteAttributionError,
    explain,
    get_explainer,
    list_explainers,
    load_plugins,
    register_explainer,
    registry,
    unregister_explainer,
)
from xbench.models.base import ModelHandle

C, H, W, K = 3, 8, 8, 3
BUILTIN = [
    "gradient",
    "input-x-gradient",
    "integrated-gradients",
    "smoothgrad",
    "guided-backprop",
    "deeplift",
    "grad-cam",
    "grad-cam-pp",
    "occlusion",
    "rise",
    "kernel-shap",
    "activation-clusters",
    "tcav",
    "random",
    "edges",
    "oracle",
]


# Tiny models run fastest on one torch thread (fixture in conftest.py).
pytestmark = pytest.mark.usefixtures("one_torch_thread")


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.conv = nn.Conv2d(C, 4, 3, padding=1)
        self.relu = nn.ReLU()
        self.fc = nn.Linear(4, K)

    def forward(self, x):
        return self.fc(self.relu(self.conv(x)).mean(dim=(2, 3)))


def model():
    return ModelHandle("tiny", K, module=Net().eval())


def images(n=3):
    return np.random.default_rng(0).random((n, C, H, W), dtype=np.float32)


# ---------------------------------------------------------------------------------------------------
# Registry contents
# ---------------------------------------------------------------------------------------------------


def test_every_builtin_is_registered_with_citation_needs_and_defaults():
    specs = {s.key: s for s in list_explainers()}
    assert set(BUILTIN) <= set(specs)
    assert [s.key for s in list_explainers() if s.source == "xbench"] == BUILTIN
    for key in BUILTIN:
        s = specs[key]
        assert s.citation and s.description and isinstance(s.defaults, dict)
        assert s.needs <= set(registry.NEEDS)
    black_box = {s.key for s in specs.values() if s.black_box_ok and s.source == "xbench"}
    assert black_box == {"occlusion", "rise", "kernel-shap", "random", "edges", "oracle"}
    assert "Sundararajan" in specs["integrated-gradients"].citation
    assert "Petsiuk" in specs["rise"].citation and "Kim" in specs["tcav"].citation
    assert specs["grad-cam"].needs == {"gradients", "layer"}
    assert specs["tcav"].needs == {"gradients", "layer", "concept-sets"}
    assert specs["activation-clusters"].needs == {"layer", "fit-set"}
    assert specs["oracle"].needs == {"masks"}


# ---------------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------------


def test_unknown_explainer_lists_the_valid_ones():
    with pytest.raises(XbenchInputError) as err:
        explain("grad-kam", model(), images(), np.zeros(3, int))
    msg = str(err.value)
    assert "grad-kam" in msg and "unknown explainer" in msg
    for key in BUILTIN:
        assert key in msg


def test_layer_not_found_lists_the_models_layers():
    for key in ("grad-cam", "grad-cam-pp", "activation-clusters"):
        ctx = ExplainContext(fit_images=images())
        with pytest.raises(XbenchInputError) as err:
            explain(key, model(), images(), np.zeros(3, int), ctx, layer="conv9")
        msg = str(err.value)
        assert "conv9" in msg and "layer not found" in msg and "conv, relu, fc" in msg


def test_layer_without_a_spatial_map_is_rejected():
    with pytest.raises(XbenchInputError, match="not a spatial feature map"):
        explain("grad-cam-pp", model(), images(), np.zeros(3, int), layer="fc")


def test_target_out_of_range_and_bad_targets():
    with pytest.raises(XbenchInputError, match="out of range") as err:
        explain("gradient", model(), images(), np.array([0, 3, 1]))
    assert "tile 1" in str(err.value) and "0 <= target < 3" in str(err.value)
    with pytest.raises(XbenchInputError, match="out of range"):
        explain("gradient", model(), images(), np.array([0, -1, 1]))
    with pytest.raises(XbenchInputError, match="wrong shape"):
        explain("gradient", model(), images(), np.array([0, 1]))
    with pytest.raises(XbenchInputError, match="not integer"):
        explain("gradient", model(), images(), np.array([0.5, 1, 1]))


def test_bad_images():
    with pytest.raises(XbenchInputError, match="wrong shape"):
        explain("gradient", model(), images()[0], np.zeros(3, int))
    with pytest.raises(XbenchInputError, match="wrong dtype"):
        explain("gradient", model(), (images() * 255).astype(np.uint8), np.zeros(3, int))
    bad = images()
    bad[1, 0, 0, 0] = np.nan
    with pytest.raises(XbenchInputError, match="non-finite"):
        explain("gradient", model(), bad, np.zeros(3, int))
    with pytest.raises(XbenchInputError, match="not a numpy array"):
        explain("gradient", model(), images().tolist(), np.zeros(3, int))


def test_unknown_and_bad_settings():
    with pytest.raises(XbenchInputError) as err:
        explain("integrated-gradients", model(), images(), np.zeros(3, int), steps=10)
    msg = str(err.value)
    assert "steps" in msg and "n_steps" in msg and "baseline" in msg
    with pytest.raises(XbenchInputError, match="baseline"):
        explain("integrated-gradients", model(), images(), np.zeros(3, int), baseline="grey")
    with pytest.raises(XbenchInputError, match="twins"):
        explain("integrated-gradients", model(), images(), np.zeros(3, int), baseline="twin")
    with pytest.raises(XbenchInputError, match="shape differs"):
        explain(
            "integrated-gradients",
            model(),
            images(),
            np.zeros(3, int),
            ExplainContext(twins=images(2)),
            baseline="twin",
        )
    with pytest.raises(XbenchInputError, match="n_masks"):
        explain("rise", model(), images(), np.zeros(3, int), n_masks=0)
    with pytest.raises(XbenchInputError, match="batch_size"):
        explain("gradient", model(), images(), np.zeros(3, int), ExplainContext(batch_size=0))
    with pytest.raises(XbenchInputError, match="fitting set"):
        explain("activation-clusters", model(), images(), np.zeros(3, int))
    with pytest.raises(XbenchInputError, match="wrong dtype"):
        explain(
            "oracle",
            model(),
            images(),
            np.zeros(3, int),
            ExplainContext(masks=np.zeros((3, 1, H, W)), mask_names=["road"], driving_types={}),
        )


def test_non_finite_attributions_are_reported_with_explainer_and_tile():
    @register_explainer("test-nan", citation="test only", needs=set(), defaults={})
    def nan_map(model, images, targets, context):
        out = np.zeros((images.shape[0],) + images.shape[2:], dtype=np.float32)
        out[1, 2, 3] = np.nan
        out[2, 0, 0] = np.inf
        return out

    try:
        with pytest.raises(NonFiniteAttributionError) as err:
            explain("test-nan", model(), images(), np.zeros(3, int))
        msg = str(err.value)
        assert "test-nan" in msg and "tile(s) 1, 2" in msg
    finally:
        unregister_explainer("test-nan")


def test_non_finite_attributions_from_a_model_are_not_zeroed():
    class Exploding(Net):
        def forward(self, x):
            return super().forward(x) * torch.exp(x.sum() * 1e4)

    with pytest.raises(NonFiniteAttributionError, match="'gradient'"):
        explain("gradient", ModelHandle("exploding", K, module=Exploding().eval()), images(), np.zeros(3, int))


def test_wrong_output_shape_from_an_explainer():
    @register_explainer("test-shape", citation="test only", needs=set(), defaults={})
    def small_map(model, images, targets, context):
        return np.zeros((images.shape[0], 2, 2), dtype=np.float32)

    try:
        with pytest.raises(XbenchInputError, match="wrong shape"):
            explain("test-shape", model(), images(), np.zeros(3, int))
    finally:
        unregister_explainer("test-shape")


def test_context_is_not_modified_and_empty_input_works():
    ctx = ExplainContext(twins=images().astype(np.float64))
    explain("integrated-gradients", model(), images(), np.zeros(3, int), ctx, baseline="twin", n_steps=4)
    assert ctx.twins.dtype == np.float64
    exp = explain("gradient", model(), np.zeros((0, C, H, W), np.float32), np.zeros(0, int))
    assert exp.attributions.shape == (0, H, W) and exp.cost.forward_calls == 0


# ---------------------------------------------------------------------------------------------------
# Plugins
# ---------------------------------------------------------------------------------------------------


def test_plugin_by_decorator():
    @register_explainer(
        "center-bias",
        citation="Plugin author. A centre prior. 2024.",
        needs=set(),
        defaults={"sigma": 2.0},
        description="a Gaussian bump in the middle of the tile",
    )
    def center_bias(model, images, targets, context, *, sigma):
        h, w = images.shape[2:]
        yy, xx = np.mgrid[:h, :w]
        bump = np.exp(-((yy - h / 2) ** 2 + (xx - w / 2) ** 2) / (2 * sigma**2))
        return np.broadcast_to(bump, (images.shape[0], h, w)).astype(np.float32)

    try:
        spec = get_explainer("center-bias")
        assert spec.black_box_ok and spec.source != "xbench" and spec.defaults == {"sigma": 2.0}
        assert "center-bias" in [s.key for s in list_explainers()]
        exp = explain("center-bias", model(), images(), np.zeros(3, int), sigma=1.0)
        assert exp.attributions.shape == (3, H, W) and exp.settings == {"sigma": 1.0}
        with pytest.raises(XbenchInputError, match="already registered"):
            register_explainer("center-bias", citation="x", needs=set())(lambda *a: None)
        with pytest.raises(XbenchInputError, match="unknown needs"):
            register_explainer("other", citation="x", needs={"weights"})
        with pytest.raises(XbenchInputError, match="citation"):
            register_explainer("other", citation="", needs=set())
    finally:
        unregister_explainer("center-bias")
    with pytest.raises(XbenchInputError, match="unknown explainer"):
        get_explainer("center-bias")


def test_plugins_by_entry_point(tmp_path, monkeypatch):
    pkg = tmp_path / "acme_xai"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "module_plugin.py").write_text(
        textwrap.dedent("""
        import numpy as np
        from xbench.explainers import register_explainer

        @register_explainer("acme-flat", citation="Acme. Flat maps. 2024.", needs=set(), defaults={})
        def flat(model, images, targets, context):
            return np.ones((images.shape[0],) + images.shape[2:], dtype=np.float32)
    """)
    )
    (pkg / "hook_plugin.py").write_text(
        textwrap.dedent("""
        import numpy as np
        from xbench.explainers import register_explainer

        def register():
            @register_explainer("acme-grad", citation="Acme. 2024.", needs={"gradients"}, defaults={"k": 1})
            def grad(model, images, targets, context, *, k):
                return np.full((images.shape[0],) + images.shape[2:], float(k), dtype=np.float32)
    """)
    )
    (pkg / "broken_plugin.py").write_text("raise RuntimeError('acme is broken')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    group = registry.ENTRY_POINT_GROUP
    eps = importlib.metadata.EntryPoints(
        [
            importlib.metadata.EntryPoint("acme-flat", "acme_xai.module_plugin", group),
            importlib.metadata.EntryPoint("acme-grad", "acme_xai.hook_plugin:register", group),
            importlib.metadata.EntryPoint("acme-broken", "acme_xai.broken_plugin", group),
        ]
    )

    def fake_entry_points(**kwargs):
        assert kwargs == {"group": group}
        return eps

    monkeypatch.setattr(registry.importlib.metadata, "entry_points", fake_entry_points)
    monkeypatch.setattr(registry, "PLUGIN_ERRORS", {})
    try:
        with pytest.warns(UserWarning, match="acme is broken"):
            errors = load_plugins(force=True)
        assert list(errors) == ["acme-broken = acme_xai.broken_plugin"]
        keys = [s.key for s in list_explainers()]
        assert "acme-flat" in keys and "acme-grad" in keys
        assert get_explainer("acme-flat").source == "acme_xai"
        assert explain("acme-grad", model(), images(), np.zeros(3, int), k=3).attributions.max() == 3.0
        # the CLI lists plugins and reports the broken one
        from xbench.commands import explainers as cmd

        monkeypatch.setattr(cmd, "load_plugins", lambda: dict(registry.PLUGIN_ERRORS))
        assert main(["explainers"]) == 0
    finally:
        unregister_explainer("acme-flat")
        unregister_explainer("acme-grad")
        sys.modules.pop("acme_xai.module_plugin", None)
        sys.modules.pop("acme_xai.hook_plugin", None)
        sys.modules.pop("acme_xai", None)


# ---------------------------------------------------------------------------------------------------
# `xbench explainers`
# ---------------------------------------------------------------------------------------------------


def test_cli_lists_explainers(capsys):
    assert main(["explainers"]) == 0
    out = capsys.readouterr().out
    for key in BUILTIN:
        assert f"\n{key} " in out
    assert "Selvaraju" in out and "black box ok" in out and "n_steps=64" in out and "concept sets" in out
    assert "Controls" in out
    assert main(["explainers", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    by_key = {e["key"]: e for e in data["explainers"]}
    assert by_key["rise"]["black_box_ok"] and by_key["rise"]["defaults"]["n_masks"] == 500
    assert main(["explainers", "--key", "tcav"]) == 0
    out = capsys.readouterr().out
    assert "min_random" in out and "Kim" in out
    assert main(["explainers", "--key", "nope"]) == 2
    assert "unknown explainer" in capsys.readouterr().err
