"""The explainer protocol: :class:`ExplainContext` in, :class:`Explanation` out, plus shared helpers.

Every explainer is a function ``fn(model, images, targets, context, **settings)`` returning attributions
``(N, H, W)`` (or ``(attributions, ConceptReport)``); :func:`xbench.explainers.explain` validates the
inputs, runs it under a seeded torch generator and a call counter, and validates the output.

The helpers here are shared by the explainer modules: channel reduction, baselines (zero, mean, blur,
twin), class-score functions for perturbation methods (logits or probabilities, torch or black box), batch
iteration, and forward hooks that read or replace a layer's activations.
"""

from __future__ import annotations

import contextlib
import weakref
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
import torch.nn.functional as F
from scipy import ndimage

from xbench.errors import XbenchInputError
from xbench.models.base import ModelHandle, tensor_from
from xbench.schema import Field

if TYPE_CHECKING:
    from torch import nn
    from torch.utils.hooks import RemovableHandle

# ---------------------------------------------------------------------------------------------------
# Protocol types
# ---------------------------------------------------------------------------------------------------


@dataclass
class ExplainContext:
    """Everything an explainer may need beyond the model, the images and the targets (all optional).

    seed: seeds every random draw (numpy generator and torch generator).
    batch_size: tiles (or perturbed copies) per model call.
    twins: float32 (N, C, H, W), the explained tiles with every planted structure removed (a baseline).
    masks: bool (N, K, H, W) planted masks of the explained tiles, one plane per name in ``mask_names``.
    driving_types: class index -> structure types that make the class (``oracle``).
    class_names: names of the model's classes (concept reports).
    fit_images / fit_labels / fit_masks: fitting set of correctly classified tiles (``activation-clusters``;
        ``fit_masks`` (Nf, K, H, W) for the clusters' IoU and purity against the planted types).
    concept_sets: ``tcav`` example sets: structure type -> images (n, C, H, W); keys ``random-0``,
        ``random-1``, ... hold random sets.
    band_spread: (C,) per-band standard deviation of the training split: the unit of noise levels given as a
        fraction of a band's spread (``smoothgrad``); when absent, the spread of the explained tiles is used.
    self_checks: a dict the caller passes to receive per-tile self-checks an explainer can make of itself
        (``completeness-gap`` of integrated gradients and DeepLIFT, float (N,)); None = not wanted.
    reliance / relied_types: the model's measured reliance per structure type (interventional importance, the
        truth of the concept metrics) and the types it relies on; the ``oracle`` control reports them as its
        concept evidence. None = not measured (a user's tile pack).
    """

    seed: int = 0
    batch_size: int = 64
    twins: np.ndarray | None = None
    masks: np.ndarray | None = None
    mask_names: list[str] | None = None
    driving_types: dict[int, list[str]] | None = None
    class_names: list[str] | None = None
    fit_images: np.ndarray | None = None
    fit_labels: np.ndarray | None = None
    fit_masks: np.ndarray | None = None
    concept_sets: dict[str, np.ndarray] | None = None
    band_spread: np.ndarray | None = None
    self_checks: dict[str, np.ndarray] | None = None
    reliance: dict[str, float] | None = None
    relied_types: list[str] | None = None

    def rng(self, stream: int = 0) -> np.random.Generator:
        """A numpy generator seeded from ``seed`` (``stream`` separates independent uses)."""
        return np.random.default_rng([int(self.seed), int(stream)])


@dataclass
class Cost:
    """What one explanation cost: images passed forward / backward through the model, seconds, and the
    seconds of those inside the model's own passes (the rest is the explainer's and the harness's work)."""

    forward_calls: int
    backward_calls: int
    seconds: float
    model_seconds: float = 0.0

    def per_tile(self, n: int) -> dict[str, float]:
        n = max(int(n), 1)
        return {
            "forward_calls": self.forward_calls / n,
            "backward_calls": self.backward_calls / n,
            "seconds": self.seconds / n,
        }


