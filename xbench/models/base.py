"""The one model protocol every later stage uses: :class:`ModelHandle`.

A handle wraps either a torch module (white box: gradients and named layers available) or a black-box
callable ``f(images: np.ndarray (N, C, H, W)) -> np.ndarray (N, n_classes)`` of class scores.

Conventions (documented in DEVELOPERS.md):
- Torch modules take raw reflectance (N, C, H, W) float32 in [0, 1] and return logits (N, n_classes);
  any normalisation lives inside the module. Gradient explainers attribute the target *logit*.
- :meth:`ModelHandle.probabilities` gives class probabilities for both kinds (softmax of logits for torch,
  the callable's output for black boxes); truth and perturbation metrics score with it.
- Every image that passes through the model is counted (forward / backward), so explainers and metrics
  can report their cost in model calls per tile; :data:`PROCESS_CALLS` totals the calls of every handle in
  the process (metrics that build their own handle, e.g. a randomized copy, are counted there too).

Speed (measured by ``tests/bench/bench_models.py``; see PROFILE notes in notes/speed.md):
- Torch modules run in **channels-last** memory format: the handle converts the module's 4-D parameters
  once, so every convolution and pooling layer after the first works on channels-last activations whatever
  layout the caller passes (NCHW max-pooling runs ~10x slower than channels-last on CPU). The first call
  checks the module against its NCHW result; a module that rejects the layout (e.g. ``.view`` on a spatial
  tensor) or disagrees beyond :data:`LAYOUT_TOLERANCE` goes back to NCHW, with a warning.
- No-gradient scoring (:meth:`ModelHandle.scores`, :meth:`ModelHandle.probabilities`) runs in inference
  mode in even chunks of at most :func:`preferred_batch` images (the rule: about :data:`CALL_PIXELS`
  pixels per call, a power of two, which is 32 tiles of 48x48 px; larger batches spill the CPU caches).
- No-gradient scoring runs a **frozen inference copy** of the module (``torch.jit.trace`` + ``freeze`` +
  ``optimize_for_inference``: batch-norm folded into the convolutions, oneDNN kernels), 1.4-2x the eager
  module's throughput on the zoo models. The copy is built on the first no-gradient call for each tile shape,
  checked against the eager module (:data:`INFERENCE_TOLERANCE`; a module that cannot be traced or disagrees
  keeps the eager path, silently: the eager path is always correct), and rebuilt when a parameter or buffer
  changes in place (torch's version counters: change weights through the parameters, e.g. ``load_state_dict``
  or in-place ops under ``no_grad``, not through ``.data``). Calls go the eager way whenever anything else
  hooks the module (an explainer's layer tap must see the pass). Gradients always use the eager module.
- One torch thread per process (set by the runner); thread pools of BLAS are limited once per process by
  :func:`single_thread_pools`.
"""

from __future__ import annotations

import contextlib
import copy
import math
import time
import warnings
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from xbench.errors import XbenchInputError


def _without_hooks(module: nn.Module) -> nn.Module:
    """A deep copy of ``module`` with every hook removed (in eval mode)."""
    clone = copy.deepcopy(module)
    for m in clone.modules():
        for attr in ("_forward_hooks", "_backward_hooks", "_forward_pre_hooks", "_backward_pre_hooks"):
            hooks = getattr(m, attr, None)
            if hooks is not None:
                hooks.clear()
        if hasattr(m, "_is_full_backward_hook"):
            m._is_full_backward_hook = None
    return clone.eval()


def _channels_last_problem(module: nn.Module, sample: torch.Tensor) -> str | None:
    """Why ``module`` (converted to channels-last) cannot run channels-last on ``sample``, or None."""
    clone = _without_hooks(module)
    try:
        fast = clone(sample)
    except RuntimeError as exc:
        return f"{type(exc).__name__}: {exc}"
    reference = clone.to(memory_format=torch.contiguous_format)(sample.contiguous())  # type: ignore[call-overload]  # torch's stubs omit Module.to(memory_format=...)
    if not isinstance(fast, torch.Tensor) or not isinstance(reference, torch.Tensor) or fast.shape != reference.shape:
        return "outputs differ in shape"
    fast, reference = fast.double(), reference.double()
    if not torch.equal(torch.isfinite(fast), torch.isfinite(reference)):
        return "non-finite logits differ"
    finite = torch.isfinite(reference)  # a model that gives NaN gives it in both layouts (reported later)
    gap = float((fast[finite] - reference[finite]).abs().max()) if finite.any() else 0.0
    return None if gap <= LAYOUT_TOLERANCE else f"logits differ by {gap:.2g}"


