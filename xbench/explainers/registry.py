"""The explainer registry, the :func:`explain` entry point, and plugin loading.

Built-in explainers register themselves when their modules are imported; third-party explainers register
with the same decorator, either in code that the user imports or through the entry-point group
``xbench.explainers`` (each entry point loads a module that registers on import, a decorated explainer
function, or a zero-argument function that registers when called).
"""

from __future__ import annotations

import dataclasses
import importlib
import importlib.metadata
import inspect
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, fields, replace
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.explainers.base import (
    ROW_KEYS,
    ConceptReport,
    Cost,
    ExplainContext,
    Explanation,
    NonFiniteAttributionError,
    torch_seeded,
)
from xbench.models.base import ModelHandle
from xbench.registry import Registry, check_settings, settings_schema
from xbench.schema import Field, Where

ENTRY_POINT_GROUP = "xbench.explainers"
NEEDS = ("gradients", "layer", "twins", "masks", "fit-set", "concept-sets")
KINDS = ("pixel", "concept", "control")
BUILTIN_MODULES = ("gradients", "cam", "perturbation", "clusters", "tcav", "controls")

ExplainerFn = Callable[..., "np.ndarray | tuple[np.ndarray, ConceptReport]"]


@dataclass(frozen=True)
class ExplainerSpec:
    """A registered explainer: its function and the metadata ``xbench explainers`` lists."""

    key: str
    fn: ExplainerFn
    citation: str
    needs: frozenset[str]
    defaults: dict[str, Any]
    description: str
    kind: str = "pixel"
    source: str = "xbench"
    extra: dict[str, Any] = field(default_factory=dict)
    schema: dict[str, Field] = field(default_factory=dict)

    def check_settings(self, settings: dict[str, Any], where: str | Where | None = None) -> dict[str, Any]:
        """Settings checked against the declared fields, defaults filled in (one error format)."""
        return check_settings(self.schema, settings, where or f"settings of explainer '{self.key}'")

    @property
    def black_box_ok(self) -> bool:
        """True when the explainer works with a black-box callable (needs no gradients or layer)."""
        return not ({"gradients", "layer"} & self.needs)


_REGISTRY: Registry[ExplainerSpec] = Registry("explainer")
_STATE = {"builtins": False, "plugins": False}
PLUGIN_ERRORS: dict[str, str] = {}


def register_explainer(
    key: str,
    *,
    citation: str,
    needs: set[str] | frozenset[str] | tuple = (),
    defaults: dict[str, Any] | None = None,
    description: str = "",
    kind: str = "pixel",
    settings: dict[str, Field] | None = None,
) -> Callable[[ExplainerFn], ExplainerFn]:
    """Decorator: register ``fn(model, images, targets, context, **settings)`` under ``key``.

    ``needs`` uses the vocabulary ``gradients, layer, twins, masks, fit-set, concept-sets``; black-box
    capable explainers have neither ``gradients`` nor ``layer``. ``defaults`` lists every setting the
    explainer accepts (unknown settings are rejected by :func:`explain`). ``kind`` is ``pixel``,
    ``concept`` or ``control`` (for listings). ``settings`` declares each setting as an
    :class:`xbench.schema.Field` (type, range, choices, meaning), checked in one place before any work;
    a setting with only a default is passed through unchecked.
    """
    where = f"explainer '{key}'"
    if not isinstance(key, str) or not key or key != key.strip():
        raise XbenchInputError("register_explainer", "bad key", expected="a non-empty string", found=key)
    needs = frozenset(needs)
    unknown = sorted(needs - set(NEEDS))
    if unknown:
        raise XbenchInputError(where, "unknown needs", expected="some of " + ", ".join(NEEDS), found=unknown)
    if kind not in KINDS:
        raise XbenchInputError(where, "unknown kind", expected="one of " + ", ".join(KINDS), found=kind)
    if not citation:
        raise XbenchInputError(where, "missing citation", expected="the published source of the method")
    defaults = dict(defaults or {})
    declared = dict(settings or {})
    if "layer" in needs:
        defaults.setdefault("layer", None)
        declared.setdefault("layer", Field("str", None, nullable=True, doc="the layer (default: the model's own)"))
    schema = settings_schema(defaults, declared)
    defaults = {name: f.default for name, f in schema.items()}

    def decorate(fn: ExplainerFn) -> ExplainerFn:
        if not callable(fn):
            raise XbenchInputError(where, "can only decorate a function")
        module = getattr(fn, "__module__", "") or ""
        source = "xbench" if module.startswith("xbench.") else module.split(".")[0] or "user"
        spec = ExplainerSpec(
            key=key,
            fn=fn,
            citation=citation,
            needs=needs,
            defaults=defaults,
            description=description or (inspect.getdoc(fn) or "").split("\n")[0],
            kind=kind,
            source=source,
            schema=schema,
        )
        old = _REGISTRY.get(key)
        if old is not None and _qualname(old.fn) != _qualname(fn):
            raise XbenchInputError(
                where, "already registered by another function", expected="a new key", found=_qualname(old.fn)
            )
        _REGISTRY[key] = spec
        fn.__xbench_explainer__ = key  # type: ignore[attr-defined]
        return fn

    return decorate


