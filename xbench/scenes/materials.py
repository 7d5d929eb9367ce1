"""Materials: six-band surface reflectance spectra and their kinds.

Bands follow the tile-pack default (blue, green, red, nir, swir1, swir2). Values are typical surface
reflectances of the trade (common practice, from memory; tests/test_scenes.py checks the NDVI ranges): green
vegetation is dark in red and bright in NIR (NDVI 0.6-0.9), clear water is dark and falls towards the
infrared (NDVI < 0), bare soil rises slowly with wavelength (NDVI 0.05-0.3), asphalt is flat and dark.

Recipes declare their own materials; the library below fills in names a recipe does not declare, so a
task may force a structure type (``presence``) that the recipe's catalogue leaves out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BANDS: tuple[str, ...] = ("blue", "green", "red", "nir", "swir1", "swir2")
BAND_INDEX = {b: i for i, b in enumerate(BANDS)}

#: Allowed material kinds (used by tests and by placement rules, e.g. "water" is avoided by roads).
MATERIAL_KINDS = ("vegetation", "dry-vegetation", "wetland", "water", "soil", "rock", "built")


@dataclass(frozen=True)
class Material:
    """A named surface with a six-band reflectance spectrum."""

    name: str
    reflectance: tuple[float, ...]
    kind: str
    note: str = ""

    @property
    def spectrum(self) -> np.ndarray:
        return np.asarray(self.reflectance, dtype=np.float32)


def ndvi(spectrum_or_image: np.ndarray) -> np.ndarray:
    """NDVI = (NIR - red) / (NIR + red) (Rouse et al. 1974) for a spectrum (C,) or an image (C, H, W)."""
    a = np.asarray(spectrum_or_image, dtype=np.float64)
    red, nir = a[BAND_INDEX["red"]], a[BAND_INDEX["nir"]]
    return (nir - red) / np.maximum(nir + red, 1e-9)


def _m(name: str, kind: str, refl: list[float], note: str = "") -> tuple[str, Material]:
    return name, Material(name, tuple(float(v) for v in refl), kind, note)


#: Built-in library (blue, green, red, nir, swir1, swir2). Recipes may override any entry.
LIBRARY: dict[str, Material] = dict(
    [
        _m("conifer", "vegetation", [0.020, 0.040, 0.021, 0.255, 0.115, 0.046], "spruce/pine canopy"),
        _m("deciduous", "vegetation", [0.028, 0.068, 0.034, 0.400, 0.205, 0.090], "birch/oak canopy"),
        _m("regrowth", "vegetation", [0.032, 0.072, 0.042, 0.350, 0.190, 0.085], "young trees and shrubs"),
        _m("grassland", "vegetation", [0.040, 0.088, 0.058, 0.345, 0.250, 0.128], "pasture, meadow"),
        _m("crop", "vegetation", [0.032, 0.082, 0.040, 0.450, 0.225, 0.100], "green cereal or fodder"),
        _m("sedge", "wetland", [0.040, 0.075, 0.062, 0.290, 0.215, 0.112], "wet grass and sedge"),
        _m("bog-moss", "wetland", [0.038, 0.062, 0.058, 0.235, 0.175, 0.095], "sphagnum lawn"),
        _m("heath", "dry-vegetation", [0.042, 0.062, 0.070, 0.205, 0.195, 0.112], "heather and lichen"),
        _m("lake-water", "water", [0.042, 0.038, 0.024, 0.012, 0.006, 0.004], "clear humic lake"),
        _m("river-water", "water", [0.055, 0.066, 0.052, 0.030, 0.012, 0.008], "turbid flowing water"),
        _m("bog-pool", "water", [0.022, 0.030, 0.026, 0.018, 0.009, 0.005], "dark peat pool"),
        _m("asphalt", "built", [0.070, 0.080, 0.088, 0.100, 0.125, 0.118], "paved road"),
        _m("gravel", "soil", [0.110, 0.140, 0.170, 0.215, 0.275, 0.235], "unpaved forestry road"),
        _m("bare-soil", "soil", [0.075, 0.105, 0.135, 0.195, 0.295, 0.240], "ploughed or exposed soil"),
        _m("stubble", "dry-vegetation", [0.080, 0.110, 0.135, 0.255, 0.320, 0.220], "harvested field"),
        _m("slash", "dry-vegetation", [0.042, 0.068, 0.078, 0.200, 0.225, 0.145], "clear-cut with slash"),
        _m("windthrow", "dry-vegetation", [0.048, 0.072, 0.080, 0.215, 0.240, 0.150], "fallen trees"),
        _m("burn-scar", "dry-vegetation", [0.030, 0.040, 0.050, 0.095, 0.165, 0.140], "charred ground"),
        _m("rock", "rock", [0.135, 0.155, 0.175, 0.215, 0.255, 0.215], "granite outcrop"),
        _m("corridor-grass", "dry-vegetation", [0.048, 0.088, 0.085, 0.285, 0.270, 0.155], "cut strip"),
        _m("roof-red", "built", [0.075, 0.095, 0.175, 0.240, 0.300, 0.245], "clay tile roof"),
        _m("roof-grey", "built", [0.190, 0.210, 0.220, 0.240, 0.265, 0.235], "metal or concrete roof"),
    ]
)

#: Path-radiance shape of haze: strongest in blue, weak in the short-wave infrared.
HAZE_SHAPE = np.array([1.0, 0.78, 0.58, 0.32, 0.10, 0.05], dtype=np.float32)
