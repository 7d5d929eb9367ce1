"""Scenes and rendering.

A :class:`Scene` holds what was sampled for one tile: the recipe, the seed and every planted
:class:`Instance` with its geometry and sub-pixel coverage. The landscape fields (elevation, textures,
background reflectance, haze, sensor noise) are a deterministic function of (recipe, size, seed); they are
cached while a scene is in use and rebuilt on demand after :meth:`Scene.release`.

Rendering composites the instances, in drawing order, over the background: ``x <- x (1 - c) + c m``
with raw coverage ``c`` and the instance's material image ``m``; then haze, the optional cue and the
sensor noise are applied, and values are clipped to [0, 1]. Every step is element-wise and the same for
every rendering, so leaving instances out (``omit``) changes only pixels they cover: elsewhere the result
is bit-identical (``x * 1 + 0 == x`` exactly in floating point).

``Instance.coverage`` is the *visible* area fraction: the raw coverage times what later instances leave
uncovered (a building on a clearing hides that part of the clearing). Visible coverages of all instances
add up to at most 1 in every pixel, and omitting an instance changes exactly the pixels where its visible
coverage is above zero.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

import numpy as np

from xbench.scenes.geometry import Patch
from xbench.scenes.labels import ALL_TYPES, Cue
from xbench.scenes.materials import BAND_INDEX, HAZE_SHAPE
from xbench.scenes.recipes import Recipe
from xbench.scenes.terrain import (
    class_weights,
    field_from_white,
    hillshade,
    pair_from_white,
    white_field,
    white_pair,
)

# independent random streams of a scene's seed: the landscape (fields, noise offset, cue position and
# the presence draws, always drawn in full and in this order) and one stream per structure type
STREAM_FIELDS = 0
STREAM_TYPES = 10  # + index of the type in ALL_TYPES

HAZE_ATTENUATION = 0.3


def scene_rng(seed: int, stream: int) -> np.random.Generator:
    """The generator of one stream of a scene (streams never share draws)."""
    return np.random.default_rng([int(seed), int(stream)])


@dataclass
class Instance:
    """One planted structure.

    instance_id: unique within the scene (drawing order). kind: structure type. human: planted by people
    (False for look-alikes). params: JSON-serialisable geometry. coverage: float32 (H, W) visible area
    fraction in [0, 1] (see module docstring).
    """

    instance_id: int
    kind: str
    human: bool
    params: dict[str, Any] = field(repr=False)
    raw: Patch = field(repr=False)
    visible: Patch = field(repr=False)
    look: dict[str, Any] = field(repr=False)
    size: int = 64

    @property
    def coverage(self) -> np.ndarray:
        return self.visible.full(self.size, self.size)

    @property
    def bbox(self) -> tuple[int, int, int, int]:
        """(row0, row1, col0, col1) of the visible coverage crop."""
        v = self.visible
        return v.r0, v.r1, v.c0, v.c1

    def area_px(self) -> float:
        return self.visible.area()

    def to_json(self) -> dict[str, Any]:
        return {
            "instance_id": self.instance_id,
            "kind": self.kind,
            "human": self.human,
            "area_px": round(self.area_px(), 4),
            "bbox": list(self.bbox),
            "params": self.params,
        }


@dataclass
class Scene:
    """A sampled tile: recipe name, size, seed, planted instances and the cue setting."""

    recipe: str
    size: int
    seed: int
    instances: list[Instance]
    cue_on: bool = False
    cue: Cue | None = None
    presence: dict[str, float] | None = None
    _recipe: Recipe | None = field(default=None, repr=False)
    _fields: dict[str, np.ndarray] | None = field(default=None, repr=False)
    background: np.ndarray | None = field(default=None, repr=False)  # a given (real) tile, else synthesized

    # -- landscape fields (cached) ------------------------------------------------------------------
    def fields(self) -> dict[str, np.ndarray]:
        if self._fields is None:
            assert self._recipe is not None
            if self.background is not None:
                self._fields = background_fields(self._recipe, self.background, self.seed)
            else:
                self._fields = build_fields(self._recipe, self.size, self.seed)
        return self._fields

    def release(self) -> None:
        """Drop the cached fields (they are rebuilt, identical, when needed again)."""
        self._fields = None

    # -- structure coverage -------------------------------------------------------------------------
    def type_coverage(self, kinds: Iterable[str]) -> np.ndarray:
        """Visible coverage (H, W) float32 of the union of instances of the given types."""
        kinds = set([kinds] if isinstance(kinds, str) else kinds)
        out = np.zeros((self.size, self.size), dtype=np.float32)
        for inst in self.instances:
            if inst.kind in kinds:
                v = inst.visible
                out[v.r0 : v.r1, v.c0 : v.c1] += v.cov
        np.minimum(out, 1.0, out=out)
        return out

    def type_masks(self, names: Iterable[str]) -> np.ndarray:
        """Boolean (K, H, W): where each named type's visible coverage is above zero."""
        names = list(names)
        out = np.zeros((len(names), self.size, self.size), dtype=bool)
        index = {n: i for i, n in enumerate(names)}
        for inst in self.instances:
            k = index.get(inst.kind)
            if k is not None:
                v = inst.visible
                out[k, v.r0 : v.r1, v.c0 : v.c1] |= v.cov > 0
        return out

    def type_coverages(self, names: Iterable[str]) -> np.ndarray:
        """float32 (K, H, W) visible coverage per named type."""
        names = list(names)
        out = np.zeros((len(names), self.size, self.size), dtype=np.float32)
        index = {n: i for i, n in enumerate(names)}
        for inst in self.instances:
            k = index.get(inst.kind)
            if k is not None:
                v = inst.visible
                out[k, v.r0 : v.r1, v.c0 : v.c1] += v.cov
        np.minimum(out, 1.0, out=out)
        return out

    def instance_ids(self, kinds: Iterable[str] | None = None) -> list[int]:
        kinds = None if kinds is None else set(kinds)
        return [i.instance_id for i in self.instances if kinds is None or i.kind in kinds]

    def render(self, omit: Iterable[int] = (), cue: bool | None = None) -> np.ndarray:
        return render(self, omit=omit, cue=cue)

    def __repr__(self) -> str:
        kinds = ", ".join(f"{i.instance_id}:{i.kind}" for i in self.instances)
        return (
            f"Scene(recipe={self.recipe!r}, size={self.size}, seed={self.seed}, cue_on={self.cue_on}, "
            f"instances=[{kinds}])"
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "recipe": self.recipe,
            "size": self.size,
            "seed": self.seed,
            "cue_on": self.cue_on,
            "cue": None if self.cue is None else self.cue.to_dict(),
            "instances": [i.to_json() for i in self.instances],
        }


