"""Deterministic CPU training with early stopping, cached by content hash.

``train_model(task, data, spec, seed)`` returns a :class:`TrainedModel`. The cache key is the sha256 of
(the task's data section, the model spec, the seed, the xbench version and this module's training-code
version); a hit loads the weights (``torch.load(weights_only=True)``; forests from plain arrays) and
trains nothing. Writes are atomic (temporary file, then rename); ``meta.json`` is written last and only
entries whose weight files match the recorded hash are trusted.

Determinism: parameters are initialised and dropout is drawn from torch's generator seeded with ``seed``
(inside ``torch.random.fork_rng`` so callers' RNG state is untouched); batch order and augmentation come
from a numpy generator seeded with ``seed``; ``torch.use_deterministic_algorithms(True)`` and a fixed
thread count (``XBENCH_TORCH_THREADS``, default 1: on a shared 2-core machine two threads per
process collapse under contention, and the runner may train or explain in parallel processes).
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from sklearn.metrics import accuracy_score, balanced_accuracy_score
from torch import nn

from xbench import __version__
from xbench.data import TilePack, atomic_write
from xbench.errors import XbenchInputError
from xbench.models.base import ModelHandle
from xbench.models.forest import ForestPredictor, fit_forest, forest_hash, tile_features
from xbench.models.zoo import TORCH_KINDS, BandNorm, build_torch_model, count_parameters
from xbench.tasks import ModelSpec, Task, TaskData, cache_root

TRAIN_CODE_VERSION = "1"
TORCH_TRAIN_DEFAULTS: dict[str, Any] = {
    "epochs": 25,
    "patience": 6,
    "lr": 3e-3,
    "weight_decay": 1e-4,
    "batch_size": 64,
    "augment": True,
}
ARCH_KEYS = {"width", "dropout"}


@dataclass
class TrainedModel:
    """A trained (or cache-loaded) model and how well it does."""

    handle: ModelHandle
    spec: ModelSpec
    seed: int
    accuracy: dict[str, float]
    seconds: float
    cached: bool
    weights_hash: str
    n_parameters: int = 0
    epochs: int = 0
    cpu_seconds: float = 0.0
    cache_dir: Path | None = None
    history: list[dict[str, float]] = field(default_factory=list)

    @property
    def name(self) -> str:
        return self.handle.name


# ---------------------------------------------------------------------------------------------------
# cache


def cache_key(task: Task, spec: ModelSpec, seed: int) -> str:
    payload = {
        "data": task.data.raw,
        "model": spec.as_dict(),
        "seed": int(seed),
        "xbench": __version__,
        "train_code": TRAIN_CODE_VERSION,
    }
    return hashlib.sha256(json.dumps(payload, sort_keys=True, default=str).encode()).hexdigest()


def state_dict_hash(state: dict[str, torch.Tensor]) -> str:
    """sha256 over (name, dtype, shape, bytes) of every tensor, in name order."""
    h = hashlib.sha256()
    for key in sorted(state):
        t = state[key].detach().cpu().contiguous()
        h.update(key.encode())
        h.update(str(t.dtype).encode())
        h.update(str(tuple(t.shape)).encode())
        h.update(t.numpy().tobytes())
    return h.hexdigest()


def _write_json(path: Path, obj: dict[str, Any]) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "w") as fh:
            json.dump(obj, fh, indent=2, sort_keys=True)

    atomic_write(path, write)


# ---------------------------------------------------------------------------------------------------
# determinism


@contextmanager
def deterministic_torch(seed: int, threads: int | None = None) -> Iterator[None]:
    """Seeded, deterministic, fixed-thread torch inside the block; previous settings restored after."""
    n_threads = threads or int(os.environ.get("XBENCH_TORCH_THREADS", "1"))
    prev_threads = torch.get_num_threads()
    prev_det = torch.are_deterministic_algorithms_enabled()
    torch.set_num_threads(n_threads)
    _set_deterministic_algorithms(True)
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            yield
    finally:
        _set_deterministic_algorithms(prev_det)
        torch.set_num_threads(prev_threads)


def _set_deterministic_algorithms(mode: bool) -> None:
    """``torch.use_deterministic_algorithms(mode)`` without loading torch's compiler when it is not loaded.

    The public switch also sets the compiler's (inductor's) own flag, and importing that package loads
    torch._dynamo: 1.9 s of a cold process on a 2-core AVX2 machine, on the demo's critical path before
    training. xbench never compiles a model, so while the compiler is not loaded the eager switch alone
    is set (the same one the public function sets); once it is loaded, the public function sets both."""
    eager_switch = getattr(torch._C, "_set_deterministic_algorithms", None)
    if "torch._inductor" in sys.modules or eager_switch is None:
        torch.use_deterministic_algorithms(mode)
    else:
        eager_switch(mode)


# ---------------------------------------------------------------------------------------------------
# evaluation


def evaluate(handle: ModelHandle, packs: dict[str, TilePack]) -> dict[str, float]:
    """Accuracy and balanced accuracy (scikit-learn) per split, against each pack's labels."""
    out: dict[str, float] = {}
    for split, pack in packs.items():
        pred = handle.predict(pack.images)
        out[f"{split}_accuracy"] = float(accuracy_score(pack.labels, pred))
        out[f"{split}_balanced_accuracy"] = float(balanced_accuracy_score(pack.labels, pred))
    return out