def _qualname(fn: Any) -> str:
    return f"{getattr(fn, '__module__', '?')}.{getattr(fn, '__qualname__', repr(fn))}"


def unregister_explainer(key: str) -> None:
    """Remove a registration (tests and interactive use)."""
    _REGISTRY.pop(key, None)


def _load_builtins() -> None:
    if _STATE["builtins"]:
        return
    _STATE["builtins"] = True
    for name in BUILTIN_MODULES:
        importlib.import_module(f"xbench.explainers.{name}")


def load_plugins(force: bool = False) -> dict[str, str]:
    """Load the entry points of group ``xbench.explainers``; returns {entry point: error} of failures.

    A plugin that fails to load is reported (warning + ``PLUGIN_ERRORS``), not fatal: the other
    explainers stay usable.
    """
    if _STATE["plugins"] and not force:
        return dict(PLUGIN_ERRORS)
    _STATE["plugins"] = True
    _load_builtins()
    for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP):
        label = f"{ep.name} = {ep.value}"
        try:
            obj = ep.load()
            if callable(obj) and not inspect.ismodule(obj) and not hasattr(obj, "__xbench_explainer__"):
                params = [
                    p
                    for p in inspect.signature(obj).parameters.values()
                    if p.default is inspect.Parameter.empty
                    and p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
                ]
                if params:
                    raise XbenchInputError(
                        f"entry point '{label}'",
                        "loads a function that is neither a registered explainer nor a zero-argument registration hook",
                        expected="a module, a @register_explainer function, or f()",
                    )
                obj()
        except Exception as exc:  # noqa: BLE001 - a broken plugin must not break the others
            PLUGIN_ERRORS[label] = f"{type(exc).__name__}: {exc}"
            warnings.warn(f"xbench explainer plugin '{label}' failed to load: {exc}", stacklevel=2)
    return dict(PLUGIN_ERRORS)


def _ensure_loaded() -> None:
    _load_builtins()
    load_plugins()


def get_explainer(key: str) -> ExplainerSpec:
    """The spec registered under ``key``; unknown keys raise an error listing the valid ones."""
    _ensure_loaded()
    return _REGISTRY.lookup(key)


def list_explainers() -> list[ExplainerSpec]:
    """Every registered explainer (built-ins first in their documented order, then plugins by key)."""
    _ensure_loaded()
    return sorted(
        _REGISTRY.values(),
        key=lambda s: (s.source != "xbench", KINDS.index(s.kind) if s.source == "xbench" else 0, _order(s.key), s.key),
    )


_BUILTIN_ORDER = (
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
)


def _order(key: str) -> int:
    return _BUILTIN_ORDER.index(key) if key in _BUILTIN_ORDER else len(_BUILTIN_ORDER)


