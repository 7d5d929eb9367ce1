"""Bring-your-own models named in a task file: a torch module with a weights file, and a black box."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import pytest
import torch

from xbench.errors import XbenchInputError
from xbench.runs import load_records, run_task

TINY = Path(__file__).parent / "data" / "tiny_task.toml"

USER_MODULE = """
import numpy as np
import torch
from torch import nn


def build_net():
    torch.manual_seed(3)
    return nn.Sequential(nn.Conv2d(6, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, padding=1), nn.ReLU(),
                         nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 2))


def ndvi_scorer():
    def scores(images):
        red, nir = images[:, 2], images[:, 3]
        ndvi = ((nir - red) / (nir + red + 1e-6)).mean(axis=(1, 2))
        p_road = 1.0 / (1.0 + np.exp(20.0 * (ndvi - 0.6)))  # less green -> more likely a road
        return np.stack([1.0 - p_road, p_road], axis=1)
    return scores
"""


@pytest.fixture()
def user_task(tmp_path, monkeypatch):
    (tmp_path / "byo_models_for_test.py").write_text(USER_MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    import byo_models_for_test

    torch.save(byo_models_for_test.build_net().state_dict(), tmp_path / "net.pt")
    text = TINY.read_text()
    head, _, rest = text.partition("[[models]]")
    _, _, tail = rest.partition("[explainers]")
    models = textwrap.dedent("""
        [[models]]
        name = "mine"
        kind = "user-torch"
        factory = "byo_models_for_test:build_net"
        weights = "net.pt"

        [[models]]
        name = "ndvi-box"
        kind = "user-callable"
        factory = "byo_models_for_test:ndvi_scorer"

        """)
    path = tmp_path / "byo.toml"
    path.write_text(head + models + "[explainers]" + tail)
    return path


def test_user_models_run_through_the_grid(user_task, tmp_path):
    summary = run_task(
        user_task,
        tmp_path / "out",
        explainers=["gradient", "occlusion", "oracle"],
        metrics=["mass-accuracy", "deletion-auc"],
    )
    assert summary.ok, summary.failures
    records = load_records(tmp_path / "out")
    pairs = set(zip(records["model"], records["explainer"], strict=True))
    # The black box gets only the explainers that need no gradients; the skip is stated in the manifest.
    assert pairs == {
        ("mine", "gradient"),
        ("mine", "occlusion"),
        ("mine", "oracle"),
        ("ndvi-box", "occlusion"),
        ("ndvi-box", "oracle"),
    }
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["skipped"] == [
        {"model": "ndvi-box", "explainer": "gradient", "reason": "needs gradients or a layer; the model is a black box"}
    ]


def test_missing_weights_file_is_named_before_any_work(user_task, tmp_path):
    user_task.write_text(user_task.read_text().replace('weights = "net.pt"', 'weights = "gone.pt"'))
    with pytest.raises(XbenchInputError) as info:
        run_task(user_task, tmp_path / "never")
    assert "models[0].weights" in str(info.value) and "gone.pt" in str(info.value)
    assert not (tmp_path / "never").exists()


def test_bad_factory_path_is_named(user_task, tmp_path):
    user_task.write_text(user_task.read_text().replace('"byo_models_for_test:ndvi_scorer"', '"no_colon_here"'))
    with pytest.raises(XbenchInputError, match=r"models\[1\].factory.*bad import path"):
        run_task(user_task, tmp_path / "never")
