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
from xbench.scenes.terrain import class_weights, fractal_field, fractal_pair, hillshade

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
    params: dict[str, Any]
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

    # -- landscape fields (cached) ------------------------------------------------------------------
    def fields(self) -> dict[str, np.ndarray]:
        if self._fields is None:
            assert self._recipe is not None
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
    rng = scene_rng(seed, STREAM_FIELDS)
    t = recipe.terrain
    elev, gstd = fractal_field(rng, size, t.beta)
    mix_f, tex_f, _ = fractal_pair(rng, size, t.texture_beta)

    c = _recipe_constants(recipe)
    # (einsum, not BLAS: no thread pool, and the same sums for every call)
    w = class_weights(elev, c["shares"], t.edge)
    if c["has_mix"].any():
        f = np.minimum(np.maximum(c["mix_share"] + np.float32(0.3) * mix_f[None], 0.0), 1.0)
        f *= c["has_mix"][:, None, None]
        bg = np.einsum("ck,khw->chw", c["s1t"], w * (1.0 - f)) + np.einsum("ck,khw->chw", c["s2t"], w * f)
    else:
        bg = np.einsum("ck,khw->chw", c["s1t"], w)
    water = c["water"]
    land = w[~water].sum(axis=0) if (~water).any() else np.zeros_like(elev)
    bright = 1.0 + t.texture * tex_f * (0.3 + 0.7 * land)
    if t.relief > 0:
        bright += t.relief * hillshade(elev, gstd) * land
    bg = (bg * np.maximum(bright, 0.2)[None]).astype(np.float32)

    # haze: a sum of broad separable waves (smooth at tile scale), mean = the recipe's haze
    u = (np.arange(size, dtype=np.float64) + 0.5) * (2 * np.pi / size)
    fy = rng.uniform(0.2, 1.0, 3)
    fx = rng.uniform(0.2, 1.0, 3)
    ph = rng.uniform(0, 2 * np.pi, (3, 2))
    wy = np.cos(fy[:, None] * u[None, :] + ph[:, :1])
    wx = np.cos(fx[:, None] * u[None, :] + ph[:, 1:])
    wave = (wy[:, :, None] * wx[:, None, :]).sum(axis=0) / 1.5
    haze = (recipe.sensor.haze * np.maximum(1.0 + 0.5 * wave, 0.0)).astype(np.float32)

    noise = sensor_noise(rng, (len(recipe.bands), size, size))
    noise *= c["sigma"]
    cy, cx = rng.uniform(0.15 * size, 0.85 * size, 2)
    presence = rng.random(len(ALL_TYPES))
    return {
        "elev": elev,
        "mix": mix_f,
        "tex": tex_f,
        "weights": w,
        "water": water,
        "land": land,
        "background": bg,
        "haze": haze,
        "noise": noise,
        "cue_centre": np.array([cx, cy]),
        "presence_draws": presence,
    }


NOISE_POOL = 1 << 21


def _recipe_constants(recipe: Recipe) -> dict[str, np.ndarray]:
    """Per-recipe arrays used by every tile (cached on the recipe object)."""
    c = recipe._cache.get("render")
    if c is None:
        lc = recipe.landcover
        c = recipe._cache["render"] = {
            "shares": np.array([x.share for x in lc], dtype=np.float64),
            "s1t": np.ascontiguousarray(np.stack([recipe.spectrum(x.material) for x in lc]).T),
            "s2t": np.ascontiguousarray(np.stack([recipe.spectrum(x.mix or x.material) for x in lc]).T),
            "has_mix": np.array([x.mix is not None and x.mix_share > 0 for x in lc]),
            "mix_share": np.array([x.mix_share for x in lc], dtype=np.float32)[:, None, None],
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