# ---------------------------------------------------------------------------------------------------
# explain()
# ---------------------------------------------------------------------------------------------------


def _check_images(key: str, images: Any, name: str = "images") -> np.ndarray:
    where = f"explainer '{key}': {name}"
    if not isinstance(images, np.ndarray):
        raise XbenchInputError(where, "not a numpy array", expected="float32 (N, C, H, W)", found=type(images).__name__)
    if images.ndim != 4:
        raise XbenchInputError(where, "wrong shape", expected="(N, C, H, W)", found=images.shape)
    if not np.issubdtype(images.dtype, np.floating):
        raise XbenchInputError(where, "wrong dtype", expected="float32 reflectance in [0, 1]", found=str(images.dtype))
    images = np.ascontiguousarray(images, dtype=np.float32)
    if not np.isfinite(images).all():
        raise XbenchInputError(where, "non-finite values (NaN or inf)")
    return images


def _check_targets(key: str, targets: Any, n: int, n_classes: int) -> np.ndarray:
    where = f"explainer '{key}': targets"
    t = np.asarray(targets)
    if t.ndim == 0:
        t = np.full(n, t)
    if t.shape != (n,):
        raise XbenchInputError(where, "wrong shape", expected=f"({n},) one class per image", found=t.shape)
    if t.size and not np.issubdtype(t.dtype, np.integer):
        if np.issubdtype(t.dtype, np.floating) and np.all(t == np.round(t)):
            t = t.astype(np.int64)
        else:
            raise XbenchInputError(where, "not integer class indices", found=str(t.dtype))
    t = t.astype(np.int64)
    bad = np.flatnonzero((t < 0) | (t >= n_classes))
    if bad.size:
        raise XbenchInputError(
            where,
            "target class out of range",
            expected=f"0 <= target < {n_classes}",
            found=f"{int(t[bad[0]])} at tile {int(bad[0])}",
        )
    return t


def _check_context(
    spec: ExplainerSpec, model: ModelHandle, images: np.ndarray, context: ExplainContext, settings: dict[str, Any]
) -> ExplainContext:
    key = spec.key
    where = f"explainer '{key}': context"
    if not isinstance(context, ExplainContext):
        raise XbenchInputError(where, "wrong type", expected="ExplainContext", found=type(context).__name__)
    context = dataclasses.replace(context)  # never modify the caller's context
    if (
        isinstance(context.batch_size, bool)
        or not isinstance(context.batch_size, (int, np.integer))
        or context.batch_size < 1
    ):
        raise XbenchInputError(f"{where}.batch_size", "bad value", expected="an integer >= 1", found=context.batch_size)
    n, c, h, w = images.shape
    needs = set(spec.needs)
    if settings.get("baseline") == "twin":
        needs.add("twins")
    if context.twins is not None or "twins" in needs:
        if context.twins is None:
            raise XbenchInputError(
                f"{where}.twins",
                f"explainer '{key}' needs the tiles' structure-free twins",
                expected=f"float32 {images.shape}",
                found=None,
            )
        twins = _check_images(key, context.twins, "context.twins")
        if twins.shape != images.shape:
            raise XbenchInputError(
                f"{where}.twins", "shape differs from the images", expected=images.shape, found=twins.shape
            )
        context.twins = twins
    if context.masks is not None or "masks" in needs:
        _check_masks(f"{where}.masks", context.masks, context.mask_names, (n, h, w), key)
    if "fit-set" in needs:
        if context.fit_images is None:
            raise XbenchInputError(
                f"{where}.fit_images",
                f"explainer '{key}' needs a fitting set of correctly classified tiles",
                expected=f"float32 (Nf, {c}, H, W)",
            )
        fit = _check_images(key, context.fit_images, "context.fit_images")
        if fit.shape[1] != c:
            raise XbenchInputError(
                f"{where}.fit_images", "band count differs from the images", expected=c, found=fit.shape[1]
            )
        context.fit_images = fit
        if context.fit_labels is not None and np.asarray(context.fit_labels).shape != (fit.shape[0],):
            raise XbenchInputError(
                f"{where}.fit_labels",
                "wrong shape",
                expected=(fit.shape[0],),
                found=np.asarray(context.fit_labels).shape,
            )
        if context.fit_masks is not None:
            _check_masks(
                f"{where}.fit_masks", context.fit_masks, context.mask_names, (fit.shape[0],) + fit.shape[2:], key
            )
    if "concept-sets" in needs:
        sets = context.concept_sets
        if not sets:
            raise XbenchInputError(
                f"{where}.concept_sets",
                f"explainer '{key}' needs concept example sets (see xbench.explainers.concept_sets.make_concept_sets)",
                expected="dict name -> images (n, C, H, W), with random-0, random-1, ...",
            )
        checked = {}
        for name, arr in sets.items():
            arr = _check_images(key, arr, f"context.concept_sets['{name}']")
            if arr.shape[1] != c:
                raise XbenchInputError(
                    f"{where}.concept_sets['{name}']",
                    "band count differs from the images",
                    expected=c,
                    found=arr.shape[1],
                )
            checked[str(name)] = arr
        context.concept_sets = checked
    return context


