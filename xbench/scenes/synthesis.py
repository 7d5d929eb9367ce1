"""Sampling scenes and synthesising tile packs.

Seeds: tile ``i`` of ``synthesize(..., seed)`` gets its own scene seed derived from (seed, i), so the
first tiles of a longer run equal those of a shorter one. Inside a scene, the landscape fields, the
sensor noise, the cue position and each structure type draw from separate child streams, so changing one
type's presence leaves the landscape and the other types' instances as they were.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from xbench.data import TilePack
from xbench.errors import XbenchInputError
from xbench.scenes.geometry import Patch
from xbench.scenes.labels import (
    ALL_TYPES,
    HUMAN_TYPES,
    Cue,
    LabelRule,
    default_label_rule,
    parse_cue,
    parse_label_rule,
)
from xbench.scenes.recipes import Recipe, load_recipe, recipe_dir
from xbench.scenes.render import (
    STREAM_TYPES,
    Instance,
    Scene,
    background_fields,
    build_fields,
    build_fields_batch,
    render,
    scene_rng,
)
from xbench.scenes.structures import LAYERS, PLANTERS, Context

FIELD_BATCH = 8


def check_presence(presence: Any, where: str = "presence") -> dict[str, float] | None:
    if presence is None:
        return None
    if not isinstance(presence, dict):
        raise XbenchInputError(where, "must be a table of structure type = probability", found=presence)
    out = {}
    for k, v in presence.items():
        if k not in ALL_TYPES:
            raise XbenchInputError(f"{where}.{k}", "unknown structure type", expected=", ".join(ALL_TYPES), found=k)
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v <= 1:
            raise XbenchInputError(f"{where}.{k}", "not a probability", expected="a number in [0, 1]", found=v)
        out[k] = float(v)
    return out


def tile_seed(seed: int, index: int) -> int:
    """The scene seed of tile ``index`` of a run with ``seed`` (a 53-bit integer, JSON-safe)."""
    a, b = np.random.SeedSequence([int(seed), 0, int(index)]).generate_state(2, np.uint32)
    return int(((int(a) << 32) | int(b)) & ((1 << 53) - 1))


def sample_scene(
    recipe: Recipe | str | Path,
    size: int,
    seed: int,
    presence: dict[str, float] | None = None,
    cue: Cue | dict | None = None,
) -> Scene:
    """Sample one tile's landscape and planted structures.

    presence: probability that the tile holds each structure type (overrides the recipe's catalogue;
    0 disables a type, 1 forces at least one instance). cue: a cue spec; the scene starts with it on.
    """
    recipe = load_recipe(recipe)
    size = int(size)
    if size < 8:
        raise XbenchInputError("size", "tile size too small", expected=">= 8 pixels", found=size)
    presence = check_presence(presence)
    cue_spec = None if cue is None else parse_cue(cue, "cue")
    return _sample(recipe, size, int(seed), presence, cue_spec, build_fields(recipe, size, seed))


def _sample(
    recipe: Recipe,
    size: int,
    seed: int,
    presence: dict[str, float] | None,
    cue_spec: Cue | None,
    fields: dict[str, np.ndarray],
) -> Scene:
    ctx = Context(size, recipe, fields)
    # one presence draw per type, always all of them, so a type's presence never shifts another's
    draws = fields["presence_draws"]
    planted = []
    for kind in LAYERS:
        spec = recipe.spec(kind)
        p = spec.probability if presence is None or kind not in presence else presence[kind]
        if draws[ALL_TYPES.index(kind)] >= p:
            continue
        rng = scene_rng(seed, STREAM_TYPES + ALL_TYPES.index(kind))
        pieces = []
        for _attempt in range(6):  # a present type gets at least one instance inside the tile
            pieces = PLANTERS[kind](rng, spec, ctx)
            if pieces:
                break
        ctx.occupy(pieces)
        planted.extend(pieces)
    instances = _visible(planted, size)
    return Scene(
        recipe.name,
        size,
        int(seed),
        instances,
        cue_on=cue_spec is not None,
        cue=cue_spec,
        presence=presence,
        _recipe=recipe,
        _fields=fields,
    )


def _visible(planted: list, size: int) -> list[Instance]:
    """Visible coverage of each piece (raw times what later pieces leave open); hidden pieces dropped."""
    open_ = np.ones((size, size), dtype=np.float32)
    vis: list[Patch | None] = [None] * len(planted)
    for i in range(len(planted) - 1, -1, -1):
        raw = planted[i].raw
        sl = (slice(raw.r0, raw.r1), slice(raw.c0, raw.c1))
        v = raw.cov * open_[sl]
        open_[sl] *= 1.0 - raw.cov
        nz = np.nonzero(v)
        if nz[0].size == 0:
            continue
        r0, r1, c0, c1 = nz[0].min(), nz[0].max() + 1, nz[1].min(), nz[1].max() + 1
        vis[i] = Patch(raw.r0 + int(r0), raw.c0 + int(c0), np.ascontiguousarray(v[r0:r1, c0:c1]))
    out: list[Any] = []
    for pl, v in zip(planted, vis, strict=True):
        if v is None:
            continue
        out.append(Instance(len(out), pl.kind, pl.kind in HUMAN_TYPES, pl.params, pl.raw, v, pl.look, size))
    return out


def structure_names(
    recipe: Recipe, presence: dict[str, float] | None = None, label_rule: LabelRule | None = None
) -> list[str]:
    """Mask planes of a pack: the recipe's catalogue types plus types forced by presence or the rule."""
    names = set(recipe.types())
    if presence:
        names |= {k for k, v in presence.items() if v > 0}
    if label_rule is not None:
        names |= set(label_rule.types_used())
    return [t for t in ALL_TYPES if t in names]


