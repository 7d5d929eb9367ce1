"""The metric registry: :class:`MetricInputs`, :class:`MetricResult`, ``register_metric``, ``compute_metric``.

Every metric is a pure function on numpy arrays (in its family module) plus a small *runner* registered
here with its metadata (definition, citation, range, direction, needs). The runner receives a
:class:`MetricInputs` bundle, the truth kind it should score against, and validated settings, and returns
one :class:`MetricResult`. ``compute_metric`` does everything around it:

- validates the arrays' shapes (bad input raises :class:`~xbench.errors.XbenchInputError`),
- validates settings (unknown ones raise, listing the known ones),
- skips with a stated reason when a hard need (model, torch model, explainer re-runs, cost) is missing,
- runs localization metrics once per truth kind (``planted`` and ``verified``),
- and guarantees that every NaN value carries a reason (``reasons[tile]`` or ``reasons[-1]``).

Undefined values are NaN with a recorded reason; a metric never returns a silent zero and never crashes
on degenerate input (constant or all-NaN attributions, empty masks).
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from xbench.errors import XbenchInputError
from xbench.explainers.base import array_digest
from xbench.models.base import ModelHandle
from xbench.registry import Registry, check_settings, settings_schema
from xbench.schema import Field, Where

TRUTH_KINDS = ("planted", "verified")
FAMILIES = ("overlap", "response", "model-dependence", "steadiness", "spread", "concepts", "cost")

# The vocabulary of needs shown by `xbench metrics`. Hard needs are checked before a runner is called;
# the others are checked by the runner (they depend on settings or have alternatives).
NEEDS_TEXT = {
    "truth mask": "a planted mask or a model-verified evidence mask",
    "model": "the model (torch module or black box) to score perturbed tiles",
    "torch model": "a torch module (white box) whose layers can be re-initialised",
    "twins": "structure-free counterfactual twins (for the default 'twin' baseline)",
    "explainer re-runs": "the explainer re-run with the same settings on other images or models",
    "type masks": "one mask per structure type (pixel methods)",
    "concepts": "a concept report (concept methods) or type masks (pixel methods)",
    "interventional importance": "per-type importance from the truth module's interventions",
    "type roles": "which types the model relies on, which are look-alikes and which are unused",
    "cost": "the explainer's recorded cost (model calls and seconds)",
}
HARD_NEEDS = ("model", "torch model", "explainer re-runs", "cost")


@dataclass
class MetricInputs:
    """Everything a metric may need; the runner fills it. All but the first three are optional.

    attributions: float32 (N, H, W), larger = more evidence for the target class.
    images: float32 (N, C, H, W) reflectance.  targets: int (N,) target class per tile.
    model: the explained model.  planted: bool (N, H, W), union of the target class's driving types.
    verified: bool (N, H, W), model-verified evidence mask.  evidence: float (N, H, W) evidence map.
    twins: float32 (N, C, H, W) structure-free twins.  type_masks: bool (N, K, H, W) with ``mask_names``.
    rerun_explainer(model, images, targets[, tiles=]) -> (N, H, W): the same explainer with the same settings;
    the optional ``tiles`` gives, for each row of ``images``, the explained tile it is a perturbed copy of.
    concept_report: has ``type_importance: dict[str, float]`` and ``flagged: dict[str, bool]`` (concept
    methods) or None (pixel methods).  type_importance: interventional importance per structure type.
    relied_types / lookalike_types / unused_types: type roles.  cost: has ``forward_calls``,
    ``backward_calls``, ``seconds``.  seed: seeds every random draw.  batch_size: images per model call.
    """

    attributions: np.ndarray
    images: np.ndarray
    targets: np.ndarray
    model: ModelHandle | None = None
    planted: np.ndarray | None = None
    verified: np.ndarray | None = None
    evidence: np.ndarray | None = None
    planted_coverage: np.ndarray | None = None  # float (N, H, W) in [0, 1]: core/fringe of the planted truth
    verified_coverage: np.ndarray | None = None  # float (N, H, W) in [0, 1]: core/fringe of the verified truth
    self_checks: dict[str, np.ndarray] | None = None  # explainer self-checks per tile (e.g. completeness-gap)
    twins: np.ndarray | None = None
    type_masks: np.ndarray | None = None
    mask_names: list[str] | None = None
    rerun_explainer: Callable[[ModelHandle, np.ndarray, np.ndarray], np.ndarray] | None = None
    concept_report: Any = None
    type_importance: dict[str, float] | None = None
    relied_types: list[str] | None = None
    lookalike_types: list[str] | None = None
    unused_types: list[str] | None = None
    cost: Any = None
    seed: int = 0
    batch_size: int = 256
    # Work that does not depend on the attributions (see ``shared_work``), kept by the caller across the
    # explainers of one model; None: computed each time.
    shared: dict | None = field(default=None, repr=False, compare=False)
    # Shared work between metrics on the same inputs (perturbation curves, the randomization cascade).
    _cache: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    @property
    def n_tiles(self) -> int:
        return int(np.shape(self.attributions)[0])

    def truth_mask(self, truth: str) -> np.ndarray | None:
        return {"planted": self.planted, "verified": self.verified}.get(truth)

    def truth_coverage(self, truth: str) -> np.ndarray | None:
        """Coverage (N, H, W) of the truth kind's structures (None when only the boolean mask is known)."""
        return {"planted": self.planted_coverage, "verified": self.verified_coverage}.get(truth)

    def cache_key(self, *parts: Any) -> tuple:
        """A key for shared work: the given parts plus a digest of the attributions and images."""
        return (*parts, id(self.model), self.seed, _arrays_digest(self.attributions, self.images, self.targets))

    def shared_work(self, compute: Callable[[], Any], *parts: Any) -> Any:
        """``compute()``, or its result kept in ``shared`` from an earlier explainer of the same model.

        For work that depends on the model, the tiles and the seed but not on the attributions: the model's
        scores of perturbations drawn from the seed alone (subset-drop-corr's subsets, infidelity's squares,
        max-sensitivity's noise calibration) are the same for every explainer, so the runner computes them
        once per model and process instead of once per explainer. ``parts`` name the work and every setting
        it reads; the key adds the seed, the model's identity and weights and digests of the images,
        targets and twins, so a change to any of them computes afresh. Results are kept read-only; the
        values are the same bits as computing them (the same calls on the same arrays)."""
        if self.shared is None or self.model is None:
            return compute()
        digest = _arrays_digest(self.images, self.targets, self.twins)
        key = (*parts, self.seed, id(self.model), self.model.weights_signature(), digest)
        if key not in self.shared:
            self.shared[key] = _read_only(compute())
        return self.shared[key]