def _check_masks(where: str, masks: Any, names: Any, nhw: tuple[int, int, int], key: str) -> None:
    if masks is None:
        raise XbenchInputError(
            where, f"explainer '{key}' needs the planted masks", expected=f"bool (N, K, H, W) with N, H, W = {nhw}"
        )
    m = np.asarray(masks)
    if m.ndim != 4 or (m.shape[0], m.shape[2], m.shape[3]) != nhw:
        raise XbenchInputError(where, "wrong shape", expected=f"(N, K, H, W) with N, H, W = {nhw}", found=m.shape)
    if m.dtype != np.bool_:
        raise XbenchInputError(where, "wrong dtype", expected="bool", found=str(m.dtype))
    if names is None or len(names) != m.shape[1]:
        raise XbenchInputError(
            where.rsplit(".", 1)[0] + ".mask_names",
            "one name per mask plane needed",
            expected=m.shape[1],
            found=None if names is None else len(names),
        )


def _read_only(a: np.ndarray) -> np.ndarray:
    view = a.view()
    view.flags.writeable = False
    return view


def private_context(context: ExplainContext) -> ExplainContext:
    """A copy of the context whose arrays (twins, masks, fitting set, concept sets) are read-only views: an
    explainer cannot change what later explainers and metrics read (writing raises numpy's "assignment
    destination is read-only"), and nothing is copied (the concept sets alone are ~120 MB on the demo, and
    the metrics re-run explainers many times)."""
    changes: dict[str, Any] = {}
    for f in fields(context):
        value = getattr(context, f.name)
        if isinstance(value, np.ndarray):
            changes[f.name] = _read_only(value)
        elif isinstance(value, dict) and any(isinstance(v, np.ndarray) for v in value.values()):
            changes[f.name] = {k: _read_only(v) if isinstance(v, np.ndarray) else v for k, v in value.items()}
    return replace(context, **changes) if changes else context


