"""Model-verified reliance: what a model really uses, measured with counterfactual twins.

Every planted instance of a tile (human structures and natural look-alikes) gets a **Shapley share** of
the model's score change (Shapley 1953): the value of a coalition S of instances is the target-class
probability (``ModelHandle.probabilities``) of the tile rendered with only the instances of S present
(every other instance removed; noise and haze fixed, so renders differ only under removed instances).
Share_i = sum over S not holding i of |S|! (n-|S|-1)! / n! (v(S + i) - v(S)). Shares sum to the total
change v(all) - v(none) (efficiency), so two redundant instances that each suffice share the change
instead of both looking unused, as one-at-a-time removal would make them.

- Up to ``EXACT_MAX_INSTANCES`` (6) instances a tile's shares are exact: all 2^n coalition twins are
  rendered (at most 64 renders). Above, shares are estimated from ``SAMPLED_PERMUTATIONS`` (64) random
  orders drawn from ``[seed, tile, 4241]`` (Strumbelj & Kononenko 2014, permutation sampling); each order
  adds the instances one by one, so efficiency still holds exactly.
- ``drop`` (kept in ``instance_table``) is the one-at-a-time drop v(all) - v(all - i).
- **Evidence map** of a tile: ``sum_i max(share_i, 0) * coverage_i`` (float32, H x W).
- **Verified instances** of a tile: those whose share is clearly positive, at least ``VERIFIED_MIN_DROP``
  (0.02) and at least ``VERIFIED_REL_DROP`` (10%) of the tile's largest share. ``verified_masks`` marks
  their pixels with any coverage; ``verified_coverage`` holds the coverage (max over verified instances),
  from which the metrics take the core (coverage >= ``CORE_THRESHOLD``) and the void fringe.
- ``unverified_table()`` says for every tile without verified evidence why (no instance, the instances do
  not move the score, the change is spread thinly over many instances, or it goes against the target).
- **Interventional importance** of a structure type: the mean drop when *all* instances of the type are
  removed at once, over the tiles that hold the type, with a 95% bootstrap percentile interval
  (``scipy.stats.bootstrap``; Efron & Tibshirani 1993). For tiles rendered with the spurious cue, the
  same with the cue switched off (kind ``"cue"``).
- **Type roles** (:func:`type_roles`): ``relied-on``, ``relied-on look-alike`` (a look-alike the model
  verifiably relies on is evidence, not a false alarm) and ``unused`` (the only types that can be false
  alarms).

All renders go through the model in batches.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from itertools import permutations
from math import factorial
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from xbench.errors import XbenchInputError
from xbench.models.base import ModelHandle
from xbench.stats import bootstrap_ci as bootstrap_interval

if TYPE_CHECKING:
    from xbench.scenes.render import Scene

VERIFIED_MIN_DROP = 0.02
VERIFIED_REL_DROP = 0.10
CORE_THRESHOLD = 0.5  # coverage at or above: the structure's core; below (and > 0): its fringe
EXACT_MAX_INSTANCES = 6  # exact Shapley shares up to this many instances per tile (2^6 = 64 renders)
SAMPLED_PERMUTATIONS = 64
CUE_KIND = "cue"
ROLES = ("relied-on", "relied-on look-alike", "unused")

UNVERIFIED_REASONS = {
    "no-instance": "the tile holds no planted instance",
    "no-change": "removing every instance changes the target score by less than the minimum share "
    "(the model does not use them here)",
    "against-target": "the instances lower the target score (they are counter-evidence here)",
    "spread": "the score change is spread over instances of which none has a clearly positive share",
}


@dataclass
class Reliance:
    """What a model relies on, per instance, per pixel and per structure type (see module docstring)."""

    instance_table: pd.DataFrame  # tile, instance_id, kind, human, drop, share, verified, coverage_px
    evidence: np.ndarray  # float32 (N, H, W)
    verified_masks: np.ndarray  # bool (N, H, W): pixels with any coverage of a verified instance
    type_table: pd.DataFrame  # kind, mean_drop, ci_low, ci_high, n
    scores: np.ndarray = field(default_factory=lambda: np.zeros(0))  # (N,) target score of each tile
    targets: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    type_drops: dict[str, np.ndarray] = field(default_factory=dict)  # kind -> per-tile drops (n,)
    verified_coverage: np.ndarray | None = None  # float32 (N, H, W): coverage of verified instances
    tile_table: pd.DataFrame | None = None  # tile, instances, exact, total_change, largest_share, verified, reason

    def relied_types(self, min_drop: float = 0.02) -> list[str]:
        """Types (or ``"cue"``) whose interval lies above zero and whose mean drop is >= ``min_drop``."""
        t = self.type_table
        keep = (t["ci_low"] > 0) & (t["mean_drop"] >= min_drop)
        return [str(k) for k in t.loc[keep, "kind"]]

    def drop_of(self, kind: str) -> float:
        """Mean drop of a type (NaN if no tile holds it)."""
        row = self.type_table[self.type_table["kind"] == kind]
        return float(row["mean_drop"].iloc[0]) if len(row) else float("nan")

    def unverified_table(self) -> pd.DataFrame:
        """Tiles without verified evidence, with the reason key and its text, and the share of such tiles
        (``attrs['fraction']``)."""
        t = self.tile_table
        if t is None:
            return pd.DataFrame(columns=["tile", "reason", "why"])
        out = t.loc[t["verified"] == 0, ["tile", "reason"]].copy()
        out["why"] = [UNVERIFIED_REASONS.get(str(r), str(r)) for r in out["reason"]]
        out.attrs["fraction"] = float(len(out) / len(t)) if len(t) else float("nan")
        return out.reset_index(drop=True)


def unverified_summary(reliance: Reliance) -> str:
    """One line for notes and reports: how many tiles have no verified evidence, and why."""
    table = reliance.unverified_table()
    total = 0 if reliance.tile_table is None else len(reliance.tile_table)
    if table.empty:
        return f"every one of {total} tiles has verified evidence"
    counts = table["reason"].value_counts()
    why = "; ".join(f"{int(n)}: {UNVERIFIED_REASONS.get(str(r), str(r))}" for r, n in counts.items())
    return f"{len(table)} of {total} tiles ({table.attrs['fraction']:.0%}) have no verified evidence ({why})"


def type_roles(relied: Sequence[str], lookalikes: Sequence[str], types: Sequence[str]) -> dict[str, str]:
    """Role of each structure type from measured reliance: ``relied-on`` (relied on, not a look-alike),
    ``relied-on look-alike`` (a look-alike the model verifiably relies on: evidence, never a false alarm)
    or ``unused`` (not relied on; only these types can be false alarms). ``relied`` is typically
    ``Reliance.relied_types()``; the cue is not a structure type and is ignored."""
    relied_set, look = set(relied) - {CUE_KIND}, set(lookalikes)
    roles = {}
    for t in types:
        if t in relied_set:
            roles[str(t)] = "relied-on look-alike" if t in look else "relied-on"
        else:
            roles[str(t)] = "unused"
    return roles


@dataclass
class _Render:
    tile: int
    what: str  # "coalition" | "type" | "cue"
    key: Any  # coalition bit mask, type name or None
    omit: tuple[int, ...]
    cue: bool | None  # None = the scene's own cue; False = cue removed


def shapley_weights(n: int) -> np.ndarray:
    """|S|! (n - |S| - 1)! / n! for |S| = 0..n-1 (Shapley 1953)."""
    return np.array([factorial(k) * factorial(n - k - 1) / factorial(n) for k in range(n)], dtype=np.float64)


def exact_shapley(values: np.ndarray) -> np.ndarray:
    """Exact Shapley values of n players from a coalition value table ``values`` (2^n,), indexed by bit
    mask (bit i set = player i present). Shares sum to values[-1] - values[0] (efficiency)."""
    values = np.asarray(values, dtype=np.float64)
    n = int(round(np.log2(values.size)))
    if values.size != 2**n:
        raise ValueError(f"coalition table has {values.size} entries, not a power of two")
    w = shapley_weights(n) if n else np.zeros(0)
    masks = np.arange(values.size)
    sizes = np.array([bin(m).count("1") for m in masks])
    out = np.zeros(n)
    for i in range(n):
        bit = 1 << i
        without = masks[(masks & bit) == 0]
        out[i] = float((w[sizes[without]] * (values[without | bit] - values[without])).sum())
    return out


def _permutations(n: int, seed: int, tile: int) -> list[tuple[int, ...]]:
    if n <= 5:  # few enough orders to take them all (then the estimate is exact)
        return list(permutations(range(n)))
    rng = np.random.default_rng([int(seed), int(tile), 4241])
    return [tuple(int(i) for i in rng.permutation(n)) for _ in range(SAMPLED_PERMUTATIONS)]


def _coalitions(n: int, orders: list[tuple[int, ...]] | None) -> list[int]:
    """Bit masks whose value the shares need: all 2^n (exact), or every prefix of the sampled orders plus
    the one-at-a-time removals."""
    full = (1 << n) - 1
    if orders is None:
        return list(range(1 << n))
    need = {0, full} | {full & ~(1 << i) for i in range(n)}
    for order in orders:
        mask = 0
        for i in order:
            mask |= 1 << i
            need.add(mask)
    return sorted(need)


def _plan(
    scenes: Sequence[Any], cue_tiles: np.ndarray, seed: int
) -> tuple[list[_Render], list[list[tuple[int, ...]] | None]]:
    plan: list[_Render] = []
    orders_of: list[list[tuple[int, ...]] | None] = []
    for t, scene in enumerate(scenes):
        ids = [int(inst.instance_id) for inst in scene.instances]
        n = len(ids)
        orders = None if n <= EXACT_MAX_INSTANCES else _permutations(n, seed, t)
        orders_of.append(orders)
        for mask in _coalitions(n, orders):
            omit = tuple(ids[i] for i in range(n) if not mask & (1 << i))
            plan.append(_Render(t, "coalition", mask, omit, None))
        by_kind: dict[str, list[int]] = {}
        for inst in scene.instances:
            by_kind.setdefault(str(inst.kind), []).append(int(inst.instance_id))
        for kind, kind_ids in sorted(by_kind.items()):
            plan.append(_Render(t, "type", kind, tuple(kind_ids), None))
        if cue_tiles[t] and scene_has_cue(scene):
            plan.append(_Render(t, "cue", CUE_KIND, (), False))
    return plan, orders_of


def scene_has_cue(scene: Scene) -> bool:
    """Whether a scene is rendered with a spurious cue switched on."""
    return bool(getattr(scene, "cue_on", False)) and getattr(scene, "cue", None) is not None


def _batches(plan: list[_Render], scenes: Sequence[Scene], batch_size: int) -> Iterator[np.ndarray]:
    from xbench.scenes import render  # earlier stage

    for start in range(0, len(plan), batch_size):
        chunk = plan[start : start + batch_size]
        yield np.stack([render(scenes[r.tile], omit=r.omit, cue=r.cue) for r in chunk]).astype(np.float32)


def _shares(n: int, value: dict[int, float], orders: list[tuple[int, ...]] | None) -> np.ndarray:
    if orders is None:
        return exact_shapley(np.array([value[m] for m in range(1 << n)]))
    out = np.zeros(n)
    for order in orders:
        mask = 0
        for i in order:
            out[i] += value[mask | (1 << i)] - value[mask]
            mask |= 1 << i
    return out / len(orders)


def _unverified_reason(n: int, total: float, largest: float) -> str:
    if n == 0:
        return "no-instance"
    if abs(total) < VERIFIED_MIN_DROP and largest < VERIFIED_MIN_DROP:
        return "no-change"
    if total < 0 and largest < VERIFIED_MIN_DROP:
        return "against-target"
    return "spread"


def compute_reliance(
    model: ModelHandle,
    scenes: list[Scene],
    targets: np.ndarray,
    *,
    seed: int = 0,
    batch_size: int = 128,
    n_boot: int = 1000,
    cue_classes: Sequence[int] | None = None,
) -> Reliance:
    """Shapley shares per instance, evidence maps, verified masks and coverage, per-type importance
    (see module docstring; Shapley 1953, Strumbelj & Kononenko 2014).

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
    plan, orders_of = _plan(scenes, cue_tiles, seed)
    scores = np.empty(len(plan), dtype=np.float64)
    pos = 0
    h = w = 0
    for batch in _batches(plan, scenes, batch_size):
        h, w = batch.shape[2:]
        probs = model.probabilities(batch)
        idx = np.arange(pos, pos + len(batch))
        scores[idx] = probs[np.arange(len(batch)), targets[[plan[i].tile for i in idx]]]
        pos += len(batch)

    value: list[dict[int, float]] = [{} for _ in scenes]
    type_drops: dict[str, list[float]] = {}
    for r, s in zip(plan, scores, strict=True):
        if r.what == "coalition":
            value[r.tile][int(r.key)] = float(s)
    base = np.array([v[(1 << len(sc.instances)) - 1] for v, sc in zip(value, scenes, strict=True)])
    for r, s in zip(plan, scores, strict=True):
        if r.what in ("type", "cue"):
            type_drops.setdefault(str(r.key), []).append(base[r.tile] - s)

    evidence = np.zeros((len(scenes), h, w), dtype=np.float64)
    verified = np.zeros((len(scenes), h, w), dtype=bool)
    verified_cov = np.zeros((len(scenes), h, w), dtype=np.float32)
    rows: list[dict[str, Any]] = []
    tile_rows: list[dict[str, Any]] = []
    for t, scene in enumerate(scenes):
        n = len(scene.instances)
        full = (1 << n) - 1
        shares = _shares(n, value[t], orders_of[t]) if n else np.zeros(0)
        largest = float(shares.max()) if n else 0.0
        threshold = max(VERIFIED_MIN_DROP, VERIFIED_REL_DROP * largest)
        keep = shares >= threshold
        for i, inst in enumerate(scene.instances):
            cov = np.asarray(inst.coverage, dtype=np.float64)
            evidence[t] += max(float(shares[i]), 0.0) * cov
            if keep[i]:
                verified[t] |= cov > 0
                verified_cov[t] = np.maximum(verified_cov[t], cov.astype(np.float32))
            rows.append(
                {
                    "tile": t,
                    "instance_id": int(inst.instance_id),
                    "kind": str(inst.kind),
                    "human": bool(inst.human),
                    "drop": value[t][full] - value[t][full & ~(1 << i)],
                    "share": float(shares[i]),
                    "verified": bool(keep[i]),
                    "coverage_px": float(cov.sum()),
                }
            )
        total = value[t][full] - value[t][0]
        n_verified = int(keep.sum())
        tile_rows.append(
            {
                "tile": t,
                "instances": n,
                "exact": orders_of[t] is None or n <= 5,
                "total_change": float(total),
                "largest_share": largest,
                "verified": n_verified,
                "reason": "" if n_verified else _unverified_reason(n, float(total), largest),
            }
        )
    columns = ["tile", "instance_id", "kind", "human", "drop", "share", "verified", "coverage_px"]
    instance_table = pd.DataFrame(rows, columns=columns)
    if len(instance_table):
        instance_table = instance_table.astype(
            {"tile": np.int64, "instance_id": np.int64, "human": bool, "verified": bool}
        )

    rng = np.random.default_rng(seed)
    type_rows = []
    for kind in sorted(type_drops, key=lambda k: (k == CUE_KIND, k)):
        v = np.asarray(type_drops[kind])
        interval = bootstrap_interval(v, 0.95, n_boot, method="percentile", seed=rng, min_n=2)
        lo, hi = interval.low, interval.high
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
        verified_coverage=verified_cov,
        tile_table=pd.DataFrame(
            tile_rows, columns=["tile", "instances", "exact", "total_change", "largest_share", "verified", "reason"]
        ),
    )