@dataclass
class CallCount:
    """Images passed forward and backward through a model (a batch of 8 counts 8), and the wall seconds
    spent inside those passes (from the model's first layer to its output and back)."""

    forward: int = 0
    backward: int = 0
    seconds: float = 0.0


# Every handle's calls in this process, including handles that metrics build on the fly (randomized copies).
PROCESS_CALLS = CallCount()


class _TrackedCount(CallCount):
    """A handle's counter: increments also go to :data:`PROCESS_CALLS` (resets to 0 do not subtract)."""

    def __setattr__(self, name: str, value: Any) -> None:
        if name in ("forward", "backward", "seconds"):
            delta = value - getattr(self, name, 0)
            if delta > 0:
                object.__setattr__(PROCESS_CALLS, name, getattr(PROCESS_CALLS, name) + delta)
        object.__setattr__(self, name, value)


@contextmanager
def counting_all() -> Iterator[CallCount]:
    """Count the calls of every handle in this process made inside the block."""
    before = CallCount(PROCESS_CALLS.forward, PROCESS_CALLS.backward, PROCESS_CALLS.seconds)
    result = CallCount()
    try:
        yield result
    finally:
        result.forward = PROCESS_CALLS.forward - before.forward
        result.backward = PROCESS_CALLS.backward - before.backward
        result.seconds = PROCESS_CALLS.seconds - before.seconds


# -- the batch-size rule ----------------------------------------------------------------------------------
# Pixels per model call at which the zoo models reach their best throughput on a CPU core: 32 tiles of
# 48x48 px (bench_models.py: forward 2.2-2.6k tiles/s at 16-64 tiles, falling at 128 and beyond as the
# activations leave the caches). Rounded to a power of two tiles per call.
CALL_PIXELS = 32 * 48 * 48
MIN_BATCH, MAX_BATCH = 4, 256


def preferred_batch(height: int, width: int, limit: int | None = None) -> int:
    """Images per model call for tiles of ``height`` x ``width``: the power of two nearest to
    ``CALL_PIXELS / (height * width)``, within [4, 256] and at most ``limit``."""
    pixels = max(int(height) * int(width), 1)
    size = 2 ** round(math.log2(max(CALL_PIXELS / pixels, 1.0)))
    size = min(max(size, MIN_BATCH), MAX_BATCH)
    return max(1, min(size, int(limit))) if limit else size


_THREAD_POOLS: dict[str, Any] = {}


def single_thread_pools() -> None:
    """Limit BLAS / OpenMP thread pools (numpy, scikit-learn) to one thread, once per process.

    ``threadpoolctl.threadpool_limits`` rescans the loaded libraries each time it is entered (~2 ms); the
    runner calls this once per process instead of entering it around every small fit.
    """
    if "limits" in _THREAD_POOLS:
        return
    from threadpoolctl import threadpool_limits

    _THREAD_POOLS["limits"] = threadpool_limits(1)  # kept: the limit holds for the life of the process


@contextlib.contextmanager
def one_blas_thread() -> Iterator[None]:
    """One BLAS / OpenMP thread for a small fit: nothing to do where :func:`single_thread_pools` is in force
    (every run's cells), else a scoped limit, so a user calling an explainer directly keeps their own
    thread settings afterwards."""
    if "limits" in _THREAD_POOLS:
        yield
        return
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        yield


# Largest |difference| of logits between channels-last and NCHW runs accepted on the first call.
LAYOUT_TOLERANCE = 1e-3
# Largest |difference| of logits between the frozen inference copy and the eager module (float32 sums in
# another order, batch-norm folded into the weights: ~1e-7 relative per operation on the zoo models).
INFERENCE_TOLERANCE = 1e-4


def _weights_signature(modules: list[nn.Module]) -> tuple:
    """Identity and in-place version of every parameter and buffer of ``modules`` (the module's
    ``modules()``, listed once): changes when a weight is replaced or changed in place."""
    return tuple(
        (id(t), t.data_ptr(), t._version)
        for m in modules
        for table in (m._parameters, m._buffers)
        for t in table.values()
        if t is not None
    )


