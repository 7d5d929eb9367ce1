"""Landscape tile synthesis: recipes, scenes with planted structures, rendering, labels, tile packs.

Public API (see DEVELOPERS.md, "Scenes")::

    list_recipes() -> list[str]
    load_recipe(name_or_path) -> Recipe
    sample_scene(recipe, size, seed, presence=None, cue=None) -> Scene
    render(scene, omit=(), cue=None) -> float32 (C, H, W)
    parse_label_rule(table, where) -> LabelRule;  parse_cue(table, where) -> Cue
    synthesize(recipe, count, seed, size=64, twins=False, presence=None, label_rule=None,
               label_noise=0.0, cue=None, cue_rate=0.5) -> (TilePack, list[Scene])
    scenes_to_json(scenes) -> list[dict]
"""

from xbench.names import HUMAN_TYPES, LOOKALIKE_TYPES
from xbench.scenes.labels import (
    ALL_TYPES,
    Condition,
    Cue,
    LabelRule,
    default_label_rule,
    parse_cue,
    parse_label_rule,
)
from xbench.scenes.materials import BANDS, LIBRARY, Material, ndvi
from xbench.scenes.recipes import Recipe, StructureSpec, list_recipes, load_recipe, parse_recipe
from xbench.scenes.render import Instance, Scene, render
from xbench.scenes.synthesis import (
    rebuild_scenes,
    sample_scene,
    scenes_to_json,
    structure_names,
    synthesize,
    tile_seed,
)

__all__ = [
    "ALL_TYPES",
    "BANDS",
    "HUMAN_TYPES",
    "LIBRARY",
    "LOOKALIKE_TYPES",
    "Condition",
    "Cue",
    "Instance",
    "LabelRule",
    "Material",
    "Recipe",
    "Scene",
    "StructureSpec",
    "default_label_rule",
    "list_recipes",
    "load_recipe",
    "ndvi",
    "parse_cue",
    "parse_label_rule",
    "parse_recipe",
    "rebuild_scenes",
    "render",
    "sample_scene",
    "scenes_to_json",
    "structure_names",
    "synthesize",
    "tile_seed",
]