ROW_KEYS = ("concept", "class_name", "score", "spread", "p_value", "matched_type", "iou", "purity")


@dataclass
class ConceptReport:
    """What a concept explainer found.

    rows: one dict per (concept, class) with keys ``concept, class_name, score, spread, p_value,
        matched_type, iou, purity`` (None where not applicable). Their meaning per explainer is in the
        explainer's docstring.
    type_importance: structure type -> the method's importance of the type for the target classes.
    flagged: structure type -> whether the method flags the type as used.
    extras: explainer-specific arrays for figures (for ``activation-clusters``: ``cluster_maps``,
        ``score_changes``, ``iou``, ``purity``...); also reachable as attributes (``report.cluster_maps``).
    """

    rows: list[dict[str, Any]] = field(default_factory=list)
    type_importance: dict[str, float] = field(default_factory=dict)
    flagged: dict[str, bool] = field(default_factory=dict)
    extras: dict[str, Any] = field(default_factory=dict)

    def __getattr__(self, name: str) -> Any:
        # Only called when normal lookup fails: expose extras as attributes.
        extras = self.__dict__.get("extras")
        if extras is not None and name in extras:
            return extras[name]
        raise AttributeError(name)


@dataclass
class Explanation:
    """Attributions float32 (N, H, W) at input resolution (finite; larger = more evidence for the
    target), the cost of computing them, the concept report of concept explainers (else None) and the
    settings actually used (defaults filled in, the layer resolved)."""

    attributions: np.ndarray
    cost: Cost
    concepts: ConceptReport | None = None
    settings: dict[str, Any] = field(default_factory=dict)


class NonFiniteAttributionError(XbenchInputError):
    """An explainer produced NaN or inf attributions (reported, never silently zeroed)."""


# ---------------------------------------------------------------------------------------------------
# Setting checks
# ---------------------------------------------------------------------------------------------------


def check_choice(key: str, name: str, value: Any, options: tuple[str, ...]) -> str:
    if value not in options:
        raise XbenchInputError(
            f"explainer '{key}': setting '{name}'",
            "unknown value",
            expected="one of " + ", ".join(options),
            found=value,
        )
    return str(value)


# ---------------------------------------------------------------------------------------------------
# Signed or unsigned maps
# ---------------------------------------------------------------------------------------------------

SIGNED_REDUCTIONS = ("sum", "mean")


def signed_maps(rule: bool | Callable[[dict[str, Any]], bool]) -> Callable[[Any], Any]:
    """Decorator (below ``@register_explainer``): declare whether the explainer's maps are signed (negative
    values = evidence against the target), as a constant or as a function of the settings."""

    def decorate(fn: Any) -> Any:
        fn.__xbench_signed__ = rule
        return fn

    return decorate


def maps_signed(fn: Any, settings: dict[str, Any]) -> bool | None:
    """Whether ``fn``'s maps are signed under ``settings`` (None: the explainer does not say). Overlap
    metrics take the positive part of every map as evidence for the target (a no-op on unsigned maps)."""
    rule = getattr(fn, "__xbench_signed__", None)
    if rule is None:
        return None
    return bool(rule(settings)) if callable(rule) else bool(rule)


def reduce_is_signed(settings: dict[str, Any]) -> bool:
    """Maps reduced over bands by a signed sum or mean are signed; absolute reductions are not."""
    return settings.get("reduce") in SIGNED_REDUCTIONS


# ---------------------------------------------------------------------------------------------------
# Arrays and batches
# ---------------------------------------------------------------------------------------------------


def batches(n: int, size: int) -> Iterator[slice]:
    """Consecutive slices of at most ``size`` items covering ``range(n)``."""
    size = max(int(size), 1)
    for start in range(0, n, size):
        yield slice(start, min(start + size, n))


def as_tensor(a: np.ndarray) -> torch.Tensor:
    return tensor_from(a)


