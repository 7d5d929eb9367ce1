"""Names shared by every stage: structure types and keys that were renamed (old -> new).

A foundation module like ``errors.py``: every stage may import it. Old keys fail with a message that names
the new key (see :func:`renamed_hint`), so an old task file or script never silently means something else.
"""

from __future__ import annotations

# Planted structure types a person builds, and natural look-alikes (never positive evidence by default).
HUMAN_TYPES: tuple[str, ...] = ("road", "clearing", "building", "corridor", "field")
LOOKALIKE_TYPES: tuple[str, ...] = ("river", "natural-gap", "outcrop")
STRUCTURE_TYPES: tuple[str, ...] = HUMAN_TYPES + LOOKALIKE_TYPES

# Renamed keys, per kind of key. Each entry: old -> new.
RENAMED: dict[str, dict[str, str]] = {
    "metric": {"sparseness": "gini", "faithfulness-corr": "subset-drop-corr", "concept-agreement": "concept-recovery"},
    "metric family": {
        "localization": "overlap",
        "faithfulness": "response",
        "sanity": "model-dependence",
        "stability": "steadiness",
        "concentration": "spread",
    },
    "recipe": {"orrin-vale": "conifer-upland"},
    "task": {"weak-labels": "label-noise"},
    "model": {"bottleneck": "separable"},
}


def renamed_hint(kind: str, key: str) -> str | None:
    """The sentence to add to an 'unknown key' error when ``key`` is an old name, else None."""
    new = RENAMED.get(kind, {}).get(key)
    return None if new is None else f"'{key}' was renamed to '{new}'"