# ---------------------------------------------------------------------------------------------------
# training


def _augment(batch: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Random dihedral transform per tile (8 rotations/flips): labels of top-down tiles are invariant."""
    out = np.empty_like(batch)
    n_tiles = len(batch)
    ks = rng.integers(0, 4, size=n_tiles)
    flips = rng.random(n_tiles) < 0.5
    for i in range(n_tiles):
        t = np.rot90(batch[i], k=int(ks[i]), axes=(1, 2))
        out[i] = t[:, :, ::-1] if flips[i] else t
    return out


def _fit_torch(
    module: nn.Module, train: TilePack, val: TilePack, params: dict[str, Any], seed: int, n_classes: int
) -> tuple[list[dict[str, float]], int]:
    rng = np.random.default_rng(seed)
    x_train, y_train = train.images, train.labels.astype(np.int64)
    counts = np.bincount(y_train, minlength=n_classes).astype(np.float64)
    weights = counts.sum() / np.maximum(counts, 1.0) / n_classes  # balanced class weights
    loss_fn = nn.CrossEntropyLoss(weight=torch.tensor(weights, dtype=torch.float32))
    opt = torch.optim.AdamW(module.parameters(), lr=params["lr"], weight_decay=params["weight_decay"])
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=params["epochs"])
    x_val = torch.from_numpy(np.ascontiguousarray(val.images))
    y_val = val.labels.astype(np.int64)
    best_key: tuple[float, float] | None = None
    best_state: dict[str, torch.Tensor] = {}
    best_epoch, since_best = 0, 0
    history: list[dict[str, float]] = []
    bs = params["batch_size"]
    for epoch in range(params["epochs"]):
        module.train()
        order = rng.permutation(len(y_train))
        total = 0.0
        for start in range(0, len(order), bs):
            idx = order[start : start + bs]
            if len(idx) < 2:  # batch norm needs two samples
                continue
            xb = x_train[idx]
            if params["augment"]:
                xb = _augment(xb, rng)
            logits = module(torch.from_numpy(np.ascontiguousarray(xb)))
            loss = loss_fn(logits, torch.from_numpy(y_train[idx]))
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            total += float(loss.detach()) * len(idx)
        sched.step()
        module.eval()
        with torch.no_grad():
            val_logits = torch.cat([module(x_val[s : s + 256]) for s in range(0, len(y_val), 256)])
            val_loss = float(nn.functional.cross_entropy(val_logits, torch.from_numpy(y_val)))
        pred = val_logits.argmax(dim=1).numpy()
        val_bacc = float(balanced_accuracy_score(y_val, pred))
        history.append(
            {
                "epoch": epoch + 1,
                "train_loss": total / len(y_train),
                "val_loss": val_loss,
                "val_balanced_accuracy": val_bacc,
            }
        )
        key = (val_bacc, -val_loss)
        if best_key is None or key > best_key:
            best_key, best_epoch, since_best = key, epoch + 1, 0
            best_state = {k: v.detach().clone() for k, v in module.state_dict().items()}
        else:
            since_best += 1
            if since_best >= params["patience"]:
                break
    module.load_state_dict(best_state)
    module.eval()
    return history, best_epoch


def _split_params(spec: ModelSpec) -> tuple[dict[str, Any], dict[str, Any]]:
    arch = {k: v for k, v in spec.params.items() if k in ARCH_KEYS}
    train = {**TORCH_TRAIN_DEFAULTS, **{k: v for k, v in spec.params.items() if k not in ARCH_KEYS}}
    return arch, train


def train_model(
    task: Task, data: TaskData, model_spec: ModelSpec, seed: int, *, use_cache: bool = True, batch_size: int = 256
) -> TrainedModel:
    """Train one model of a task with one seed, or load it from the cache."""
    spec = model_spec
    n_classes = len(task.class_names)
    if spec.kind in ("user-torch", "user-callable"):
        return load_user_model(spec, data, n_classes, seed, batch_size)
    n_bands = int(data.train.images.shape[1])
    key = cache_key(task, spec, seed)
    entry = cache_root() / "models" / key
    name = spec.name
    if use_cache:
        loaded = _load_cached(entry, spec, seed, n_bands, n_classes, data.train.band_names, batch_size)
        if loaded is not None:
            return loaded
    packs = {"train": data.train, "val": data.val, "test": data.test}
    t0, c0 = time.perf_counter(), time.process_time()
    history: list[dict[str, float]] = []
    if spec.kind in TORCH_KINDS:
        arch, params = _split_params(spec)
        with deterministic_torch(seed):
            module = build_torch_model(spec.kind, n_bands, n_classes, **arch)
            norm = module.norm
            if not isinstance(norm, BandNorm):  # every zoo model standardises its input first
                raise TypeError(f"zoo model '{spec.kind}' has no BandNorm input layer")
            norm.set_statistics(data.train.images)
            history, best_epoch = _fit_torch(module, data.train, data.val, params, seed, n_classes)
        seconds, cpu_seconds = time.perf_counter() - t0, time.process_time() - c0
        state = module.state_dict()
        weights_hash = state_dict_hash(state)
        handle = ModelHandle(name, n_classes, module=module, batch_size=batch_size)
        n_params = count_parameters(module)
        weights_file = "weights.pt"
        if use_cache:
            atomic_write(entry / weights_file, lambda tmp: torch.save(state, tmp))
    elif spec.kind == "forest":
        arrays = fit_forest(
            tile_features(data.train.images, data.train.band_names), data.train.labels, n_classes, seed, spec.params
        )
        seconds, cpu_seconds = time.perf_counter() - t0, time.process_time() - c0
        weights_hash = forest_hash(arrays)
        handle = ModelHandle(
            name, n_classes, predict_fn=ForestPredictor(arrays, data.train.band_names), batch_size=batch_size
        )
        n_params = int(arrays["left"].size)  # number of tree nodes
        best_epoch = 0
        weights_file = "forest.npz"
        if use_cache:

            def write_arrays(tmp: str) -> None:
                with open(tmp, "wb") as fh:
                    np.savez(fh, allow_pickle=True, **arrays)  # numpy's default, stated for mypy

            atomic_write(entry / weights_file, write_arrays)
    else:
        raise XbenchInputError(f"model '{name}'", "unknown model kind", found=spec.kind)
    accuracy = evaluate(handle, packs)
    handle.calls.forward = 0
    if use_cache:
        _write_json(
            entry / "meta.json",
            {
                "model": spec.as_dict(),
                "seed": int(seed),
                "task": task.name,
                "data_hash": task.data.hash,
                "xbench": __version__,
                "train_code": TRAIN_CODE_VERSION,
                "weights_file": weights_file,
                "weights_hash": weights_hash,
                "accuracy": accuracy,
                "seconds": seconds,
                "cpu_seconds": cpu_seconds,
                "n_parameters": n_params,
                "epochs": best_epoch,
                "history": history,
            },
        )
    return TrainedModel(
        handle=handle,
        spec=spec,
        seed=int(seed),
        accuracy=accuracy,
        seconds=seconds,
        cached=False,
        weights_hash=weights_hash,
        n_parameters=n_params,
        epochs=best_epoch,
        cpu_seconds=cpu_seconds,
        cache_dir=entry if use_cache else None,
        history=history,
    )


def load_user_model(spec: ModelSpec, data: TaskData, n_classes: int, seed: int, batch_size: int = 256) -> TrainedModel:
    """A user's model named in a task file: imported and loaded, never trained; checked on two test tiles."""
    from xbench.models.adapters import call_factory, load_user_torch_model, wrap_callable

    t0 = time.perf_counter()
    probe = data.test.images[:2]
    if spec.kind == "user-torch":
        handle = load_user_torch_model(
            spec.params["factory"],
            spec.params.get("weights"),
            n_classes,
            name=spec.name,
            probe=probe,
            batch_size=batch_size,
        )
        module = handle.module
        assert module is not None  # load_user_torch_model always returns a handle with its torch module
        state = module.state_dict()
        weights_hash, n_params = state_dict_hash(state), count_parameters(module)
    else:
        fn = call_factory(spec.params["factory"])
        if not callable(fn):
            raise XbenchInputError(
                f"model '{spec.name}': factory '{spec.params['factory']}'",
                "did not return a callable",
                expected="f(images) -> class scores",
                found=type(fn).__name__,
            )
        handle = wrap_callable(
            fn,
            n_classes,
            spec.name,
            output=spec.params.get("output", "probabilities"),
            probe=probe,
            batch_size=batch_size,
        )
        weights_hash, n_params = "", 0
    packs = {"train": data.train, "val": data.val, "test": data.test}
    accuracy = evaluate(handle, packs)
    handle.calls.forward = 0
    return TrainedModel(
        handle=handle,
        spec=spec,
        seed=int(seed),
        accuracy=accuracy,
        seconds=time.perf_counter() - t0,
        cached=True,
        weights_hash=weights_hash,
        n_parameters=n_params,
    )


def _load_cached(
    entry: Path, spec: ModelSpec, seed: int, n_bands: int, n_classes: int, band_names: list[str], batch_size: int
) -> TrainedModel | None:
    meta_path = entry / "meta.json"
    if not meta_path.is_file():
        return None
    try:
        meta = json.loads(meta_path.read_text())
        weights_path = entry / meta["weights_file"]
        if spec.kind in TORCH_KINDS:
            state = torch.load(weights_path, weights_only=True, map_location="cpu")
            if state_dict_hash(state) != meta["weights_hash"]:
                return None
            arch, _ = _split_params(spec)
            module = build_torch_model(spec.kind, n_bands, n_classes, **arch)
            module.load_state_dict(state)
            module.eval()
            handle = ModelHandle(spec.name, n_classes, module=module, batch_size=batch_size)
        else:
            with np.load(weights_path, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
            if forest_hash(arrays) != meta["weights_hash"]:
                return None
            handle = ModelHandle(
                spec.name, n_classes, predict_fn=ForestPredictor(arrays, band_names), batch_size=batch_size
            )
    except Exception:  # unreadable or unpicklable files, missing keys: retrain and overwrite the entry
        return None
    return TrainedModel(
        handle=handle,
        spec=spec,
        seed=int(seed),
        accuracy=dict(meta["accuracy"]),
        seconds=float(meta["seconds"]),
        cached=True,
        weights_hash=meta["weights_hash"],
        n_parameters=int(meta.get("n_parameters", 0)),
        epochs=int(meta.get("epochs", 0)),
        cpu_seconds=float(meta.get("cpu_seconds", 0.0)),
        cache_dir=entry,
        history=list(meta.get("history", [])),
    )