def _arrays_digest(*arrays: np.ndarray | None) -> str:
    """One digest of the arrays' shapes, dtypes and bytes (None counts as itself); ``array_digest`` remembers
    the digest of read-only arrays (the runner freezes the images and maps), so they are hashed once."""
    digest = hashlib.blake2b(digest_size=12)
    for arr in arrays:
        if arr is None:
            digest.update(b"none")
            continue
        a = np.asarray(arr)
        digest.update(repr((a.shape, a.dtype.str)).encode())
        digest.update(array_digest(a))
    return digest.hexdigest()


def _read_only(value: Any) -> Any:
    """Arrays (also inside tuples) made read-only, so that no caller changes a value another one reads."""
    if isinstance(value, np.ndarray):
        value.flags.writeable = False
    elif isinstance(value, tuple):
        for v in value:
            _read_only(v)
    return value


@dataclass
class MetricResult:
    """One metric against one truth kind.

    values: float64 (N,) per tile, or (1,) when the metric is not per tile; NaN where undefined.
    reasons: tile index -> why its value is NaN; -1 for the whole result.
    skipped: why the metric could not run at all (then every value is NaN), else None.
    curves: per-tile curves, e.g. ``deletion`` (N, steps+1); ``curve_labels`` names their columns
        when they are not evenly spaced fractions (the randomization cascade's layer names).
    """

    metric: str
    truth: str
    values: np.ndarray
    per_tile: bool
    reasons: dict[int, str] = field(default_factory=dict)
    skipped: str | None = None
    curves: dict[str, np.ndarray] = field(default_factory=dict)
    curve_labels: dict[str, list[str]] = field(default_factory=dict)
    settings: dict[str, Any] = field(default_factory=dict)

    def mean(self) -> float:
        """Mean over finite values (NaN when none)."""
        v = self.values[np.isfinite(self.values)]
        return float(v.mean()) if v.size else float("nan")


@dataclass(frozen=True)
class MetricSpec:
    key: str
    family: str
    definition: str
    citation: str
    value_range: tuple[float, float]
    higher_is_better: bool | None
    needs: tuple[str, ...]
    per_tile: bool
    defaults: dict[str, Any]
    settings_doc: dict[str, str]
    truths: tuple[str, ...]
    runner: Callable[..., MetricResult]
    schema: dict[str, Field] = field(default_factory=dict)

    def check_settings(self, settings: dict[str, Any], where: str | Where | None = None) -> dict[str, Any]:
        """Settings checked against the declared fields, defaults filled in (one error format); ``tiles``
        is the runner's own setting (score re-running metrics on the first K explained tiles)."""
        return check_settings(self.schema, settings, where or f"settings of metric '{self.key}'", extra=("tiles",))

    @property
    def range_text(self) -> str:
        def f(x: float) -> str:
            if np.isinf(x):
                return "inf" if x > 0 else "-inf"
            return f"{x:g}"

        return f"[{f(self.value_range[0])}, {f(self.value_range[1])}]"

    @property
    def direction_text(self) -> str:
        return {True: "higher", False: "lower", None: "neither"}[self.higher_is_better]