def _frozen_inference_copy(module: nn.Module, sample: torch.Tensor) -> torch.jit.ScriptModule | None:
    """A traced, frozen, inference-optimised copy of ``module`` that gives its logits within
    :data:`INFERENCE_TOLERANCE` on ``sample`` (and on a batch of another size), or None."""
    clone = _without_hooks(module)
    probe = torch.cat([sample, sample[:1]])  # another batch size than the traced one
    try:
        with torch.inference_mode(False), torch.no_grad(), warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            traced = torch.jit.trace(clone, sample, check_trace=False)
            # the tracer warns when the module turns a tensor into a Python value (a branch on the input,
            # a size read as a number): the copy might not hold for other inputs, so the module stays eager
            if any(issubclass(w.category, torch.jit.TracerWarning) for w in caught):
                return None
            frozen = torch.jit.optimize_for_inference(torch.jit.freeze(traced))
            for x in (sample, probe):
                fast, reference = frozen(x), clone(x)
                if not isinstance(fast, torch.Tensor) or not isinstance(reference, torch.Tensor):
                    return None
                if fast.shape != reference.shape or not torch.isfinite(reference).all():
                    return None
                if float((fast.double() - reference.double()).abs().max()) > INFERENCE_TOLERANCE:
                    return None
    except Exception:  # noqa: BLE001 - any module the tracer cannot handle keeps the eager path
        return None
    return frozen


def tensor_from(a: np.ndarray) -> torch.Tensor:
    """A float32 tensor sharing ``a``'s memory where it can; read-only arrays (the views explainers get of
    shared context arrays) are copied, since torch does not support non-writable tensors."""
    a = np.ascontiguousarray(a, dtype=np.float32)
    return torch.from_numpy(a if a.flags.writeable else a.copy())


