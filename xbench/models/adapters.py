"""Bring your own model: a torch module from an import path plus a weights file, or any callable.

- :func:`load_user_torch_model` imports ``package.module:factory``, calls the factory (with optional
  keyword arguments) to build the module, and loads a state_dict with ``torch.load(weights_only=True)``:
  weights are tensors only, arbitrary objects are never unpickled.
- :func:`wrap_callable` wraps ``f(images: np.ndarray (N, C, H, W)) -> np.ndarray (N, n_classes)`` as a
  black box (class probabilities, or logits with ``output="logits"``).

Both validate what they can up front (with ``probe``: one forward pass on an example batch) and the
handle validates every later output (shape, finite values). Errors name the argument, key or array.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from xbench.errors import XbenchInputError
from xbench.models.base import ModelHandle


def check_images(images: Any, where: str = "array 'images'", n_bands: int | None = None) -> np.ndarray:
    """Validate a batch of tiles: float32 (N, C, H, W), finite, reflectance in [0, 1]."""
    if not isinstance(images, np.ndarray):
        raise XbenchInputError(where, "not a numpy array", expected="numpy.ndarray", found=type(images).__name__)
    if images.ndim != 4:
        raise XbenchInputError(where, "wrong shape", expected="(N, C, H, W)", found=images.shape)
    if images.dtype != np.float32:
        raise XbenchInputError(where, "wrong dtype", expected="float32", found=str(images.dtype))
    if n_bands is not None and images.shape[1] != n_bands:
        raise XbenchInputError(where, "wrong number of bands", expected=n_bands, found=images.shape[1])
    if not np.isfinite(images).all():
        raise XbenchInputError(where, "non-finite values (NaN or inf)")
    if images.size and (images.min() < 0 or images.max() > 1):
        raise XbenchInputError(
            where,
            "reflectance out of range",
            expected="values in [0, 1]",
            found=f"min {images.min():.4g}, max {images.max():.4g}",
        )
    return images


def import_factory(spec: str) -> Callable[..., Any]:
    """Resolve ``package.module:attribute`` (the attribute may be dotted) to a callable."""
    where = f"model factory '{spec}'"
    if not isinstance(spec, str) or spec.count(":") != 1:
        raise XbenchInputError(where, "bad import path", expected="'package.module:factory'", found=spec)
    mod_name, attr = spec.split(":")
    if not mod_name or not attr:
        raise XbenchInputError(where, "bad import path", expected="'package.module:factory'", found=spec)
    try:
        obj: Any = importlib.import_module(mod_name)
    except ImportError as exc:
        raise XbenchInputError(where, f"cannot import module '{mod_name}' ({exc})") from None
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise XbenchInputError(where, f"module '{mod_name}' has no attribute '{attr}'")
        obj = getattr(obj, part)
    if not callable(obj):
        raise XbenchInputError(where, "not callable", found=type(obj).__name__)
    return obj


def load_user_torch_model(
    factory: str,
    weights_path: str | Path | None,
    n_classes: int,
    *,
    name: str | None = None,
    factory_kwargs: dict[str, Any] | None = None,
    probe: np.ndarray | None = None,
    batch_size: int = 256,
) -> ModelHandle:
    """A torch model from ``package.module:factory`` and a state_dict file (``weights_only=True``).

    The module must take raw reflectance (N, C, H, W) in [0, 1] and return logits (N, n_classes). A
    module left in training mode is switched to eval with a warning (by :class:`ModelHandle`).
    ``probe``: an example batch run once to check the output shape now rather than later.
    """
    where = f"model factory '{factory}'"
    build = import_factory(factory)
    try:
        module = build(**(factory_kwargs or {}))
    except TypeError as exc:
        raise XbenchInputError(where, f"factory call failed ({exc})", found=factory_kwargs) from None
    if not isinstance(module, nn.Module):
        raise XbenchInputError(
            where, "factory did not return a torch module", expected="torch.nn.Module", found=type(module).__name__
        )
    if weights_path is not None:
        path = Path(weights_path)
        if not path.is_file():
            raise XbenchInputError(f"weights file '{path}'", "file not found")
        try:
            state = torch.load(path, weights_only=True, map_location="cpu")
        except Exception as exc:  # pickle refusals and corrupt files alike
            raise XbenchInputError(f"weights file '{path}'", f"cannot be read as tensors only ({exc})") from None
        if isinstance(state, dict) and "state_dict" in state and isinstance(state["state_dict"], dict):
            state = state["state_dict"]
        if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
            raise XbenchInputError(
                f"weights file '{path}'",
                "not a state_dict",
                expected="a dict of parameter name -> tensor",
                found=type(state).__name__,
            )
        result = module.load_state_dict(state, strict=False)
        if result.missing_keys or result.unexpected_keys:
            raise XbenchInputError(
                f"weights file '{path}'",
                "state_dict does not match the module",
                expected="missing none, unexpected none",
                found=f"missing {result.missing_keys[:5]}, unexpected {result.unexpected_keys[:5]}",
            )
    handle = ModelHandle(name or factory.split(":")[-1], n_classes, module=module, batch_size=batch_size)
    if probe is not None:
        handle.probabilities(check_images(probe, "array 'probe'"))
    return handle


def wrap_callable(
    fn: Callable[[np.ndarray], np.ndarray],
    n_classes: int,
    name: str,
    *,
    output: str = "probabilities",
    probe: np.ndarray | None = None,
    batch_size: int = 256,
) -> ModelHandle:
    """A black-box handle around ``fn(images (N, C, H, W)) -> scores (N, n_classes)``.

    ``output="probabilities"`` uses the scores as they are; ``"logits"`` applies a softmax first.
    """
    if not callable(fn):
        raise XbenchInputError(
            f"model '{name}'", "not callable", expected="f(images) -> scores", found=type(fn).__name__
        )
    if output not in ("probabilities", "logits"):
        raise XbenchInputError(
            f"model '{name}': output", "unknown output kind", expected="probabilities | logits", found=output
        )
    if not isinstance(n_classes, int) or n_classes < 2:
        raise XbenchInputError(f"model '{name}': n_classes", "need at least two classes", found=n_classes)

    def predict(images: np.ndarray) -> np.ndarray:
        scores = np.asarray(fn(images), dtype=np.float64)
        if output == "logits" and scores.ndim == 2 and np.isfinite(scores).all():
            scores = np.exp(scores - scores.max(axis=1, keepdims=True))
            scores /= scores.sum(axis=1, keepdims=True)
        return scores

    handle = ModelHandle(name, n_classes, predict_fn=predict, batch_size=batch_size)
    if probe is not None:
        handle.probabilities(check_images(probe, "array 'probe'"))
    return handle
