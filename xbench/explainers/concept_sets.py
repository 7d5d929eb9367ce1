"""Concept example sets for ``tcav``, drawn from the landscape synthesizer.

A concept set for a structure type holds tiles where that type is forced present (probability 1) and
every other catalogued type is switched off (probability 0), on varied backgrounds (each tile its own
scene seed). Random sets (``random-0``, ``random-1``, ...) hold tiles drawn with the recipe's own
catalogue, the "random images" against which Kim et al. (2018) test a concept. No spurious cue is
rendered on any of them.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

import numpy as np

from xbench.errors import XbenchInputError
from xbench.scenes import load_recipe, render, sample_scene


def _scene_seed(seed: int, set_index: int, tile: int) -> int:
    a, b = np.random.SeedSequence([int(seed), 17, int(set_index), int(tile)]).generate_state(2, np.uint32)
    return int(((int(a) << 32) | int(b)) & ((1 << 53) - 1))


def make_concept_sets(
    recipe, size: int, types: Iterable[str], n_per_set: int, n_random: int, seed: int
) -> dict[str, np.ndarray]:
    """Concept and random example sets: {type: float32 (n_per_set, C, size, size), 'random-i': ...}.

    recipe: a recipe name, path or ``Recipe``; types: structure types of the recipe's catalogue;
    n_random: number of random sets (TCAV significance needs at least 10).
    """
    if not isinstance(recipe, (str, Path)) and not hasattr(recipe, "types"):
        raise XbenchInputError(
            "make_concept_sets: recipe", "not a recipe", expected="a name, path or Recipe", found=type(recipe).__name__
        )
    rec = load_recipe(recipe)
    catalogue = list(rec.types())
    types = list(types)
    unknown = [t for t in types if t not in catalogue]
    if unknown:
        raise XbenchInputError(
            "make_concept_sets: types",
            "structure types not in the recipe's catalogue",
            expected="some of " + ", ".join(catalogue),
            found=unknown,
        )
    for name, value, minimum in (("n_per_set", n_per_set, 1), ("n_random", n_random, 0), ("size", size, 8)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
            raise XbenchInputError(
                f"make_concept_sets: {name}", "bad value", expected=f"an integer >= {minimum}", found=value
            )

    def draw(set_index: int, presence: dict[str, float] | None) -> np.ndarray:
        tiles = [
            render(sample_scene(rec, size, _scene_seed(seed, set_index, i), presence=presence))
            for i in range(int(n_per_set))
        ]
        return np.stack(tiles).astype(np.float32)

    sets: dict[str, np.ndarray] = {}
    for j, kind in enumerate(types):
        presence = {t: 0.0 for t in catalogue}
        presence[kind] = 1.0
        sets[kind] = draw(j, presence)
    for r in range(int(n_random)):
        sets[f"random-{r}"] = draw(1000 + r, None)
    return sets


def classes_of_type(kind: str, driving_types: dict[int, list[str]] | None, classes: Iterable[int]) -> list[int]:
    """The classes a structure type is meant to drive: those whose label rule uses it. A type that drives
    no class (a look-alike, an unused type) gets every class that some type drives (a method that calls
    it used claims it drives one of them); without driving types, every given class."""
    classes = [int(k) for k in classes]
    if not driving_types:
        return classes
    own = [int(k) for k, types in driving_types.items() if kind in types]
    if own:
        return own
    return [int(k) for k, types in driving_types.items() if types]