class ModelHandle:
    """A classifier behind one small protocol (see module docstring)."""

    def __init__(
        self,
        name: str,
        n_classes: int,
        module: nn.Module | None = None,
        predict_fn: Callable[[np.ndarray], np.ndarray] | None = None,
        batch_size: int = 256,
        channels_last: bool = True,
        fast_inference: bool = True,
    ):
        if (module is None) == (predict_fn is None):
            raise XbenchInputError(f"model '{name}'", "give exactly one of a torch module or a callable")
        self.name = name
        self.n_classes = int(n_classes)
        self.module = module
        self.predict_fn = predict_fn
        self.batch_size = batch_size
        self.calls: CallCount = _TrackedCount()
        self.layout = "nchw"
        self.fast_inference = bool(fast_inference)
        self._hooks: list[Any] = []
        self._inference: dict[tuple[int, ...], Any] = {}  # tile shape -> frozen copy (None: eager)
        self._inference_weights: tuple = ()
        if module is not None:
            if module.training:
                warnings.warn(f"model '{name}' was in training mode; switched to eval()", stacklevel=2)
            module.eval()
            self._install_counters(module)
            if channels_last:
                self._use_channels_last(module)

    # -- pickling (process pools and dask workers receive handles) -------------------------------------
    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        if self.module is not None:
            for hook in self._hooks:
                hook.remove()
            try:
                state["module"] = copy.deepcopy(self.module)
            finally:
                self._hooks = []
                self._install_counters(self.module)
                if self.layout == "probe":
                    self._install_probe(self.module)
        state["_hooks"] = []
        state["_inference"] = {}  # rebuilt where the handle lands (script modules do not pickle)
        state.pop("_module_list", None)
        state["_inference_weights"] = ()
        state["calls"] = (self.calls.forward, self.calls.backward)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        forward, backward = state.pop("calls")
        state.setdefault("fast_inference", True)
        state.setdefault("_inference", {})
        state.setdefault("_inference_weights", ())
        self.__dict__.update(state)
        self.calls = self._tracked(forward, backward)  # not added to this process's total again
        if self.module is not None:
            self._install_counters(self.module)
            if self.layout == "probe":
                self._install_probe(self.module)

    @staticmethod
    def _tracked(forward: int, backward: int) -> CallCount:
        count = _TrackedCount()
        object.__setattr__(count, "forward", int(forward))
        object.__setattr__(count, "backward", int(backward))
        return count

    # -- memory format -----------------------------------------------------------------------------
    def _use_channels_last(self, module: nn.Module) -> None:
        """Convert the module's 4-D parameters to channels-last; the first call checks the result."""
        if not any(p.ndim == 4 for p in module.parameters()):
            return
        module.to(memory_format=torch.channels_last)  # type: ignore[call-overload]  # torch's stubs omit Module.to(memory_format=...)
        self.layout = "probe"
        self._install_probe(module)

    def _install_probe(self, module: nn.Module) -> None:
        def probe(_mod, args):
            x = args[0] if args else None
            if isinstance(x, torch.Tensor):
                self._settle_layout(x)
            return None

        hook = module.register_forward_pre_hook(probe)
        hook._xbench_probe = True  # type: ignore[attr-defined]
        self._hooks.append(hook)

    def _settle_layout(self, x: torch.Tensor) -> None:
        """On the first 4-D input: keep channels-last if the module runs it and agrees with NCHW, else go back
        to NCHW (with a warning). Not a model call: it runs on a copy without hooks."""
        if self.layout != "probe" or self.module is None or x.ndim != 4:
            return
        module = self.module
        for hook in [h for h in self._hooks if getattr(h, "_xbench_probe", False)]:
            hook.remove()
            self._hooks.remove(hook)
        self.layout = "checking"
        problem: str | None = "the layout check did not finish"
        try:
            # outside inference mode (converted parameters would become inference tensors), on a copy
            # without hooks (the caller's hooks, e.g. an explainer's, must see one forward pass)
            with torch.inference_mode(False), torch.no_grad():
                try:
                    problem = _channels_last_problem(module, x[:2].detach().clone())
                except Exception as exc:  # noqa: BLE001 - e.g. a module that cannot be deep-copied
                    problem = f"{type(exc).__name__}: {exc}"
                if problem is not None:
                    module.to(memory_format=torch.contiguous_format)  # type: ignore[call-overload]  # torch's stubs omit Module.to(memory_format=...)
        finally:
            self.layout = "channels_last" if problem is None else "nchw"
        if problem is not None:
            warnings.warn(
                f"model '{self.name}' runs in NCHW layout (slower): channels-last failed ({problem})",
                stacklevel=3,
            )

    # -- the frozen inference copy ---------------------------------------------------------------
    def _foreign_hooks(self) -> bool:
        """Whether anything but this handle's own counters hooks the module's forward pass."""
        from torch.nn.modules import module as module_impl

        assert self.module is not None  # called for torch modules only
        if module_impl._global_forward_hooks or module_impl._global_forward_pre_hooks:
            return True
        root = self.module
        own = {h.id for h in self._hooks}
        if any(key not in own for key in (*root._forward_hooks, *root._forward_pre_hooks)):
            return True
        return any(m._forward_hooks or m._forward_pre_hooks for m in self._submodules()[1:])

    def _submodules(self) -> list[nn.Module]:
        """The module's ``modules()`` (the root first), listed once per module object."""
        assert self.module is not None  # called for torch modules only
        cached = self.__dict__.get("_module_list")
        if cached is None or cached[0] is not self.module:
            cached = (self.module, list(self.module.modules()))
            self.__dict__["_module_list"] = cached
        return cached[1]

    def weights_signature(self) -> tuple:
        """Changes whenever a weight of the module is replaced or changed in place (() for a black box):
        part of the keys of work kept across calls."""
        return () if self.module is None else _weights_signature(self._submodules())

    def _inference_copy(self, x: torch.Tensor, check_weights: bool = True) -> Any:
        """The frozen copy for tiles shaped like ``x`` (built on first use, rebuilt after a weight change),
        or None where the eager module must run. ``check_weights = False``: the caller has checked the
        weights since they last could change (the later chunks of one :meth:`scores` call)."""
        if not self.fast_inference or self.module is None or x.ndim != 4 or self._foreign_hooks():
            return None
        if check_weights:
            weights = self.weights_signature()
            if weights != self._inference_weights:
                self._inference.clear()
                self._inference_weights = weights
        key = (str(x.dtype), *x.shape[1:])
        if key not in self._inference:
            self._inference[key] = _frozen_inference_copy(self.module, x[:2].detach().clone())
        return self._inference[key]

    def inference_logits(self, x: torch.Tensor, check_weights: bool = True) -> torch.Tensor:
        """Logits of a batch without gradients (counted as forward calls): the frozen inference copy where
        it applies, else the eager module. The result is an ordinary (not inference-mode) tensor."""
        if self.module is None:
            raise XbenchInputError(f"model '{self.name}'", "is a black box: it has no logits")
        self._settle_layout(x)
        fast = self._inference_copy(x, check_weights)
        with torch.no_grad():
            if fast is None:
                return self.module(x)
            start = time.perf_counter()
            out = fast(x)
            self.calls.seconds += time.perf_counter() - start
        self.calls.forward += int(x.shape[0])
        return out

    # -- kind -------------------------------------------------------------------------------------
    @property
    def has_gradients(self) -> bool:
        return self.module is not None

    @property
    def is_black_box(self) -> bool:
        return self.module is None

    # -- call counting ----------------------------------------------------------------------------
    def _install_counters(self, module: nn.Module) -> None:
        # start times of the pass in progress: the model's own seconds are measured from the first layer's
        # input to the output (forward) and from the output's gradient to the input's (backward)
        started = {"forward": 0.0, "backward": 0.0}

        def before_forward(_mod, _args):
            started["forward"] = time.perf_counter()

        def on_forward(_mod, args, _out):
            x = args[0] if args else None
            if isinstance(x, torch.Tensor):
                self.calls.forward += int(x.shape[0])
                self.calls.seconds += time.perf_counter() - started["forward"]

        def before_backward(_mod, _grad_output):
            started["backward"] = time.perf_counter()

        def on_backward(_mod, grad_input, _grad_output):
            g = grad_input[0] if grad_input else None
            if isinstance(g, torch.Tensor):
                self.calls.backward += int(g.shape[0])
                if started["backward"]:
                    self.calls.seconds += time.perf_counter() - started["backward"]
                started["backward"] = 0.0

        self._hooks.append(module.register_forward_pre_hook(before_forward))
        self._hooks.append(module.register_forward_hook(on_forward))
        # A full backward hook fires once per backward pass through the whole module.
        self._hooks.append(module.register_full_backward_pre_hook(before_backward))
        self._hooks.append(module.register_full_backward_hook(on_backward))

    @contextmanager
    def counting(self) -> Iterator[CallCount]:
        """Count the calls made inside the block: ``with handle.counting() as c: ...; c.forward``."""
        before = CallCount(self.calls.forward, self.calls.backward, self.calls.seconds)
        result = CallCount()
        try:
            yield result
        finally:
            result.forward = self.calls.forward - before.forward
            result.backward = self.calls.backward - before.backward
            result.seconds = self.calls.seconds - before.seconds

    # -- scoring ----------------------------------------------------------------------------------
    def logits_tensor(self, x: torch.Tensor) -> torch.Tensor:
        """Differentiable forward for torch models (used by gradient explainers)."""
        if self.module is None:
            raise XbenchInputError(f"model '{self.name}'", "is a black box: it has no gradients or layers")
        return self.module(x)

    def call_batch(self, height: int, width: int) -> int:
        """Images per model call for tiles of this size (:func:`preferred_batch`, at most ``batch_size``)."""
        return preferred_batch(height, width, self.batch_size)

    def scores(self, images: np.ndarray, kind: str = "probability", max_batch: int | None = None) -> np.ndarray:
        """Class scores (N, n_classes) float64 without gradients: ``probability`` (softmax of the logits;
        a black box's own output) or ``logit`` (torch modules only). The one place where scoring is
        batched: inference mode, even chunks of at most :meth:`call_batch` images (and ``max_batch``);
        output validated."""
        images = np.asarray(images, dtype=np.float32)
        if images.ndim != 4:
            raise XbenchInputError(
                f"model '{self.name}' input", "wrong shape", expected="(N, C, H, W)", found=images.shape
            )
        if kind not in ("probability", "logit"):
            raise XbenchInputError(
                f"model '{self.name}' scores", "unknown kind", expected="probability | logit", found=kind
            )
        if kind == "logit" and self.module is None:
            raise XbenchInputError(f"model '{self.name}'", "is a black box: it has no logits")
        m = images.shape[0]
        out = np.empty((m, self.n_classes), dtype=np.float64)
        if m == 0:
            return out
        limit = self.call_batch(*images.shape[2:]) if self.module is not None else max(int(self.batch_size or 256), 1)
        if max_batch:
            limit = max(1, min(limit, int(max_batch)))
        size = -(-m // -(-m // limit))  # even chunks of at most `limit` images
        for start in range(0, m, size):
            chunk = images[start : start + size]
            if self.module is not None:
                # the weights cannot change between the chunks of one call: checked on the first only
                logits = self.inference_logits(tensor_from(chunk), check_weights=start == 0)
                if kind == "probability":
                    probs = torch.softmax(logits.double(), dim=1).numpy()
                else:
                    probs = logits.double().numpy()
            else:
                assert self.predict_fn is not None  # exactly one of module / predict_fn
                called = time.perf_counter()
                probs = np.asarray(self.predict_fn(chunk), dtype=np.float64)
                self.calls.seconds += time.perf_counter() - called
                self.calls.forward += chunk.shape[0]
            self._check_output(probs, chunk.shape[0])
            out[start : start + chunk.shape[0]] = probs
        return out

    def probabilities(self, images: np.ndarray) -> np.ndarray:
        """Class probabilities (N, n_classes) float64 in batches; validates the model's output."""
        return self.scores(images, "probability")

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