# ----------------------------------------------------------------------------------------------------
# landscape fields


def build_fields(recipe: Recipe, size: int, seed: int) -> dict[str, np.ndarray]:
    """Elevation, textures, land-cover weights, background reflectance, haze, cue centre and noise."""
    return build_fields_batch(recipe, size, [seed])[0]


def build_fields_batch(recipe: Recipe, size: int, seeds: list[int]) -> list[dict[str, np.ndarray]]:
    """:func:`build_fields` of many tiles at once (the same values: random draws are per tile, the
    arithmetic is element-wise, in the same order, whatever the batch)."""
    t = recipe.terrain
    c = _recipe_constants(recipe)
    b = len(seeds)
    ze, zt, hz, noise, draws = [], [], [], [], []
    for seed in seeds:
        rng = scene_rng(seed, STREAM_FIELDS)
        ze.append(white_field(rng, size))
        zt.append(white_pair(rng, size, pad=False))
        hz.append(rng.uniform(0.2, 1.0, 6).tolist() + rng.uniform(0, 2 * np.pi, 6).tolist())
        noise.append(sensor_noise(rng, (len(recipe.bands), size, size)))
        draws.append(rng.random(2 + len(ALL_TYPES)))
    elev, gstd = field_from_white(np.stack(ze), size, t.beta)
    mix_f, tex_f, _ = pair_from_white(np.stack(zt), size, t.texture_beta)

    # land cover: weights (K, B, H, W); background = sum over classes of weight x material, plus, for
    # classes with a second material, weight x mix fraction x (second - first). The sum is one einsum
    # per tile on contiguous arrays of the same shape for every batch, so batching never changes it.
    w = class_weights(elev, c["shares"], t.edge)
    mixed = np.flatnonzero(c["has_mix"])
    nk = len(c["s1"])
    coef = np.concatenate([c["s1"], (c["s2"] - c["s1"])[mixed]])  # (K + M, C)
    parts = np.empty((b, nk + len(mixed), size, size), dtype=np.float32)
    parts[:, :nk] = w.transpose(1, 0, 2, 3)
    for j, k in enumerate(mixed):
        f = np.float32(0.3) * mix_f
        f += c["mix_share"][k]
        np.minimum(np.maximum(f, 0.0, out=f), 1.0, out=f)
        np.multiply(f, w[k], out=parts[:, nk + j])
    bg = np.empty((b, len(recipe.bands), size, size), dtype=np.float32)
    for i in range(b):
        np.einsum("kc,khw->chw", coef, parts[i], out=bg[i])
    land = np.zeros_like(elev)
    for cls in range(nk):
        if not c["water"][cls]:
            land += w[cls]
    bright = np.float32(t.texture) * tex_f * (np.float32(0.3) + np.float32(0.7) * land)
    bright += np.float32(1.0)
    if t.relief > 0:
        bright += np.float32(t.relief) * hillshade(elev, gstd) * land
    bg *= np.maximum(bright, np.float32(0.2))[:, None]

    # haze: a sum of broad separable waves (smooth at tile scale), mean = the recipe's haze
    hz_a = np.array(hz)
    u = (np.arange(size, dtype=np.float64) + 0.5) * (2 * np.pi / size)
    wy = np.cos(hz_a[:, 0:3, None] * u + hz_a[:, 6:9, None])  # (B, 3, H)
    wx = np.cos(hz_a[:, 3:6, None] * u + hz_a[:, 9:12, None])  # (B, 3, W)
    wave = wy[:, 0, :, None] * wx[:, 0, None, :]
    wave += wy[:, 1, :, None] * wx[:, 1, None, :]
    wave += wy[:, 2, :, None] * wx[:, 2, None, :]
    haze = (recipe.sensor.haze * np.maximum(1.0 + wave / 3.0, 0.0)).astype(np.float32)

    noise_a = np.stack(noise)
    noise_a *= c["sigma"]
    size_f = float(size)
    out = []
    for i in range(b):
        d = draws[i]
        out.append(
            {
                "elev": elev[i],
                "mix": mix_f[i],
                "tex": tex_f[i],
                "weights": w[:, i],
                "water": c["water"],
                "land": land[i],
                "background": bg[i],
                "haze": haze[i],
                "noise": noise_a[i],
                "cue_centre": np.array([(0.15 + 0.7 * d[0]) * size_f, (0.15 + 0.7 * d[1]) * size_f]),
                "presence_draws": d[2:],
            }
        )
    return out