def synthesize(
    recipe: Recipe | str | Path,
    count: int,
    seed: int,
    size: int = 64,
    twins: bool = False,
    presence: dict[str, float] | None = None,
    label_rule: LabelRule | dict | None = None,
    label_noise: float = 0.0,
    cue: Cue | dict | None = None,
    cue_rate: float = 0.5,
    progress: Callable[[int], None] | None = None,
    backgrounds: np.ndarray | None = None,
) -> tuple[TilePack, list[Scene]]:
    """Synthesise ``count`` tiles: a validated :class:`TilePack` and the scenes (fields released).

    Labels follow ``label_rule`` (default: the recipe's ``[labels]``, else disturbed/intact); the clean
    labels are kept in ``clean_labels``, and each label is flipped to another class with probability
    ``label_noise`` (seeded). With a ``cue``, it is switched on with probability ``cue_rate`` in tiles
    of non-default (clean) classes and ``1 - cue_rate`` in default-class tiles. ``twins`` renders every
    tile again with all instances removed and the cue off. ``progress(n)`` is called after each tile.
    ``backgrounds``: float32 (M, C, S, S) given tiles in [0, 1] with the recipe's bands; tile ``i`` is drawn
    over background ``i % M`` instead of synthesized terrain (transplant mode; ``size`` becomes S) and its
    twin is that background, bit for bit.
    """
    recipe = load_recipe(recipe)
    count, size = int(count), int(size)
    if count < 1:
        raise XbenchInputError("count", "need at least one tile", found=count)
    if not 0 <= label_noise <= 1:
        raise XbenchInputError("label_noise", "not a probability", expected="a number in [0, 1]", found=label_noise)
    if not 0 <= cue_rate <= 1:
        raise XbenchInputError("cue_rate", "not a probability", expected="a number in [0, 1]", found=cue_rate)
    presence = check_presence(presence)
    if backgrounds is not None:
        backgrounds = _check_backgrounds(backgrounds, len(recipe.bands))
        size = int(backgrounds.shape[-1])
    if label_rule is None:
        rule = recipe.labels or default_label_rule(structure_names(recipe, presence))
    else:
        rule = parse_label_rule(label_rule, "label_rule")
    cue_spec = None if cue is None else parse_cue(cue, "cue")
    names = structure_names(recipe, presence, rule)
    k, c = len(names), len(recipe.bands)

    images = np.empty((count, c, size, size), dtype=np.float32)
    twin_arr = np.empty_like(images) if twins else None
    masks = np.zeros((count, k, size, size), dtype=bool)
    coverage = np.zeros((count, k, size, size), dtype=np.float32)
    clean = np.empty(count, dtype=np.int64)
    cue_on = np.zeros(count, dtype=bool)
    cue_rng = np.random.default_rng(np.random.SeedSequence([int(seed), 2]))
    seeds = [tile_seed(seed, i) for i in range(count)]
    scenes: list[Scene] = []
    batch: list[dict[str, np.ndarray]] = []
    for i in range(count):
        if backgrounds is not None:
            bg = backgrounds[i % len(backgrounds)]
            scene = _sample(recipe, size, seeds[i], presence, cue_spec, background_fields(recipe, bg, seeds[i]))
            scene.background = bg
        else:
            if i % FIELD_BATCH == 0:  # landscape fields of many tiles at once (fewer, larger array operations)
                batch = build_fields_batch(recipe, size, seeds[i : i + FIELD_BATCH])
            scene = _sample(recipe, size, seeds[i], presence, cue_spec, batch[i % FIELD_BATCH])
        clean[i] = rule.apply(scene)
        u = cue_rng.random()
        if cue_spec is not None:
            rate = cue_rate if clean[i] != rule.default_index else 1.0 - cue_rate
            cue_on[i] = u < rate
        scene.cue_on = bool(cue_on[i])
        images[i] = render(scene)
        if twin_arr is not None:
            twin_arr[i] = render(scene, omit=scene.instance_ids(), cue=False)
        coverage[i] = scene.type_coverages(names)
        scene.release()
        scenes.append(scene)
        if progress is not None:
            progress(1)
    np.greater(coverage, 0, out=masks)
    labels = clean.copy()
    n_classes = len(rule.classes)
    if label_noise > 0:
        nrng = np.random.default_rng(np.random.SeedSequence([int(seed), 1]))
        flip = nrng.random(count) < label_noise
        shift = nrng.integers(1, n_classes, count)
        labels[flip] = (clean[flip] + shift[flip]) % n_classes
    meta = {
        "source": "xbench.scenes.synthesis",
        "recipe": recipe.name,
        "recipe_path": _recipe_source(recipe),
        "seed": int(seed),
        "size": size,
        "count": count,
        "presence": presence,
        "label_rule": rule.text,
        "label_rule_table": rule.to_dict(),
        "label_noise": float(label_noise),
        "cue": None if cue_spec is None else cue_spec.to_dict(),
        "cue_rate": float(cue_rate),
        "tile_seeds": seeds,
    }
    pack = TilePack(
        images=images,
        labels=labels,
        class_names=list(rule.classes),
        band_names=list(recipe.bands),
        masks=masks,
        mask_names=names,
        twins=twin_arr,
        clean_labels=clean,
        cue=cue_on if cue_spec is not None else None,
        coverage=coverage,
        meta=meta,
    )
    return pack, scenes


