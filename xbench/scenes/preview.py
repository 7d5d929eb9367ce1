"""A contact sheet of a tile pack: natural and false colour with the planted structures outlined.

Used by ``xbench synth`` (``preview.png``) and :func:`xbench.synthesize` (``preview=``); the colour
composites are shared with the figures that show single tiles.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from xbench.data import TilePack

PREVIEW_TILES = 12
# outline colours of structure types in the preview
TYPE_COLOURS = {
    "road": "#ff3b30",
    "clearing": "#ffcc00",
    "building": "#ff2d95",
    "corridor": "#ff9500",
    "field": "#ffffff",
    "river": "#00c7ff",
    "natural-gap": "#a2ff00",
    "outcrop": "#c8a2ff",
}


def _stretch(rgb: np.ndarray, lo: float, hi: float | np.ndarray) -> np.ndarray:
    x = np.clip((rgb - lo) / (hi - lo), 0, 1)
    return x ** (1 / 1.6)


def natural_colour(img: np.ndarray, bands: list[str]) -> np.ndarray:
    rgb = np.stack([img[bands.index(b)] for b in ("red", "green", "blue")], axis=-1)
    return _stretch(rgb, 0.0, 0.16)


def false_colour(img: np.ndarray, bands: list[str]) -> np.ndarray:
    rgb = np.stack([img[bands.index(b)] for b in ("nir", "red", "green")], axis=-1)
    return _stretch(rgb, 0.0, np.array([0.45, 0.16, 0.16]))


def write_preview(pack: TilePack, path: str | Path, n_tiles: int = PREVIEW_TILES) -> Path:
    """A mosaic: for each tile, natural colour above false colour (nir, red, green), outlines, label."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D

    n = min(n_tiles, len(pack))
    cols = min(n, 6)
    rows = 2 * int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(2.1 * cols, 2.25 * rows + 0.5), squeeze=False)
    for ax in axes.flat:
        ax.axis("off")
    bands = list(pack.band_names)
    for i in range(n):
        r, c = 2 * (i // cols), i % cols
        img = pack.images[i]
        for row, rgb in ((r, natural_colour(img, bands)), (r + 1, false_colour(img, bands))):
            ax = axes[row, c]
            ax.imshow(rgb, interpolation="nearest")
            for k, name in enumerate(pack.mask_names):
                cov = pack.coverage[i, k] if pack.coverage is not None else pack.masks[i, k].astype(float)
                if cov.max() > 0:
                    ax.contour(cov, levels=[0.25], colors=[TYPE_COLOURS.get(name, "w")], linewidths=0.7)
        label = pack.class_names[int(pack.labels[i])]
        cue = " +cue" if pack.cue is not None and bool(pack.cue[i]) else ""
        axes[r, c].set_title(f"{i}: {label}{cue}", fontsize=8)
        axes[r + 1, c].set_title("false colour", fontsize=6, color="0.4")
    handles = [Line2D([], [], color=TYPE_COLOURS.get(t, "w"), lw=2, label=t) for t in pack.mask_names]
    fig.legend(handles=handles, loc="lower center", ncol=min(len(handles), 8), fontsize=7, frameon=False)
    rec = pack.meta.get("recipe", "")
    title = fig.suptitle(
        f"xbench synth: {rec}, seed {pack.meta.get('seed')} (natural colour / false colour nir-red-green)",
        fontsize=9,
    )
    fig.tight_layout(rect=(0, 0.04, 1, 0.97))
    fig.patch.set_facecolor("0.15")
    for ax in axes.flat:
        ax.title.set_color("w" if ax.title.get_color() != "0.4" else "0.7")
    title.set_color("w")
    for t in fig.legends[0].get_texts():
        t.set_color("w")
    path = Path(path)
    fig.savefig(path, dpi=110, facecolor=fig.get_facecolor())
    plt.close(fig)
    return path