_REGISTRY: Registry[MetricSpec] = Registry("metric")


def register_metric(
    key: str,
    *,
    family: str,
    definition: str,
    citation: str,
    value_range: tuple[float, float],
    higher_is_better: bool | None,
    needs: tuple[str, ...] | list[str],
    per_tile: bool,
    defaults: dict[str, Any] | None = None,
    settings_doc: dict[str, str] | None = None,
    truths: tuple[str, ...] = ("none",),
    settings: dict[str, Field] | None = None,
) -> Callable[[Callable[..., MetricResult]], Callable[..., MetricResult]]:
    """Register ``runner(inputs, truth, settings) -> MetricResult`` under ``key`` with its metadata.

    ``settings`` declares each setting as an :class:`xbench.schema.Field`, checked in one place before any
    work; a setting with only a default in ``defaults`` is passed through unchecked."""
    schema = settings_schema(defaults, settings)
    if family not in FAMILIES:
        raise ValueError(f"metric '{key}': unknown family {family!r}; expected one of {FAMILIES}")
    unknown = [n for n in needs if n not in NEEDS_TEXT]
    if unknown:
        raise ValueError(f"metric '{key}': unknown needs {unknown}; expected from {sorted(NEEDS_TEXT)}")

    def decorate(runner: Callable[..., MetricResult]) -> Callable[..., MetricResult]:
        if key in _REGISTRY:
            raise ValueError(f"metric '{key}' is already registered")
        _REGISTRY[key] = MetricSpec(
            key=key,
            family=family,
            definition=definition,
            citation=citation,
            value_range=(float(value_range[0]), float(value_range[1])),
            higher_is_better=higher_is_better,
            needs=tuple(needs),
            per_tile=per_tile,
            defaults={name: f.default for name, f in schema.items()},
            settings_doc=dict(settings_doc or {}),
            truths=tuple(truths),
            runner=runner,
            schema=schema,
        )
        return runner

    return decorate


def get_metric(key: str) -> MetricSpec:
    return _REGISTRY.lookup(key)


def list_metrics(family: str | None = None) -> list[MetricSpec]:
    """Registered metrics grouped by family (in FAMILIES order; registration order within a family),
    optionally of one family."""
    specs = sorted(_REGISTRY.values(), key=lambda s: FAMILIES.index(s.family))
    if family is not None:
        specs = [s for s in specs if s.family == family]
    return specs


# -- input validation ---------------------------------------------------------------------------------
def validate_inputs(inputs: MetricInputs) -> None:
    """Shapes and dtypes of the bundle; raises XbenchInputError naming the array."""
    a = np.asarray(inputs.attributions)
    if a.ndim != 3:
        raise XbenchInputError("metric inputs: attributions", "wrong shape", expected="(N, H, W)", found=a.shape)
    n, h, w = a.shape
    im = np.asarray(inputs.images)
    if im.ndim != 4 or im.shape[0] != n or im.shape[2:] != (h, w):
        raise XbenchInputError("metric inputs: images", "wrong shape", expected=f"({n}, C, {h}, {w})", found=im.shape)
    t = np.asarray(inputs.targets)
    if t.shape != (n,) or not np.issubdtype(t.dtype, np.integer):
        raise XbenchInputError(
            "metric inputs: targets", "wrong shape or dtype", expected=f"int ({n},)", found=f"{t.dtype} {t.shape}"
        )
    if inputs.model is not None and n and (t.min() < 0 or t.max() >= inputs.model.n_classes):
        raise XbenchInputError(
            "metric inputs: targets",
            "class index out of range",
            expected=f"0..{inputs.model.n_classes - 1}",
            found=(int(t.min()), int(t.max())),
        )
    for name in ("planted", "verified", "evidence", "planted_coverage", "verified_coverage"):
        arr = getattr(inputs, name)
        if arr is not None and np.shape(arr) != (n, h, w):
            raise XbenchInputError(
                f"metric inputs: {name}", "wrong shape", expected=f"({n}, {h}, {w})", found=np.shape(arr)
            )
    if inputs.twins is not None and np.shape(inputs.twins) != im.shape:
        raise XbenchInputError(
            "metric inputs: twins", "wrong shape", expected=str(im.shape), found=np.shape(inputs.twins)
        )
    if inputs.type_masks is not None:
        tm = np.shape(inputs.type_masks)
        if len(tm) != 4 or tm[0] != n or tm[2:] != (h, w):
            raise XbenchInputError("metric inputs: type_masks", "wrong shape", expected=f"({n}, K, {h}, {w})", found=tm)
        names = inputs.mask_names
        if names is None or len(names) != tm[1]:
            raise XbenchInputError(
                "metric inputs: mask_names", "must name each type mask plane", expected=f"{tm[1]} names", found=names
            )