def explain(
    key: str,
    model: ModelHandle,
    images: np.ndarray,
    targets: np.ndarray,
    context: ExplainContext | None = None,
    **settings: Any,
) -> Explanation:
    """Explain ``model``'s scores for ``targets`` on ``images`` with the explainer ``key``.

    Validates everything at the boundary (key, images, targets, settings, context, black box versus
    gradient methods, layer names), runs the explainer under a torch generator seeded from
    ``context.seed`` and the model's call counter, and checks that the attributions are finite float32
    (N, H, W). Returns an :class:`Explanation`.
    """
    spec = get_explainer(key)
    if not isinstance(model, ModelHandle):
        raise XbenchInputError(
            f"explainer '{key}': model",
            "not a ModelHandle",
            expected="xbench.models.ModelHandle",
            found=type(model).__name__,
        )
    images = _check_images(key, images)
    n, _, h, w = images.shape
    targets = _check_targets(key, targets, n, model.n_classes)
    merged = spec.check_settings(settings)
    if model.is_black_box and ({"gradients", "layer"} & spec.needs):
        what = "gradients" if "gradients" in spec.needs else "a named layer"
        ok = ", ".join(s.key for s in list_explainers() if s.black_box_ok)
        raise XbenchInputError(
            f"explainer '{key}'",
            f"needs {what}, but model '{model.name}' is a black box (a callable)",
            expected="a torch model, or a black-box explainer: " + ok,
        )
    if "layer" in spec.needs:
        rule = getattr(spec.fn, "default_layer", None)  # an explainer may state its own default-layer rule
        layer = merged.get("layer") or (rule(model) if rule is not None else model.default_layer())
        model.get_layer(str(layer))  # raises, listing the model's layers
        merged["layer"] = str(layer)
    context = _check_context(spec, model, images, context if context is not None else ExplainContext(), merged)

    concepts: ConceptReport | None = None
    with model.counting() as calls:
        start = time.perf_counter()
        if n == 0:
            out: Any = np.zeros((0, h, w), dtype=np.float32)
        else:
            with torch_seeded(context.seed), warnings.catch_warnings():
                warnings.filterwarnings("ignore", message=".*[Ff]ull backward hook.*")
                warnings.filterwarnings("ignore", message=".*required_grads has been set automatically.*")
                warnings.filterwarnings("ignore", message=".*[Ss]etting (forward, )?backward hooks.*")
                warnings.filterwarnings("ignore", message=".*multiple inputs for Lime.*")
                # the explainer gets its own copies of the tiles and targets and read-only views of the
                # context: one that writes into its input cannot change what later explainers and metrics read
                out = spec.fn(model, images.copy(), targets.copy(), private_context(context), **merged)
        seconds = time.perf_counter() - start
    if isinstance(out, tuple):
        if len(out) != 2 or not isinstance(out[1], ConceptReport):
            raise XbenchInputError(f"explainer '{key}'", "returned a tuple that is not (attributions, ConceptReport)")
        out, concepts = out
        _check_report(key, concepts)
    attributions = _check_attributions(key, out, (n, h, w))
    cost = Cost(
        forward_calls=int(calls.forward),
        backward_calls=int(calls.backward),
        seconds=float(seconds),
        model_seconds=float(calls.seconds),
    )
    return Explanation(attributions=attributions, cost=cost, concepts=concepts, settings=merged)


def _check_attributions(key: str, out: Any, shape: tuple[int, int, int]) -> np.ndarray:
    where = f"explainer '{key}': attributions"
    if hasattr(out, "detach"):
        out = out.detach().cpu().numpy()
    a = np.asarray(out)
    if a.shape != shape:
        raise XbenchInputError(where, "wrong shape", expected=f"(N, H, W) = {shape}", found=a.shape)
    if not (np.issubdtype(a.dtype, np.floating) or np.issubdtype(a.dtype, np.integer) or a.dtype == np.bool_):
        raise XbenchInputError(where, "not numeric", found=str(a.dtype))
    with np.errstate(over="ignore"):
        a = a.astype(np.float32)
    bad = np.flatnonzero(~np.isfinite(a).reshape(shape[0], shape[1] * shape[2]).all(axis=1))
    if bad.size:
        tiles = ", ".join(str(int(i)) for i in bad[:10]) + (" ..." if bad.size > 10 else "")
        raise NonFiniteAttributionError(
            f"explainer '{key}'",
            f"non-finite attributions (NaN or inf) on tile(s) {tiles} ({bad.size} of {shape[0]} tiles)",
        )
    return np.ascontiguousarray(a)


def _check_report(key: str, report: ConceptReport) -> None:
    for i, row in enumerate(report.rows):
        missing = [k for k in ROW_KEYS if k not in row]
        if missing:
            raise XbenchInputError(
                f"explainer '{key}': concept report row {i}",
                "missing keys",
                expected=", ".join(ROW_KEYS),
                found=missing,
            )
