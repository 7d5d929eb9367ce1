"""Shared fixtures: an isolated model/data cache for the session, and one small trained model.

``trained_small`` builds a small roads-like task (32x32 tiles from the Vellardine recipe, a few hundred
tiles) and trains a ``cnn`` on it with ``XBENCH_CACHE`` pointed at a session temporary folder. It returns
an object with ``.task``, ``.data`` (TaskData, test split with twins and scenes), ``.handle``
(ModelHandle), ``.trained`` (TrainedModel) and ``.cache_dir``. Tests of other stages share it.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import torch

# pytester's in-process runs (tests/test_check.py) restore sys.modules afterwards. torch's compiler package
# registers a native operator library when first imported, which cannot happen twice in one process, so
# import it once here, before any test, where no snapshot will drop it.
import torch._inductor.config  # noqa: E402, F401

SMALL_TASK = """
name = "small-roads"
description = "A small roads-like task for the test suite."
seeds = [0]

[data]
recipe = "conifer-upland"
size = 32
train = 320
val = 80
test = 60
seed = 7
lookalikes = ["river"]

[data.presence]
road = 0.5
river = 0.45
clearing = 0.0
natural-gap = 0.0
outcrop = 0.2
building = 0.0
corridor = 0.0

[data.labels]
classes = ["intact", "road"]
default = "intact"

[[data.labels.rule]]
class = "road"
type = "road"
stat = "coverage"
above = 0.008

[[models]]
name = "cnn"
kind = "cnn"
width = 16
epochs = 10
patience = 3
batch_size = 16

[explainers]
keys = ["gradient", "grad-cam", "random", "edges", "oracle"]

[metrics]
keys = ["mass-accuracy", "pointing-game", "deletion-auc"]

[run]
explain_tiles = 24
gallery_tiles = 4
batch_size = 32
concept_set_size = 10
random_sets = 10
fit_tiles = 40
"""


@dataclass
class TrainedSmall:
    task: Any
    data: Any
    handle: Any
    trained: Any
    cache_dir: Path


@pytest.fixture(scope="session", autouse=True)
def _isolated_xbench_cache(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """Keep the suite's trained models and cached packs out of the user's cache folder."""
    old = os.environ.get("XBENCH_CACHE")
    path = tmp_path_factory.mktemp("xbench-cache")
    os.environ["XBENCH_CACHE"] = str(path)
    try:
        yield path
    finally:
        if old is None:
            os.environ.pop("XBENCH_CACHE", None)
        else:
            os.environ["XBENCH_CACHE"] = old


@pytest.fixture(scope="session")
def small_task_file(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("tasks") / "small-roads.toml"
    path.write_text(SMALL_TASK)
    return path


@pytest.fixture(scope="session")
def trained_small(tmp_path_factory: pytest.TempPathFactory, small_task_file: Path) -> Iterator[TrainedSmall]:
    from xbench.models.train import train_model
    from xbench.tasks import build_task_data, load_task

    cache_dir = tmp_path_factory.mktemp("trained-small-cache")
    old = os.environ.get("XBENCH_CACHE")
    os.environ["XBENCH_CACHE"] = str(cache_dir)
    try:
        task = load_task(small_task_file)
        data = build_task_data(task)
        trained = train_model(task, data, task.models[0], seed=0)
    finally:
        if old is None:
            os.environ.pop("XBENCH_CACHE", None)
        else:
            os.environ["XBENCH_CACHE"] = old
    yield TrainedSmall(task=task, data=data, handle=trained.handle, trained=trained, cache_dir=cache_dir)


@pytest.fixture(scope="module")
def one_torch_thread():
    """Tiny models run fastest on one torch thread (and do not fight other processes for cores)."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