def _check_backgrounds(backgrounds: np.ndarray, n_bands: int) -> np.ndarray:
    bg = np.asarray(backgrounds)
    if bg.ndim != 4 or bg.shape[1] != n_bands or bg.shape[2] != bg.shape[3] or len(bg) == 0:
        raise XbenchInputError(
            "backgrounds", "wrong shape", expected=f"(M, {n_bands}, S, S) tiles with the recipe's bands", found=bg.shape
        )
    bg = np.ascontiguousarray(bg, dtype=np.float32)
    if not np.isfinite(bg).all() or bg.min() < 0 or bg.max() > 1:
        raise XbenchInputError("backgrounds", "reflectance out of range", expected="finite values in [0, 1]")
    return bg


def _recipe_source(recipe: Recipe) -> str | None:
    """The recipe file, or None for a shipped recipe (found again by name on any machine)."""
    path = Path(recipe.path)
    shipped = recipe_dir() / f"{recipe.name}.toml"
    if path.is_file() and shipped.is_file() and path.resolve() == shipped.resolve():
        return None
    return recipe.path


def scenes_to_json(scenes: list[Scene]) -> list[dict[str, Any]]:
    """What was planted where: one dict per tile (recipe, size, seed, cue, instances with geometry)."""
    return [dict(tile=i, **s.to_json()) for i, s in enumerate(scenes)]


def rebuild_scenes(meta: dict[str, Any], cue_flags: Any = None) -> list[Scene]:
    """The scenes of a synthetic pack again, from its ``meta`` (recipe, size, presence, cue, tile seeds).

    ``cue_flags``: the pack's ``cue`` array, to restore each scene's cue setting (else the cue is off).
    """
    try:
        source = meta.get("recipe_path")
        recipe = load_recipe(source if source and Path(source).is_file() else meta["recipe"])
        cue = meta.get("cue")
        scenes = [sample_scene(recipe, meta["size"], s, meta.get("presence"), cue) for s in meta["tile_seeds"]]
    except KeyError as exc:
        raise XbenchInputError(
            "pack meta", f"missing key {exc}", expected="a pack written by xbench.scenes.synthesize"
        ) from None
    flags = np.zeros(len(scenes), dtype=bool) if cue_flags is None else np.asarray(cue_flags, dtype=bool)
    for scene, flag in zip(scenes, flags, strict=True):
        scene.cue_on = bool(flag) and scene.cue is not None
        scene.release()
    return scenes
