"""Fixtures of the fault suite: a tiny task (16 px tiles, an untrained user model, cheap explainers).

The model is a user torch module loaded from a weights file, so nothing is trained: a run of the whole
grid takes about a second, and changing the weights file is how a "retrained" model is simulated.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import torch

MODULE_NAME = "fault_suite_models"
MODULE = """
import numpy as np
import torch
from torch import nn


def build_net():
    return nn.Sequential(nn.Conv2d(6, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, 2))


def build_rgb_net():
    # built for three bands; the task's tiles have six
    return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(4, 2))


def raises():
    raise RuntimeError("the factory is broken on purpose")


def raw_scores():
    # a black box that returns raw scores although the task declares probabilities
    def scores(images):
        return np.stack([images.sum(axis=(1, 2, 3)), -images.sum(axis=(1, 2, 3))], axis=1) * 10
    return scores


def exits():
    import sys
    sys.exit(0)
"""

TASK = """
name = "{name}"
description = "fault suite"
seeds = [0]

[data]
recipe = "{recipe}"
size = 16
train = 4
val = 4
test = 24
seed = 3
presence = {{ road = {road}, river = 0.3, clearing = 0.0, building = 0.0, corridor = 0.0, field = 0.0, \
natural-gap = 0.0, outcrop = 0.0 }}

[data.labels]
classes = ["intact", "road"]
default = "intact"
[[data.labels.rule]]
class = "road"
type = "road"
stat = "coverage"
above = 0.005

{models}

[explainers]
keys = {explainers}

[metrics]
keys = ["mass-accuracy", "pointing-game", "gini", "deletion-auc"]

[metrics.settings.deletion-auc]
steps = 4

[run]
explain_tiles = 6
gallery_tiles = 2
batch_size = 32
fit_tiles = 4
cell_timeout = {timeout}
"""

EXPLAINERS = '["gradient", "random", "edges", "oracle"]'


def torch_model(name: str, weights: str) -> str:
    factory = f"{MODULE_NAME}:build_net"
    return f'[[models]]\nname = "{name}"\nkind = "user-torch"\nfactory = "{factory}"\nweights = "{weights}"\n'


@pytest.fixture(scope="session")
def module_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The user's model module, importable for the whole session (and by spawned processes via PYTHONPATH)."""
    folder = tmp_path_factory.mktemp("fault-models")
    (folder / f"{MODULE_NAME}.py").write_text(MODULE)
    sys.path.insert(0, str(folder))
    return folder


def save_weights(module_dir: Path, path: Path, seed: int) -> Path:
    import importlib

    module = importlib.import_module(MODULE_NAME)
    torch.manual_seed(seed)
    torch.save(module.build_net().state_dict(), path)
    return path


@pytest.fixture()
def make_task(tmp_path: Path, module_dir: Path):
    """Write a task file (and its weights files) into tmp_path; returns its path."""

    def make(
        *,
        name: str = "faults",
        models: str | None = None,
        explainers: str = EXPLAINERS,
        recipe: str = "conifer-upland",
        road: float = 0.5,
        timeout: int = 600,
        filename: str = "task.toml",
    ) -> Path:
        if models is None:
            if not (tmp_path / "a.pt").is_file():
                save_weights(module_dir, tmp_path / "a.pt", 1)
            models = torch_model("net-a", "a.pt")
        text = TASK.format(name=name, recipe=recipe, road=road, models=models, explainers=explainers, timeout=timeout)
        path = tmp_path / filename
        path.write_text(text)
        return path

    return make