def as_numpy(t: torch.Tensor) -> np.ndarray:
    return t.detach().cpu().numpy().astype(np.float32, copy=False)


REDUCTIONS = ("sum", "mean", "max-abs", "sum-abs", "mean-abs")


def reduce_channels(attr: np.ndarray, how: str) -> np.ndarray:
    """Bands -> one map: (N, C, H, W) -> (N, H, W) float32.

    ``sum`` (signed total, used for input-x-gradient / IG / DeepLIFT: completeness holds for the map),
    ``mean``, ``max-abs`` (Simonyan et al. 2014: max over channels of |gradient|), ``sum-abs``, ``mean-abs``.
    """
    if how == "sum":
        out = attr.sum(axis=1)
    elif how == "mean":
        out = attr.mean(axis=1)
    elif how == "max-abs":
        out = np.abs(attr).max(axis=1)
    elif how == "sum-abs":
        out = np.abs(attr).sum(axis=1)
    elif how == "mean-abs":
        out = np.abs(attr).mean(axis=1)
    else:  # pragma: no cover - checked by check_choice before
        raise ValueError(how)
    return out.astype(np.float32, copy=False)


def upsample(maps: torch.Tensor | np.ndarray, size: tuple[int, int], mode: str = "bilinear") -> np.ndarray:
    """(N, h, w) -> (N, H, W) float32 by torch interpolation (``bilinear`` or ``nearest``)."""
    t = maps if isinstance(maps, torch.Tensor) else tensor_from(maps)
    t = t.detach().float()[:, None]
    if tuple(t.shape[-2:]) != tuple(size):
        kwargs = {"align_corners": False} if mode == "bilinear" else {}
        t = F.interpolate(t, size=tuple(size), mode=mode, **kwargs)
    return as_numpy(t[:, 0])


