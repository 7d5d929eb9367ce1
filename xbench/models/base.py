"""The one model protocol every later stage uses: :class:`ModelHandle`.

A handle wraps either a torch module (white box: gradients and named layers available) or a black-box
callable ``f(images: np.ndarray (N, C, H, W)) -> np.ndarray (N, n_classes)`` of class scores.

Conventions (documented in DEVELOPERS.md):
- Torch modules take raw reflectance (N, C, H, W) float32 in [0, 1] and return logits (N, n_classes);
  any normalisation lives inside the module. Gradient explainers attribute the target *logit*.
- :meth:`ModelHandle.probabilities` gives class probabilities for both kinds (softmax of logits for torch,
  the callable's output for black boxes); truth and perturbation metrics score with it.
- Every image that passes through the model is counted (forward / backward), so explainers and metrics
  can report their cost in model calls per tile.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from xbench.errors import XbenchInputError


@dataclass
class CallCount:
    """Images passed forward and backward through a model (a batch of 8 counts 8)."""

    forward: int = 0
    backward: int = 0


class ModelHandle:
    """A classifier behind one small protocol (see module docstring)."""

    def __init__(
        self,
        name: str,
        n_classes: int,
        module: nn.Module | None = None,
        predict_fn: Callable[[np.ndarray], np.ndarray] | None = None,
        batch_size: int = 256,
    ):
        if (module is None) == (predict_fn is None):
            raise XbenchInputError(f"model '{name}'", "give exactly one of a torch module or a callable")
        self.name = name
        self.n_classes = int(n_classes)
        self.module = module
        self.predict_fn = predict_fn
        self.batch_size = batch_size
        self.calls = CallCount()
        if module is not None:
            if module.training:
                warnings.warn(f"model '{name}' was in training mode; switched to eval()", stacklevel=2)
            module.eval()
            self._install_counters(module)

    # -- kind -------------------------------------------------------------------------------------
    @property
    def has_gradients(self) -> bool:
        return self.module is not None

    @property
    def is_black_box(self) -> bool:
        return self.module is None

    # -- call counting ----------------------------------------------------------------------------
    def _install_counters(self, module: nn.Module) -> None:
        def on_forward(_mod, args, _out):
            x = args[0] if args else None
            if isinstance(x, torch.Tensor):
                self.calls.forward += int(x.shape[0])

        def on_backward(_mod, grad_input, _grad_output):
            g = grad_input[0] if grad_input else None
            if isinstance(g, torch.Tensor):
                self.calls.backward += int(g.shape[0])

        module.register_forward_hook(on_forward)
        # A full backward hook fires once per backward pass through the whole module.
        module.register_full_backward_hook(on_backward)

    @contextmanager
    def counting(self) -> Iterator[CallCount]:
        """Count the calls made inside the block: ``with handle.counting() as c: ...; c.forward``."""
        before = CallCount(self.calls.forward, self.calls.backward)
        result = CallCount()
        try:
            yield result
        finally:
            result.forward = self.calls.forward - before.forward
            result.backward = self.calls.backward - before.backward

    # -- scoring ----------------------------------------------------------------------------------
    def logits_tensor(self, x: torch.Tensor) -> torch.Tensor:
        """Differentiable forward for torch models (used by gradient explainers)."""
        if self.module is None:
            raise XbenchInputError(f"model '{self.name}'", "is a black box: it has no gradients or layers")
        return self.module(x)

    def probabilities(self, images: np.ndarray) -> np.ndarray:
        """Class probabilities (N, n_classes) float64 in batches; validates the model's output."""
        images = np.asarray(images, dtype=np.float32)
        if images.ndim != 4:
            raise XbenchInputError(
                f"model '{self.name}' input", "wrong shape", expected="(N, C, H, W)", found=images.shape
            )
        out = []
        for start in range(0, images.shape[0], self.batch_size):
            chunk = images[start : start + self.batch_size]
            if self.module is not None:
                with torch.no_grad():
                    logits = self.module(torch.from_numpy(np.ascontiguousarray(chunk)))
                    probs = torch.softmax(logits.double(), dim=1).numpy()
            else:
                probs = np.asarray(self.predict_fn(chunk), dtype=np.float64)
                self.calls.forward += chunk.shape[0]
            self._check_output(probs, chunk.shape[0])
            out.append(probs)
        return np.concatenate(out, axis=0) if out else np.zeros((0, self.n_classes))

    def _check_output(self, scores: np.ndarray, n: int) -> None:
        if scores.shape != (n, self.n_classes):
            raise XbenchInputError(
                f"model '{self.name}' output", "wrong shape", expected=f"({n}, {self.n_classes})", found=scores.shape
            )
        if not np.isfinite(scores).all():
            raise XbenchInputError(f"model '{self.name}' output", "non-finite class scores (NaN or inf)")

    def predict(self, images: np.ndarray) -> np.ndarray:
        """Predicted class index (N,)."""
        return self.probabilities(images).argmax(axis=1)

    # -- layers -----------------------------------------------------------------------------------
    def layer_names(self) -> list[str]:
        """Names of the module's sub-layers (as in ``named_modules``), empty for black boxes."""
        if self.module is None:
            return []
        return [n for n, _ in self.module.named_modules() if n]

    def conv_layer_names(self) -> list[str]:
        if self.module is None:
            return []
        return [n for n, m in self.module.named_modules() if isinstance(m, nn.Conv2d)]

    def default_layer(self) -> str:
        """The layer that layer-based explainers use by default: ``module.explain_layer`` if the
        module names one, else its last Conv2d."""
        name = getattr(self.module, "explain_layer", None)
        if name:
            return str(name)
        convs = self.conv_layer_names()
        if not convs:
            raise XbenchInputError(
                f"model '{self.name}'",
                "has no conv layer for layer-based explainers",
                expected="a torch module with at least one Conv2d",
                found=self.layer_names(),
            )
        return convs[-1]

    def get_layer(self, name: str) -> nn.Module:
        if self.module is None:
            raise XbenchInputError(f"model '{self.name}'", "is a black box: it has no layers")
        modules = dict(self.module.named_modules())
        if name not in modules or not name:
            raise XbenchInputError(
                f"model '{self.name}': layer '{name}'",
                "layer not found",
                expected="one of " + ", ".join(self.layer_names()),
                found=name,
            )
        return modules[name]
