"""Model-verified reliance: what a model really uses, measured with counterfactual twins.

For every tile and every planted instance (human structures and natural look-alikes) the scene is rendered
again with that instance alone removed; the instance's **drop** is ``score(tile) - score(twin)`` where the
score is the model's probability of the tile's target class (``ModelHandle.probabilities``). The renderer
keeps noise and haze fixed, so the twin differs from the tile only where the instance covers a pixel.

- **Evidence map** of a tile: ``sum_i max(drop_i, 0) * coverage_i`` over its instances (float32, H x W).
- **Verified mask** of a tile: the pixels (coverage > 0) of instances whose drop is at least
  ``VERIFIED_MIN_DROP`` (0.02) and at least ``VERIFIED_REL_DROP`` (10%) of the tile's largest drop: the
  structures the model demonstrably used there.
- **Interventional importance** of a structure type: the mean drop when *all* instances of the type are
  removed at once, over the tiles that hold the type, with a 95% bootstrap percentile interval
  (``scipy.stats.bootstrap``; Efron & Tibshirani 1993). For tiles rendered with the spurious cue, the
  same with the cue switched off (kind ``"cue"``).

All renders go through the model in batches.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from xbench.errors import XbenchInputError
from xbench.models.base import ModelHandle

VERIFIED_MIN_DROP = 0.02
VERIFIED_REL_DROP = 0.10
CUE_KIND = "cue"


@dataclass
class Reliance:
    """What a model relies on, per instance, per pixel and per structure type (see module docstring)."""

    instance_table: pd.DataFrame  # tile, instance_id, kind, human, drop, coverage_px
    evidence: np.ndarray  # float32 (N, H, W)
    verified_masks: np.ndarray  # bool (N, H, W)
    type_table: pd.DataFrame  # kind, mean_drop, ci_low, ci_high, n
    scores: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (N,) target score of each tile
    targets: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    type_drops: dict[str, np.ndarray] = field(default_factory=dict)  # kind -> per-tile drops (n,)

    def relied_types(self, min_drop: float = 0.02) -> list[str]:
        """Types (or ``"cue"``) whose interval lies above zero and whose mean drop is >= ``min_drop``."""
        t = self.type_table
        keep = (t["ci_low"] > 0) & (t["mean_drop"] >= min_drop)
        return [str(k) for k in t.loc[keep, "kind"]]

    def drop_of(self, kind: str) -> float:
        """Mean drop of a type (NaN if no tile holds it)."""
        row = self.type_table[self.type_table["kind"] == kind]
        return float(row["mean_drop"].iloc[0]) if len(row) else float("nan")


@dataclass
class _Render:
    tile: int
    what: str  # "base" | "instance" | "type" | "cue"
    key: Any  # instance id, type name or None
    omit: tuple[int, ...]
    cue: bool | None  # None = the scene's own cue; False = cue removed


def _plan(scenes: Sequence[Any], cue_tiles: np.ndarray) -> list[_Render]:
    plan: list[_Render] = []
    for t, scene in enumerate(scenes):
        plan.append(_Render(t, "base", None, (), None))
        by_kind: dict[str, list[int]] = {}
        for inst in scene.instances:
            plan.append(_Render(t, "instance", int(inst.instance_id), (int(inst.instance_id),), None))
            by_kind.setdefault(str(inst.kind), []).append(int(inst.instance_id))
        for kind, ids in sorted(by_kind.items()):
            plan.append(_Render(t, "type", kind, tuple(ids), None))
        if cue_tiles[t] and scene_has_cue(scene):
            plan.append(_Render(t, "cue", CUE_KIND, (), False))
    return plan


def scene_has_cue(scene: Any) -> bool:
    """Whether a scene is rendered with a spurious cue switched on."""
    return bool(getattr(scene, "cue_on", False)) and getattr(scene, "cue", None) is not None


def _batches(plan: list[_Render], scenes: Sequence[Any], batch_size: int) -> Iterator[np.ndarray]:
    from xbench.scenes import render  # earlier stage

    for start in range(0, len(plan), batch_size):
        chunk = plan[start : start + batch_size]
        yield np.stack([render(scenes[r.tile], omit=r.omit, cue=r.cue) for r in chunk]).astype(np.float32)


def bootstrap_ci(values: np.ndarray, rng: np.random.Generator, n_boot: int) -> tuple[float, float]:
    """95% percentile bootstrap interval of the mean (scipy.stats.bootstrap); NaN for fewer than 2
    values, the value itself when all values are equal."""
    v = np.asarray(values, dtype=np.float64)
    if v.size < 2:
        return float("nan"), float("nan")
    if np.ptp(v) == 0:
        return float(v[0]), float(v[0])
    res = stats.bootstrap(
        (v,), np.mean, n_resamples=n_boot, confidence_level=0.95, method="percentile", random_state=rng, vectorized=True
    )
    return float(res.confidence_interval.low), float(res.confidence_interval.high)


def compute_reliance(
    model: ModelHandle,
    scenes: list[Any],
    targets: np.ndarray,
    *,
    seed: int = 0,
    batch_size: int = 128,
    n_boot: int = 1000,
    cue_classes: Sequence[int] | None = None,
) -> Reliance:
    """Per-instance drops, evidence maps, verified masks and per-type importance (see module docstring).

    ``cue_classes``: the cue row averages over cue-on tiles whose target is one of these classes
    (default: every class). Pass the classes the cue was correlated with in training (the synthesizer
    switches it on in non-default-class tiles) to measure the cue as evidence for them; in tiles of the
    other classes the cue is counter-evidence and would cancel the average.
    """
    targets = np.asarray(targets)
    if targets.shape != (len(scenes),):
        raise XbenchInputError("array 'targets'", "wrong shape", expected=f"({len(scenes)},)", found=targets.shape)
    if len(scenes) and (
        not np.issubdtype(targets.dtype, np.integer) or targets.min() < 0 or targets.max() >= model.n_classes
    ):
        raise XbenchInputError(
            "array 'targets'",
            "target outside the model's classes",
            expected=f"integers in [0, {model.n_classes - 1}]",
            found=f"{targets.dtype} {targets.min()}..{targets.max()}",
        )
    if len(scenes) == 0:
        raise XbenchInputError("scenes", "no scenes given", expected="at least one scene")
    cue_tiles = np.ones(len(scenes), dtype=bool) if cue_classes is None else np.isin(targets, list(cue_classes))
    plan = _plan(scenes, cue_tiles)
    scores = np.empty(len(plan), dtype=np.float64)
    pos = 0
    h = w = 0
    for batch in _batches(plan, scenes, batch_size):
        h, w = batch.shape[2:]
        probs = model.probabilities(batch)
        idx = np.arange(pos, pos + len(batch))
        scores[idx] = probs[np.arange(len(batch)), targets[[plan[i].tile for i in idx]]]
        pos += len(batch)

    base = np.empty(len(scenes), dtype=np.float64)
    for r, s in zip(plan, scores, strict=True):
        if r.what == "base":
            base[r.tile] = s
    evidence = np.zeros((len(scenes), h, w), dtype=np.float64)
    verified = np.zeros((len(scenes), h, w), dtype=bool)
    rows: list[dict[str, Any]] = []
    type_drops: dict[str, list[float]] = {}
    inst_lookup = {(t, int(i.instance_id)): i for t, sc in enumerate(scenes) for i in sc.instances}
    for r, s in zip(plan, scores, strict=True):
        drop = base[r.tile] - s
        if r.what == "instance":
            inst = inst_lookup[(r.tile, r.key)]
            cov = np.asarray(inst.coverage, dtype=np.float64)
            rows.append(
                {
                    "tile": r.tile,
                    "instance_id": r.key,
                    "kind": str(inst.kind),
                    "human": bool(inst.human),
                    "drop": drop,
                    "coverage_px": float(cov.sum()),
                }
            )
            evidence[r.tile] += max(drop, 0.0) * cov
        elif r.what in ("type", "cue"):
            type_drops.setdefault(str(r.key), []).append(drop)
    columns = ["tile", "instance_id", "kind", "human", "drop", "coverage_px"]
    instance_table = pd.DataFrame(rows, columns=columns)
    if len(instance_table):
        instance_table = instance_table.astype({"tile": np.int64, "instance_id": np.int64, "human": bool})
        for t, group in instance_table.groupby("tile"):
            largest = group["drop"].max()
            threshold = max(VERIFIED_MIN_DROP, VERIFIED_REL_DROP * largest)
            for _, row in group[group["drop"] >= threshold].iterrows():
                verified[int(t)] |= np.asarray(inst_lookup[(int(t), int(row["instance_id"]))].coverage) > 0

    rng = np.random.default_rng(seed)
    type_rows = []
    for kind in sorted(type_drops, key=lambda k: (k == CUE_KIND, k)):
        v = np.asarray(type_drops[kind])
        lo, hi = bootstrap_ci(v, rng, n_boot)
        type_rows.append({"kind": kind, "mean_drop": float(v.mean()), "ci_low": lo, "ci_high": hi, "n": int(v.size)})
    type_table = pd.DataFrame(type_rows, columns=["kind", "mean_drop", "ci_low", "ci_high", "n"])
    return Reliance(
        instance_table=instance_table,
        evidence=evidence.astype(np.float32),
        verified_masks=verified,
        type_table=type_table,
        scores=base,
        targets=targets.astype(np.int64),
        type_drops={k: np.asarray(v) for k, v in type_drops.items()},
    )
