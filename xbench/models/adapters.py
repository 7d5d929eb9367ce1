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
    except (Exception, SystemExit) as exc:  # the user's module failed while it was imported
        raise XbenchInputError(where, f"importing module '{mod_name}' failed ({_short(exc)})") from None
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise XbenchInputError(where, f"module '{mod_name}' has no attribute '{attr}'")
        obj = getattr(obj, part)
    if not callable(obj):
        raise XbenchInputError(where, "not callable", found=type(obj).__name__)
    return obj


def _short(exc: BaseException) -> str:
    """An exception as one short line (torch's messages run over many lines)."""
    if isinstance(exc, SystemExit):
        return f"it called sys.exit({exc.code!r})"
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text[:300]}{'...' if len(text) > 300 else ''}"


def call_factory(factory: str, **kwargs: Any) -> Any:
    """Import ``package.module:factory`` and call it; any failure of the user's code is an input error."""
    build = import_factory(factory)
    try:
        return build(**kwargs)
    except (Exception, SystemExit) as exc:
        raise XbenchInputError(f"model factory '{factory}'", f"factory call failed ({_short(exc)})") from None


def probe_model(handle: ModelHandle, probe: np.ndarray, where: str) -> None:
    """One forward pass on example tiles, so a model that does not fit the data fails now, in one line."""
    images = check_images(probe, "array 'probe'")
    try:
        handle.probabilities(images.copy())
    except XbenchInputError:
        raise
    except (Exception, SystemExit) as exc:
        raise XbenchInputError(
            where,
            f"the model cannot run on the task's tiles ({_short(exc)})",
            expected=f"input (N, {images.shape[1]}, {images.shape[2]}, {images.shape[3]}) -> {handle.n_classes} scores",
        ) from None


def _clone_inputs(_module: nn.Module, args: tuple) -> tuple:
    """Forward pre-hook: the module works on a copy of its input (an in-place first layer cannot change the
    caller's tiles); the copy is differentiable, so gradients reach the input as before."""
    return tuple(a.clone() if isinstance(a, torch.Tensor) else a for a in args)


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
    module = call_factory(factory, **(factory_kwargs or {}))
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
        try:
            result = module.load_state_dict(state, strict=False)
        except RuntimeError as exc:  # tensors of the wrong shape
            raise XbenchInputError(
                f"weights file '{path}'", f"state_dict does not fit the module ({_short(exc)})"
            ) from None
        if result.missing_keys or result.unexpected_keys:
            raise XbenchInputError(
                f"weights file '{path}'",
                "state_dict does not match the module",
                expected="missing none, unexpected none",
                found=f"missing {result.missing_keys[:5]}, unexpected {result.unexpected_keys[:5]}",
            )
    module.register_forward_pre_hook(_clone_inputs)
    # a user's module may branch on its input, which a traced copy would freeze: it runs eagerly
    handle = ModelHandle(
        name or factory.split(":")[-1], n_classes, module=module, batch_size=batch_size, fast_inference=False
    )
    if probe is not None:
        probe_model(handle, probe, f"model '{handle.name}' ({factory})")
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
        scores = np.asarray(fn(images.copy()), dtype=np.float64)  # a copy: the callable may write into it
        if output == "logits" and scores.ndim == 2 and np.isfinite(scores).all():
            scores = np.exp(scores - scores.max(axis=1, keepdims=True))
            scores /= scores.sum(axis=1, keepdims=True)
        elif output == "probabilities":
            check_probabilities(scores, name)
        return scores

    handle = ModelHandle(name, n_classes, predict_fn=predict, batch_size=batch_size)
    if probe is not None:
        probe_model(handle, probe, f"model '{name}'")
    return handle


def check_probabilities(scores: np.ndarray, name: str, tolerance: float = 1e-3) -> None:
    """Scores declared as probabilities must lie in [0, 1] and sum to 1 per tile (within ``tolerance``)."""
    if scores.ndim != 2 or not scores.size or not np.isfinite(scores).all():
        return  # shape and finiteness are checked by the handle, with their own messages
    sums = scores.sum(axis=1)
    if scores.min() < -tolerance or scores.max() > 1 + tolerance or np.abs(sums - 1).max() > tolerance:
        raise XbenchInputError(
            f"model '{name}' output",
            'not probabilities (declared output = "probabilities")',
            expected='values in [0, 1] summing to 1 per tile, or output = "logits" for raw scores',
            found=f"min {scores.min():.4g}, max {scores.max():.4g}, row sums {sums.min():.4g} to {sums.max():.4g}",
        )
