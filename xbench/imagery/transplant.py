"""Transplant mode: the synthesizer's structures planted into a user's real background tiles.

Each real tile is the background of one scene (``xbench.scenes.synthesize(..., backgrounds=...)``): the
structures are drawn by the same geometry and renderer as on synthetic terrain, as sub-pixel coverage
blended over the tile, with no haze or noise added (the tile has its own). The tile with every instance
omitted is the real tile itself, bit for bit, so it is the exact twin, and per-instance twins, reliance,
concept sets and labels (the task's label rule) work as on synthetic tiles.

Materials follow the scene where a real structure would show the scene's own surface: a clearing shows
the scene's exposed soil and slash (its median spectrum over low-NDVI land pixels, NDVI 0.05-0.3), a natural
gap's remnant canopy and the matrix are the scene's dense vegetation (NDVI 0.6-0.9), a river is the scene's
open water (NDVI < 0). When the scene holds too few such pixels, or their median spectrum falls outside the
class's NDVI range of the trade (Rouse et al. 1974; common practice), the library material is kept. Roads,
buildings, corridors and outcrops keep the recipe's materials (gravel, asphalt, roofs, rock): their surfaces
are made, not taken from the surroundings.

Limits: a transplanted road is not a real road (no ditches, verges, shadows or the canopy gap around it);
a model trained on real data may treat it differently from the roads it learned, which the reliance table
shows (a type with reliance near 0 is one the model does not respond to).
"""

from __future__ import annotations

import copy
import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np

from xbench.data import TilePack
from xbench.errors import XbenchInputError
from xbench.scenes import BANDS, Material, Recipe, Scene, load_recipe, ndvi, synthesize
from xbench.scenes.labels import LabelRule

# scene material -> (NDVI range of the trade, material kind); Rouse et al. 1974, common practice
PALETTE_RANGES: dict[str, tuple[float, float, str]] = {
    "scene-soil": (0.05, 0.30, "soil"),
    "scene-vegetation": (0.60, 0.90, "vegetation"),
    "scene-water": (-1.0, 0.0, "water"),
}
# which structure-type material each scene material stands in for
PALETTE_USES = {"scene-soil": ("clearing", "material"), "scene-water": ("river", "material")}
MIN_PIXELS = 16  # fewer matching pixels than this: keep the library material
SOIL_SWIR1 = 0.15  # bare soil, slash and gravel reflect 0.2-0.3 in swir1 (common practice)
CLEAR_BLUE = 0.12  # brighter blue than this is cloud or haze, never taken as a surface


@dataclass
class Palette:
    """Spectra (float32 (C,)) taken from the scene, by scene material name, with the pixel counts."""

    spectra: dict[str, np.ndarray]
    pixels: dict[str, int]

    def to_dict(self) -> dict[str, Any]:
        return {
            name: {
                "reflectance": None if name not in self.spectra else [round(float(v), 5) for v in self.spectra[name]],
                "pixels": int(self.pixels.get(name, 0)),
                "ndvi": None if name not in self.spectra else round(float(ndvi(self.spectra[name])), 4),
            }
            for name in PALETTE_RANGES
        }