def _hard_need_missing(need: str, inputs: MetricInputs) -> str | None:
    if need == "model" and inputs.model is None:
        return "needs a model"
    if need == "torch model" and (inputs.model is None or inputs.model.module is None):
        return (
            "needs a torch model (white box); this model is a black box"
            if inputs.model is not None
            else "needs a torch model"
        )
    if need == "explainer re-runs" and inputs.rerun_explainer is None:
        return "needs explainer re-runs (rerun_explainer)"
    if need == "cost" and inputs.cost is None:
        return "needs the explainer's recorded cost"
    return None


def nan_result(
    spec: MetricSpec, inputs: MetricInputs, truth: str, reason: str, settings: dict[str, Any]
) -> MetricResult:
    """A skipped result: every value NaN, the reason recorded for the whole result."""
    size = inputs.n_tiles if spec.per_tile else 1
    return MetricResult(
        metric=spec.key,
        truth=truth,
        values=np.full(size, np.nan),
        per_tile=spec.per_tile,
        reasons={-1: reason},
        skipped=reason,
        settings=dict(settings),
    )


def _finalise(result: MetricResult, spec: MetricSpec, inputs: MetricInputs) -> MetricResult:
    values = np.asarray(result.values, dtype=np.float64).reshape(-1)
    expected = inputs.n_tiles if spec.per_tile else 1
    if values.shape != (expected,):  # a bug in a runner, not bad input
        raise RuntimeError(f"metric '{spec.key}' returned {values.shape} values, expected ({expected},)")
    result.values = values
    if -1 not in result.reasons:
        for i in np.flatnonzero(~np.isfinite(values)):
            result.reasons.setdefault(int(i), "undefined value (no specific reason recorded)")
    return result


def compute_metric(key: str, inputs: MetricInputs, **settings: Any) -> list[MetricResult]:
    """Compute one metric; localization metrics give one result per truth kind (planted, verified)."""
    spec = get_metric(key)
    merged = spec.check_settings(settings)
    merged.pop("tiles", None)
    validate_inputs(inputs)
    results = []
    for truth in spec.truths:
        hard = [r for n in spec.needs if n in HARD_NEEDS if (r := _hard_need_missing(n, inputs))]
        missing = hard[0] if hard else None
        if missing is None and inputs.n_tiles == 0:
            missing = "no tiles"
        if missing is None and truth in TRUTH_KINDS and inputs.truth_mask(truth) is None:
            missing = (
                "needs the planted mask"
                if truth == "planted"
                else "needs the model-verified evidence mask (from counterfactual twins, truth module)"
            )
        if missing is not None:
            results.append(nan_result(spec, inputs, truth, missing, merged))
            continue
        result = spec.runner(inputs, truth, merged)
        results.append(_finalise(result, spec, inputs))
    return results


# -- helpers shared by the families ---------------------------------------------------------------------
def model_scorer(model: ModelHandle, chunk: int | None = None) -> Callable[[np.ndarray], np.ndarray]:
    """``images (M, C, H, W) -> class probabilities (M, K)`` for the perturbation metrics.

    The handle's own batched path (:meth:`ModelHandle.probabilities`: inference mode, even chunks of the
    preferred batch size, channels-last modules), so metrics and explainers score alike; handles whose
    ``probabilities`` is overridden keep their override. ``chunk`` caps the images per call further. Calls
    pass through the module, so the handle's call counter sees them, and the output is checked.
    """
    if chunk is None or model.module is None or type(model).probabilities is not ModelHandle.probabilities:
        return model.probabilities
    return lambda images: model.scores(images, "probability", max_batch=chunk)


def bad_attribution_tiles(attributions: np.ndarray) -> np.ndarray:
    """Tiles (N,) whose attribution holds a NaN or infinity."""
    a = np.asarray(attributions)
    return ~np.isfinite(a.reshape(a.shape[0], -1)).all(axis=1)


NONFINITE_REASON = "attribution has non-finite values (NaN or inf)"


def tile_result(
    spec_key: str, truth: str, values: np.ndarray, reasons: dict[int, str], settings: dict[str, Any], **extra: Any
) -> MetricResult:
    return MetricResult(
        metric=spec_key,
        truth=truth,
        values=np.asarray(values, dtype=np.float64),
        per_tile=True,
        reasons=reasons,
        settings=dict(settings),
        **extra,
    )