def nearest_index_upsample(maps: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    """Integer (N, h, w) maps -> (N, H, W) by nearest neighbour (each pixel takes the cell it falls in)."""
    n, h, w = maps.shape
    H, W = size
    rows = np.minimum((np.arange(H) * h) // H, h - 1)
    cols = np.minimum((np.arange(W) * w) // W, w - 1)
    return maps[:, rows][:, :, cols]


# ---------------------------------------------------------------------------------------------------
# Baselines
# ---------------------------------------------------------------------------------------------------

BASELINES = ("zero", "mean", "blur", "twin")


def reduce_field(default: str) -> Field:
    """The declared ``reduce`` setting: how bands are reduced to one map."""
    return Field("str", default, choices=REDUCTIONS, doc="how the bands' attributions become one map")


LAYER_FIELD = Field("str", None, nullable=True, doc="the layer to read (default: the model's explain layer)")


def baseline_fields(blur_default: float = 4.0) -> dict[str, Field]:
    """The declared ``baseline`` and ``blur_sigma`` settings of baseline-based explainers."""
    return {
        "baseline": Field("str", "zero", choices=BASELINES, doc="reference input ('twin' needs the twins)"),
        "blur_sigma": Field("number", blur_default, low=0.0, doc="Gaussian sigma in pixels of the 'blur' baseline"),
    }


BLUR_SIGMA = 4.0  # pixels; the one default of every blurred baseline (explainers and response metrics)


def make_baseline(
    images: np.ndarray,
    kind: str,
    twins: np.ndarray | None = None,
    blur_sigma: float = BLUR_SIGMA,
    where: str = "baseline",
) -> np.ndarray:
    """A reference input per tile, float32 (N, C, H, W); the one baseline maker of explainers and metrics.

    ``zero``: all bands 0 (black); ``mean``: each band filled with the tile's own band mean;
    ``blur``: each band Gaussian-blurred with ``blur_sigma`` pixels (Sundararajan et al. 2017 discuss
    blurred baselines; Petsiuk et al. 2018 insert into a blurred image); ``twin``: the tile's
    structure-free twin ``twins``. ``where`` names the caller in errors (e.g. ``explainer 'deeplift'``).
    """
    images = np.asarray(images, dtype=np.float32)
    if kind == "zero":
        return np.zeros_like(images, dtype=np.float32)
    if kind == "mean":
        return np.broadcast_to(images.mean(axis=(2, 3), keepdims=True), images.shape).astype(np.float32)
    if kind == "blur":
        return ndimage.gaussian_filter(images, sigma=(0, 0, blur_sigma, blur_sigma), mode="reflect").astype(np.float32)
    if kind == "twin":
        if twins is None:
            raise XbenchInputError(
                f"{where}: baseline 'twin'", "needs the tiles' twins", expected="twins (N, C, H, W)", found=None
            )
        return np.asarray(twins, dtype=np.float32)
    raise XbenchInputError(
        f"{where}: setting 'baseline'", "unknown value", expected="one of " + ", ".join(BASELINES), found=kind
    )


# ---------------------------------------------------------------------------------------------------
# Scores for perturbation methods
# ---------------------------------------------------------------------------------------------------

SCORES = ("probability", "logit")


def torch_module(model: ModelHandle) -> nn.Module:
    """The handle's torch module. Gradient and layer explainers run on white boxes only (the registry
    refuses a black box before they run); a black box reaching here is an input error, not a crash."""
    if model.module is None:
        raise XbenchInputError(f"model '{model.name}'", "is a black box: it has no torch module")
    return model.module


# Digests of arrays whose bytes cannot change: a read-only array that owns its memory, or a view of one, by
# the owner's identity and the view's place in it. TCAV would otherwise hash its concept sets (~120 MB on the
# demo) on every call, and the metrics re-run it dozens of times per cell.
_FROZEN_DIGESTS: dict[tuple, tuple[weakref.ref, bytes]] = {}


def array_digest(a: np.ndarray) -> bytes:
    """blake2b digest (16 bytes) of an array's bytes in C order; remembered for arrays whose memory is
    read-only at its owner (see :data:`_FROZEN_DIGESTS`)."""
    import hashlib

    owner = a
    while isinstance(owner.base, np.ndarray):
        owner = owner.base
    key = None
    if owner.flags.owndata and not owner.flags.writeable:
        key = (id(owner), a.__array_interface__["data"][0], a.shape, a.strides, a.dtype.str)
        hit = _FROZEN_DIGESTS.get(key)
        if hit is not None and hit[0]() is owner:
            return hit[1]
    contiguous = np.ascontiguousarray(a)
    digest = hashlib.blake2b(contiguous.reshape(-1).view(np.uint8).data, digest_size=16).digest()
    if key is not None:
        if len(_FROZEN_DIGESTS) > 1024:
            _FROZEN_DIGESTS.clear()
        _FROZEN_DIGESTS[key] = (weakref.ref(owner), digest)
    return digest


def fit_content_key(model: ModelHandle, arrays: list[np.ndarray], settings: tuple) -> str | None:
    """A content key for state an explainer fits once and reuses within a process (metrics re-run an explainer
    on the same model many times): the module's weights (parameters and buffers), the arrays' bytes and the
    settings. None for a model without a torch module."""
    import hashlib

    module = model.module
    if module is None:
        return None
    digest = hashlib.blake2b(digest_size=16)
    for name, tensor in module.state_dict().items():
        digest.update(name.encode())
        digest.update(np.ascontiguousarray(tensor.detach().cpu().numpy()).reshape(-1).view(np.uint8).data)
    for array in arrays:
        a = np.asarray(array)
        digest.update(repr((a.shape, str(a.dtype))).encode())
        digest.update(array_digest(a))
    digest.update(repr(settings).encode())
    return digest.hexdigest()


class FitCache:
    """Fitted state of one explainer in this process, by content key; the oldest entries are dropped beyond
    ``size`` (each may hold activations of a few MB)."""

    def __init__(self, size: int = 4) -> None:
        self.size = size
        self.entries: dict[str, Any] = {}

    def get_or_fit(self, key: str | None, fit: Callable[[], Any]) -> Any:
        """The entry of ``key``, fitted by ``fit()`` the first time (always fitted when ``key`` is None)."""
        if key is None:
            return fit()
        if key not in self.entries:
            self.entries[key] = fit()
            while len(self.entries) > self.size:
                self.entries.pop(next(iter(self.entries)))
        return self.entries[key]

    def clear(self) -> None:
        self.entries.clear()

    def __len__(self) -> int:
        return len(self.entries)


def score_function(key: str, model: ModelHandle, score: str) -> Callable[[torch.Tensor], torch.Tensor]:
    """A forward function ``x (B, C, H, W) tensor -> class scores (B, n_classes) float32 tensor``.

    ``probability``: softmax of the logits for torch models, the callable's output for black boxes (the
    same units for both kinds, so torch and black-box models compare). ``logit``: the torch module's raw
    logits (an error for black boxes, which have none).
    """
    score = check_choice(key, "score", score, SCORES)
    if model.is_black_box:
        if score == "logit":
            raise XbenchInputError(
                f"explainer '{key}': setting 'score'",
                f"model '{model.name}' is a black box and has no logits",
                expected="score = 'probability'",
                found=score,
            )

        def black_box(x: torch.Tensor) -> torch.Tensor:
            return torch.from_numpy(model.probabilities(as_numpy(x)).astype(np.float32))

        return black_box

    torch_module(model)  # a black box would have been handled above

    def white_box(x: torch.Tensor) -> torch.Tensor:
        with torch.no_grad():
            logits = model.inference_logits(x)  # the handle's frozen inference copy where it applies
            if score == "probability":
                return torch.softmax(logits.double(), dim=1).float()
            return logits.float()

    return white_box


# ---------------------------------------------------------------------------------------------------
# Seeding and counting
# ---------------------------------------------------------------------------------------------------


@contextmanager
def torch_seeded(seed: int) -> Iterator[None]:
    """Run the block with torch's global generator seeded, restoring its state afterwards."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed) % (2**63))
        yield


@contextmanager
def backward_counted(model: ModelHandle, n: int) -> Iterator[None]:
    """Make sure a backward pass of ``n`` images is counted.

    The handle counts backward passes with a full backward hook on the whole module, which only fires
    when gradients reach the module's input. Layer methods differentiate with respect to an inner layer,
    so the hook may stay silent; then the block's ``n`` images are added by hand.
    """
    before = model.calls.backward
    yield
    if model.calls.backward == before:
        model.calls.backward += int(n)


def grad_enabled_module(model: ModelHandle, key: str) -> torch.nn.Module:
    if model.module is None:  # guarded by explain(); kept for direct calls
        raise XbenchInputError(
            f"explainer '{key}'",
            f"model '{model.name}' is a black box: this explainer needs gradients",
            expected="a torch model",
        )
    return model.module


# ---------------------------------------------------------------------------------------------------
# Layer hooks
# ---------------------------------------------------------------------------------------------------


def _layer_output_tensor(key: str, layer_name: str, out: Any) -> torch.Tensor:
    if not isinstance(out, torch.Tensor) or out.ndim != 4:
        shape = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise XbenchInputError(
            f"explainer '{key}': layer '{layer_name}'",
            "output is not a spatial feature map",
            expected="a 4-D tensor (N, channels, h, w), e.g. a conv layer",
            found=shape,
        )
    return out


class LayerTap:
    """Forward hook on a named layer that records its output and optionally rewrites it.

    ``mode='read'``: stores the output detached. ``mode='grad'``: replaces the output by a fresh leaf that
    requires grad (so gradients with respect to the layer can be taken even when the input does not
    require grad), stored in ``self.activation``. ``replace``: a function ``out -> new_out`` applied to
    the output. A layer called more than once in a forward pass is an error (ambiguous activations).
    """

    def __init__(
        self,
        key: str,
        model: ModelHandle,
        layer_name: str,
        mode: str = "read",
        replace: Callable[[torch.Tensor], torch.Tensor] | None = None,
    ):
        self.key = key
        self.layer_name = layer_name
        self.layer = model.get_layer(layer_name)
        self.mode = mode
        self.replace = replace
        self.activation: torch.Tensor | None = None
        self.calls = 0
        self._handle: RemovableHandle | None = None
        self.module = torch_module(model)

    def _hook(self, _module, _args, out):
        self.calls += 1
        if self.calls > 1:
            raise XbenchInputError(
                f"explainer '{self.key}': layer '{self.layer_name}'",
                "the layer runs more than once per forward pass (a reused module)",
                expected="a layer used once, e.g. a distinct conv layer",
            )
        out = _layer_output_tensor(self.key, self.layer_name, out)
        if self.replace is not None:
            out = self.replace(out)
        if self.mode == "grad":
            leaf = out.detach().requires_grad_(True)
            self.activation = leaf
            return leaf * 1.0  # a non-leaf view, so in-place ops downstream stay legal
        self.activation = out.detach()
        return out if self.replace is not None else None

    def __enter__(self) -> LayerTap:
        self._handle = self.layer.register_forward_hook(self._hook)
        return self

    def __exit__(self, *exc) -> None:
        if self._handle is not None:
            self._handle.remove()
            self._handle = None

    @property
    def recorded(self) -> torch.Tensor:
        """The layer's activation from the last :meth:`forward` (which raises when the layer did not run)."""
        if self.activation is None:
            raise XbenchInputError(f"explainer '{self.key}': layer '{self.layer_name}'", "no forward pass yet")
        return self.activation

    def reset(self) -> None:
        """Forget the last pass (before a pass run by another tap on the same model)."""
        self.calls = 0
        self.activation = None

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Run the whole model once with the tap installed; returns the logits."""
        self.reset()
        out = self.module(x)
        if self.activation is None:
            raise XbenchInputError(
                f"explainer '{self.key}': layer '{self.layer_name}'",
                "the layer did not run in the model's forward pass",
            )
        return out


def layer_activations(key: str, model: ModelHandle, layer_name: str, images: np.ndarray, batch_size: int) -> np.ndarray:
    """The layer's output for all images, float32 (N, C, h, w), computed without gradients."""
    return layers_activations(key, model, [layer_name], images, batch_size)[layer_name]


def layers_activations(
    key: str,
    model: ModelHandle,
    layer_names: list[str],
    images: np.ndarray,
    batch_size: int,
    reduce: Callable[[str, torch.Tensor], torch.Tensor] | None = None,
) -> dict[str, np.ndarray]:
    """Several layers' outputs for all images from one forward pass per batch: layer -> float32 (N, C, h, w)
    (the same arrays as :func:`layer_activations` per layer, at a fraction of the model calls).

    ``reduce(layer, output)`` maps each batch's output before it leaves torch (e.g. a mean over positions,
    so full maps are never copied out); the arrays are then its outputs in their dtype, concatenated along
    the batch."""
    names = list(dict.fromkeys(layer_names))
    out: dict[str, list[np.ndarray]] = {name: [] for name in names}
    with contextlib.ExitStack() as stack, torch.no_grad():
        taps = [stack.enter_context(LayerTap(key, model, name)) for name in names]
        for sl in batches(images.shape[0], batch_size):
            for t in taps[1:]:
                t.reset()
            taps[0].forward(as_tensor(images[sl]))  # the whole model runs once: every tap records
            for t in taps:
                if reduce is None:
                    out[t.layer_name].append(as_numpy(t.recorded))
                else:  # the reduction's own dtype
                    out[t.layer_name].append(reduce(t.layer_name, t.recorded.detach()).cpu().numpy())
    if not names or not out[names[0]]:
        raise XbenchInputError(f"explainer '{key}'", "no images to compute activations from")
    return {name: np.concatenate(parts, axis=0) for name, parts in out.items()}