def background_fields(recipe: Recipe, background: np.ndarray, seed: int) -> dict[str, np.ndarray]:
    """Fields of a scene drawn over a given tile ``background`` (C, H, W) in [0, 1], bands as the recipe's.

    The given tile replaces the synthesized reflectance and already holds its own atmosphere and sensor
    noise, so haze and noise are zero: rendering with every instance omitted returns the tile bit for bit.
    ``land`` (where clearings may lie and roads avoid) is read from the tile's NDVI (water is below 0,
    Rouse et al. 1974); textures, the elevation used for placement, the cue centre and the presence draws
    come from the synthetic fields of the same seed, so the random streams are those of a synthetic tile.
    """
    bg = np.ascontiguousarray(background, dtype=np.float32)
    size = int(bg.shape[-1])
    out = dict(build_fields(recipe, size, seed))
    red, nir = bg[BAND_INDEX["red"]], bg[BAND_INDEX["nir"]]
    ndvi = (nir - red) / np.maximum(nir + red, np.float32(1e-6))
    out["land"] = np.clip(ndvi * np.float32(10.0) + np.float32(0.5), 0.0, 1.0).astype(np.float32)
    out["background"] = bg
    out["haze"] = np.zeros((size, size), dtype=np.float32)
    out["noise"] = np.zeros_like(bg)
    return out


NOISE_POOL = 1 << 21


def _recipe_constants(recipe: Recipe) -> dict[str, np.ndarray]:
    """Per-recipe arrays used by every tile (cached on the recipe object)."""
    c = recipe._cache.get("render")
    if c is None:
        lc = recipe.landcover
        c = recipe._cache["render"] = {
            "shares": np.array([x.share for x in lc], dtype=np.float64),
            "s1": np.stack([recipe.spectrum(x.material) for x in lc]),
            "s2": np.stack([recipe.spectrum(x.mix or x.material) for x in lc]),
            "has_mix": np.array([x.mix is not None and x.mix_share > 0 for x in lc]),
            "mix_share": np.array([x.mix_share for x in lc], dtype=np.float32),
            "water": np.array([recipe.materials[x.material].kind == "water" for x in lc]),
            "sigma": np.asarray(recipe.sensor.noise_sigma, dtype=np.float32)[:, None, None],
        }
    return c


