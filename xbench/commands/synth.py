"""`xbench synth`: synthesise landscape tiles with planted structures (and their twins).

Writes DIR/tiles.npz (tile pack), DIR/scenes.json (what was planted where) and DIR/preview.png
(natural and false colour mosaic with planted structures outlined and labels written).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

from xbench.data import atomic_write
from xbench.errors import XbenchInputError
from xbench.scenes.preview import write_preview

MAX_TILES = 1_000_000  # stated maxima: larger requests are refused before any memory is taken
MAX_SIZE = 512


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
    if not 1 <= args.count <= MAX_TILES:
        raise XbenchInputError("--count", "out of range", expected=f"1 to {MAX_TILES} tiles", found=args.count)
    if not 8 <= args.size <= MAX_SIZE:
        raise XbenchInputError("--size", "out of range", expected=f"8 to {MAX_SIZE} pixels", found=args.size)
    gib = args.count * args.size**2 * 6 * 4 * (3 if args.twins else 2) / 2**30
    if gib > 64:
        raise XbenchInputError(
            "--count/--size", "too large for one pack", expected="at most 64 GiB of tiles", found=f"{gib:.0f} GiB"
        )
    if not 0.0 <= args.label_noise <= 0.5:
        raise XbenchInputError("--label-noise", "out of range", expected="0 to 0.5", found=args.label_noise)
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
        write_preview(pack, out / "preview.png")
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
    def write(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(obj, fh, indent=1)

    atomic_write(path, write)
