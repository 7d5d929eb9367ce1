"""`xbench synth`: synthesise landscape tiles with planted structures (and their twins).

Writes DIR/tiles.npz (tile pack), DIR/scenes.json (what was planted where) and DIR/preview.png
(natural and false colour mosaic with planted structures outlined and labels written).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from xbench.errors import XbenchInputError

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


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--recipe", help="a shipped recipe name (see --list) or a path to a recipe .toml")
    parser.add_argument("--count", type=int, default=16, help="number of tiles (default 16)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--size", type=int, default=64, help="tile size in pixels (default 64)")
    parser.add_argument("--twins", action="store_true", help="also store every tile with all structures removed")
    parser.add_argument("--label-noise", type=float, default=0.0, help="fraction of labels flipped (default 0)")
    parser.add_argument(
        "--presence",
        action="append",
        default=[],
        metavar="TYPE=P",
        help="probability that a tile holds a structure type (repeatable), e.g. road=1",
    )
    parser.add_argument("--out", help="output folder")
    parser.add_argument(
        "--backgrounds",
        nargs="+",
        metavar="RASTER",
        help="plant the structures into the tiles of these GeoTIFF files or folders ('@vellardine': a generated "
        "scene); each tile's twin is its untouched background",
    )
    parser.add_argument(
        "--out-of-range", default="clip", choices=("clip", "drop-tile"), help="backgrounds: values outside [0, 1]"
    )
    parser.add_argument("--no-preview", action="store_true", help="skip preview.png")
    parser.add_argument("--list", action="store_true", help="list the shipped recipes and exit")


def _presence(items: list[str]) -> dict[str, float] | None:
    if not items:
        return None
    out: dict[str, float] = {}
    for item in items:
        key, sep, value = item.partition("=")
        try:
            out[key.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep:
            raise XbenchInputError("--presence", "expected TYPE=PROBABILITY", found=item)
    return out


def run(args: argparse.Namespace) -> int:
    from xbench.data import save_pack
    from xbench.scenes import list_recipes, load_recipe, scenes_to_json, synthesize

    if args.list:
        for name in list_recipes():
            r = load_recipe(name)
            print(f"{name:20s} {r.description}")
        return 0
    if not args.recipe:
        raise XbenchInputError("--recipe", "missing", expected="a recipe name or path (see --list)")
    if not args.out:
        raise XbenchInputError("--out", "missing", expected="an output folder")
    if args.count < 1:
        raise XbenchInputError("--count", "need at least one tile", found=args.count)
    if args.size < 8:
        raise XbenchInputError("--size", "tile size too small", expected=">= 8", found=args.size)
    recipe = load_recipe(args.recipe)
    if args.backgrounds:  # transplant mode: the same call, drawing over the tiles of the given rasters
        synthesize = _transplanting(args)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    bar = None
    progress = None
    if args.count >= 500:
        from tqdm import tqdm

        bar = tqdm(total=args.count, unit="tile", desc=f"synth {recipe.name}", file=sys.stderr)
        progress = bar.update
    try:
        pack, scenes = synthesize(
            recipe,
            args.count,
            args.seed,
            size=args.size,
            twins=args.twins,
            presence=_presence(args.presence),
            label_noise=args.label_noise,
            progress=progress,
        )
    finally:
        if bar is not None:
            bar.close()
    save_pack(pack, out / "tiles.npz")
    _write_json(
        out / "scenes.json",
        {
            "meta": pack.meta,
            "class_names": pack.class_names,
            "labels": pack.labels.tolist(),
            "tiles": scenes_to_json(scenes),
        },
    )
    written = ["tiles.npz", "scenes.json"]
    if not args.no_preview:
        write_preview(pack, scenes, out / "preview.png")
        written.append("preview.png")
    counts = np.bincount(pack.labels, minlength=pack.n_classes)
    print(
        f"{len(pack)} tiles of {recipe.name} ({args.size}x{args.size}x{len(pack.band_names)}) in {out}: "
        + ", ".join(written)
    )
    print(
        "labels: "
        + ", ".join(f"{n} {c}" for n, c in zip(counts, pack.class_names, strict=True))
        + f"  (rule: {pack.meta['label_rule']})"
    )
    return 0


def _transplanting(args: argparse.Namespace):
    """A stand-in for ``synthesize`` that plants into the tiles of ``--backgrounds`` and reports the tiling."""
    from xbench.imagery.raster import RasterOptions, TilingReport
    from xbench.imagery.taskdata import transplant_from_rasters
    from xbench.tasks import cache_root

    def make(recipe, count, seed, size, **kwargs):
        options = RasterOptions(out_of_range=args.out_of_range)
        pack, scenes = transplant_from_rasters(
            recipe, args.backgrounds, count, seed, size, cache_root(), options, **kwargs
        )
        print(f"backgrounds: {TilingReport(**pack.meta['tiling']).summary()}")
        return pack, scenes

    return make


def _write_json(path: Path, obj: object) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.name, suffix=".tmp")
    with os.fdopen(fd, "w") as fh:
        json.dump(obj, fh, indent=1)
    os.chmod(tmp, 0o644)  # mkstemp makes private files; this is an ordinary output file
    os.replace(tmp, path)


def _stretch(rgb: np.ndarray, lo: float, hi: float) -> np.ndarray:
    x = np.clip((rgb - lo) / (hi - lo), 0, 1)
    return x ** (1 / 1.6)


def natural_colour(img: np.ndarray, bands: list[str]) -> np.ndarray:
    rgb = np.stack([img[bands.index(b)] for b in ("red", "green", "blue")], axis=-1)
    return _stretch(rgb, 0.0, 0.16)


def false_colour(img: np.ndarray, bands: list[str]) -> np.ndarray:
    rgb = np.stack([img[bands.index(b)] for b in ("nir", "red", "green")], axis=-1)
    return _stretch(rgb, 0.0, np.array([0.45, 0.16, 0.16]))


def write_preview(pack, scenes, path: Path, n_tiles: int = PREVIEW_TILES) -> Path:
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
    fig.suptitle(
        f"xbench synth: {rec}, seed {pack.meta.get('seed')} (natural colour / false colour nir-red-green)",
        fontsize=9,
    )
    fig.tight_layout(rect=(0, 0.04, 1, 0.97))
    fig.patch.set_facecolor("0.15")
    for ax in axes.flat:
        ax.title.set_color("w" if ax.title.get_color() != "0.4" else "0.7")
    fig._suptitle.set_color("w")
    for t in fig.legends[0].get_texts():
        t.set_color("w")
    path = Path(path)
    fig.savefig(path, dpi=110, facecolor=fig.get_facecolor())
    plt.close(fig)
    return path