@lru_cache(maxsize=1)
def _noise_pool() -> np.ndarray:
    return np.random.default_rng(20240611).standard_normal(NOISE_POOL, dtype=np.float32)


def sensor_noise(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    """Standard normal deviates for one tile: a window of a fixed pool of normal deviates starting at a
    random offset (drawing ~25k fresh deviates per tile would take a fifth of the time budget). Values
    are Gaussian and white within a tile; windows of different tiles start at unrelated offsets."""
    need = int(np.prod(shape))
    if need > NOISE_POOL // 4:
        return rng.standard_normal(shape, dtype=np.float32)
    start = int(rng.integers(0, NOISE_POOL - need))
    return _noise_pool()[start : start + need].reshape(shape).copy()


@lru_cache(maxsize=8)
def _grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    yy, xx = np.mgrid[0:size, 0:size].astype(np.float32) + np.float32(0.5)
    return yy, xx


def paint(inst: Instance, fields: dict[str, np.ndarray], texture: float) -> np.ndarray:
    """Material image (C, h, w) of an instance over its raw-coverage crop."""
    p = inst.raw
    look = inst.look
    s1 = look["s1"][:, None, None]
    mix = look.get("mix")
    tex = fields["tex"][p.r0 : p.r1, p.c0 : p.c1]
    if mix is None:
        img = s1 * (1.0 + 0.5 * texture * tex)[None]
        return img
    s2 = look["s2"][:, None, None]
    if mix[0] == "field":
        f = np.minimum(np.maximum(mix[1] + mix[2] * fields["mix"][p.r0 : p.r1, p.c0 : p.c1], 0.0), 1.0)
    else:  # rows: ("rows", angle, period, amplitude, phase)
        _, angle, period, amp, phase = mix
        yy, xx = _grid(inst.size)
        yy, xx = yy[p.r0 : p.r1, p.c0 : p.c1], xx[p.r0 : p.r1, p.c0 : p.c1]
        proj = -xx * np.sin(angle) + yy * np.cos(angle)
        f = amp * (0.5 + 0.5 * np.sin(2 * np.pi * proj / period + phase))
    img = s1 * (1.0 - f)[None] + s2 * f[None]
    return img * (1.0 + 0.5 * texture * tex)[None]


def render(scene: Scene, omit: Iterable[int] = (), cue: bool | None = None) -> np.ndarray:
    """Reflectance (C, H, W) float32 in [0, 1]; ``omit`` instance ids left out; ``cue`` None = scene's."""
    fields = scene.fields()
    recipe = scene._recipe
    assert recipe is not None
    omit = set(int(i) for i in omit)
    img = fields["background"].copy()
    texture = recipe.terrain.texture
    for inst in scene.instances:
        if inst.instance_id in omit:
            continue
        p = inst.raw
        region = img[:, p.r0 : p.r1, p.c0 : p.c1]
        c = p.cov[None]
        region *= 1.0 - c
        region += c * paint(inst, fields, texture)
    haze = fields["haze"][None]
    img *= 1.0 - HAZE_ATTENUATION * haze
    img += haze * HAZE_SHAPE[:, None, None]
    cue_on = scene.cue_on if cue is None else bool(cue)
    if cue_on and scene.cue is not None:
        apply_cue(img, scene.cue, fields["cue_centre"])
    img += fields["noise"]
    np.minimum(img, 1.0, out=img)
    np.maximum(img, 0.0, out=img)
    return img


def apply_cue(img: np.ndarray, cue: Cue, centre: np.ndarray) -> None:
    if cue.kind == "band-offset":
        img[BAND_INDEX[cue.band]] += cue.strength
    else:
        yy, xx = _grid(img.shape[-1])
        d2 = (xx - centre[0]) ** 2 + (yy - centre[1]) ** 2
        blob = np.exp(-0.5 * d2 / cue.radius**2).astype(np.float32)
        img += cue.strength * blob[None] * HAZE_SHAPE[:, None, None]