def scene_palette(images: np.ndarray, band_names: list[str] | tuple[str, ...]) -> Palette:
    """Median spectra of the scene's own low-NDVI land (soil), dense vegetation and open water pixels.

    images: float32 (N, C, H, W) reflectance tiles of the scene with the default six bands. A material is
    left out (the library one is used) when fewer than ``MIN_PIXELS`` pixels match or when the median
    spectrum's NDVI leaves the class's range.
    """
    if tuple(band_names) != tuple(BANDS):
        raise XbenchInputError(
            "backgrounds", "bands differ from the recipe's", expected=", ".join(BANDS), found=band_names
        )
    px = np.moveaxis(np.asarray(images, dtype=np.float32), 1, 0).reshape(len(BANDS), -1)  # (C, P)
    v = ndvi(px)
    clear = (px[0] < CLEAR_BLUE) & (px.max(axis=0) < 0.6)
    spectra: dict[str, np.ndarray] = {}
    pixels: dict[str, int] = {}
    for name, (lo, hi, _kind) in PALETTE_RANGES.items():
        sel = clear & (v > lo) & (v < hi)
        if name == "scene-soil":  # exposed soil and slash are bright in swir1; mixed shore pixels are not
            sel &= px[4] > SOIL_SWIR1
        pixels[name] = int(sel.sum())
        if pixels[name] < MIN_PIXELS:
            continue
        spec = np.median(px[:, sel], axis=1).astype(np.float32)
        if lo < float(ndvi(spec)) < hi:
            spectra[name] = spec
    return Palette(spectra, pixels)


def transplant_recipe(recipe: Recipe | str, palette: Palette) -> Recipe:
    """A copy of the recipe whose clearings, rivers and vegetation matrix use the scene's own spectra."""
    base = load_recipe(recipe)
    out = copy.copy(base)
    out.materials = dict(base.materials)
    out.structures = {k: copy.copy(v) for k, v in base.structures.items()}
    out._spectra, out._defaults, out._cache = {}, {}, {}
    for name, spec in palette.spectra.items():
        kind = PALETTE_RANGES[name][2]
        out.materials[name] = Material(name, tuple(float(x) for x in spec), kind, "taken from the background scene")
    for name, (kind, key) in PALETTE_USES.items():
        if name in palette.spectra:
            s = copy.copy(out.spec(kind))
            s.params = dict(s.params) | {key: name}
            if kind in base.structures:
                out.structures[kind] = s
            else:  # not in the catalogue (probability 0): its defaults, used when presence forces the type
                out._defaults[kind] = s
    if "scene-vegetation" in palette.spectra:
        # the matrix class (largest share) is what a natural gap's remnant canopy shows
        matrix = max(range(len(out.landcover)), key=lambda i: out.landcover[i].share)
        out.landcover = list(out.landcover)
        out.landcover[matrix] = dataclasses.replace(out.landcover[matrix], material="scene-vegetation")
    return out


def transplant(
    recipe: Recipe | str,
    backgrounds: np.ndarray,
    count: int,
    seed: int,
    *,
    palette: Palette | None = None,
    twins: bool = True,
    presence: dict[str, float] | None = None,
    label_rule: LabelRule | dict | None = None,
    label_noise: float = 0.0,
    cue: Any = None,
    cue_rate: float = 0.5,
    georef: np.ndarray | None = None,
    georef_meta: dict[str, Any] | None = None,
    progress: Any = None,
) -> tuple[TilePack, list[Scene]]:
    """Plant structures into real background tiles (M, 6, S, S): tile ``i`` uses background ``i % M``.

    Everything else is :func:`xbench.scenes.synthesize` (labels, twins, noise-free compositing). The pack's
    meta records the palette; ``georef`` (M, 9) of the backgrounds is carried to each tile.
    """
    bg = np.asarray(backgrounds, dtype=np.float32)
    palette = palette if palette is not None else scene_palette(bg, BANDS)
    rec = transplant_recipe(recipe, palette)
    pack, scenes = synthesize(
        rec,
        count,
        seed,
        twins=twins,
        presence=presence,
        label_rule=label_rule,
        label_noise=label_noise,
        cue=cue,
        cue_rate=cue_rate,
        progress=progress,
        backgrounds=bg,
    )
    which = np.arange(count) % len(bg)
    pack.meta = dict(pack.meta) | {
        "source": "xbench.imagery.transplant",
        "transplant": {"palette": palette.to_dict(), "background_index": which.tolist(), "backgrounds": len(bg)},
    }
    if georef is not None:
        pack.georef = np.asarray(georef, dtype=np.float64)[which]
        pack.meta["georef"] = georef_meta or {}
    return pack, scenes
