"""The `[data]` forms of a task file that name georeferenced rasters (read by ``xbench.tasks``).

Annotated real tiles::

    [data]
    rasters = ["scene.tif"]            # files or folders, relative to the task file
    annotations = "roads.geojson"      # GeoJSON, GeoPackage or shapefile
    class_attribute = "kind"           # the attribute naming each feature's structure type
    annotation_classes = { track = "road" }   # optional: attribute value -> structure type
    line_width = 12.0                  # width of line features, in the raster CRS's units (metres)
    size = 32
    train = 120                        # tiles, in grid order: the first train, the next val, then test
    val = 30
    test = 30
    [data.labels] ...                  # a label rule, evaluated on the annotation coverage

Transplanted structures on real backgrounds: the recipe form (recipe, presence, labels, ...) plus::

    backgrounds = ["scene.tif"]        # or "@vellardine": the generated synthetic Vellardine GeoTIFF

Both forms take the raster keys ``bands`` (names in file order, or a table name -> 1-based band), ``scale``,
``offset``, ``nodata`` (defaults: the file's metadata), ``out_of_range`` (``clip`` | ``drop-tile`` |
``keep``; transplant needs values in [0, 1], so not ``keep``) and ``max_nodata`` (fraction, default 0).
Background tiles are divided between the splits in grid order, in proportion to the split counts (a
spatial split: neighbouring tiles stay in one split); a split with more tiles than backgrounds reuses them
in turn, each time with other structures planted.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np

from xbench.data import load_pack, save_pack
from xbench.errors import XbenchInputError
from xbench.imagery.raster import (
    OUT_OF_RANGE_POLICIES,
    RasterOptions,
    RasterTiles,
    georef_rows,
    raster_files,
    read_raster_tiles,
)

RASTER_KEYS = {"bands", "scale", "offset", "nodata", "out_of_range", "max_nodata"}
ANNOTATED_KEYS = RASTER_KEYS | {
    "rasters",
    "annotations",
    "class_attribute",
    "annotation_classes",
    "line_width",
    "size",
    "train",
    "val",
    "test",
    "labels",
    "lookalikes",
}
GENERATED = "@vellardine"  # the generated background scene (transplant demo)
GENERATED_ANNOTATED = "@vellardine-annotated"  # the generated scene with roads and clear-cuts, and their GeoJSON
PACK_VERSION = 2  # bump when the annotated pack's content changes for the same inputs


def _num(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise XbenchInputError(where, "wrong type", expected="a number", found=repr(value))
    return float(value)


def raster_options(sec: dict[str, Any], w: str) -> RasterOptions:
    """The raster keys of a `[data]` section, checked (errors name the file and key)."""
    bands = sec.get("bands")
    if bands is not None:
        if isinstance(bands, list):
            if not bands or not all(isinstance(b, str) for b in bands):
                raise XbenchInputError(f"{w}.bands", "wrong type", expected="a list of band names", found=bands)
        elif isinstance(bands, dict):
            for k, v in bands.items():
                if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                    raise XbenchInputError(f"{w}.bands.{k}", "not a band number", expected="an integer >= 1", found=v)
        else:
            raise XbenchInputError(f"{w}.bands", "wrong type", expected="a list of names or a table name = band")
    policy = sec.get("out_of_range", "clip")
    if policy not in OUT_OF_RANGE_POLICIES:
        raise XbenchInputError(
            f"{w}.out_of_range", "unknown policy", expected=" | ".join(OUT_OF_RANGE_POLICIES), found=policy
        )
    max_nodata = _num(sec.get("max_nodata", 0.0), f"{w}.max_nodata")
    if not 0 <= max_nodata < 1:
        raise XbenchInputError(f"{w}.max_nodata", "value out of range", expected="in [0, 1)", found=max_nodata)
    return RasterOptions(
        bands=bands,
        scale=None if "scale" not in sec else _num(sec["scale"], f"{w}.scale"),
        offset=None if "offset" not in sec else _num(sec["offset"], f"{w}.offset"),
        nodata=None if "nodata" not in sec else _num(sec["nodata"], f"{w}.nodata"),
        out_of_range=policy,
        max_nodata=max_nodata,
    )


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 22), b""):
            h.update(chunk)
    return h.hexdigest()


def resolve_rasters(ref: Any, where: str, task_file: str, cache: Path) -> list[Path]:
    """Files named by `rasters`/`backgrounds` (a string or a list), relative to the task file."""
    refs = ref if isinstance(ref, list) else [ref]
    if not refs or not all(isinstance(r, str) for r in refs):
        raise XbenchInputError(where, "wrong type", expected="a path or a list of paths to rasters", found=ref)
    out: list[Path] = []
    for r in refs:
        if r == GENERATED:
            from xbench.imagery.generate import vellardine_background_path

            out.append(vellardine_background_path(cache))
            continue
        if r == GENERATED_ANNOTATED:
            out.append(annotated_example(cache)[0])
            continue
        try:
            out.extend(raster_files(r, base=Path(task_file).parent))
        except XbenchInputError as exc:
            raise XbenchInputError(where, str(exc)) from None
    return out


def annotated_example(cache: Path) -> tuple[Path, Path]:
    """The generated annotated Vellardine example (raster, GeoJSON) under the cache, written on first use."""
    from xbench.imagery.generate import write_annotated_example

    folder = cache / "imagery" / "vellardine-annotated"
    raster, annotations = folder / "scene.tif", folder / "annotations.geojson"
    if not (raster.is_file() and annotations.is_file()):
        write_annotated_example(folder)
    return raster, annotations


def split_backgrounds(sec: dict[str, Any], f: str, cache: Path) -> tuple[dict[str, Any], dict[str, Any]]:
    """Split a transplant `[data]` section into the recipe form's keys and the background description."""
    w = f"{f}: data"
    options = raster_options(sec, w)
    if options.out_of_range == "keep":
        raise XbenchInputError(
            f"{w}.out_of_range", "transplant needs reflectance in [0, 1]", expected="clip | drop-tile", found="keep"
        )
    files = resolve_rasters(sec["backgrounds"], f"{w}.backgrounds", f, cache)
    rest = {k: v for k, v in sec.items() if k not in RASTER_KEYS | {"backgrounds"}}
    raw = {
        "files": [str(p.resolve()) for p in files],
        "sha256": [file_sha256(p) for p in files],
        "options": options.to_dict(),
        "given": sec["backgrounds"],
    }
    return rest, {"files": [str(p.resolve()) for p in files], "options": options.to_dict(), "raw": raw}


_BACKGROUNDS: dict[str, RasterTiles] = {}


def background_tiles(backgrounds: dict[str, Any], size: int, limit: int) -> RasterTiles:
    """The first ``limit`` kept tiles of the background rasters (grid order, file after file), with the
    recipe's bands; read once per process. A task never needs more backgrounds than tiles, so a scene much
    larger than the task is read only as far as needed."""
    from xbench.scenes import BANDS

    key = json.dumps([backgrounds["raw"], size, limit], sort_keys=True, default=str)
    if key not in _BACKGROUNDS:
        opts = RasterOptions(**backgrounds["options"])
        _BACKGROUNDS.clear()  # one task's backgrounds at a time
        _BACKGROUNDS[key] = read_raster_tiles(backgrounds["files"], size, opts, limit=limit, bands_as=BANDS)
    return _BACKGROUNDS[key]


def split_ranges(m: int, counts: dict[str, int]) -> dict[str, tuple[int, int]]:
    """Background tiles [lo, hi) of each split: grid order, in proportion to the split counts, >= 1 each."""
    if m < 3:
        raise XbenchInputError("backgrounds", "too few background tiles for three splits", expected=">= 3", found=m)
    total = sum(counts.values())
    edges, cum = [0], 0
    for s in ("train", "val"):
        cum += counts[s]
        edges.append(min(max(edges[-1] + 1, round(m * cum / total)), m - (3 - len(edges))))
    edges.append(m)
    return {s: (edges[i], edges[i + 1]) for i, s in enumerate(("train", "val", "test"))}


def transplant_split(task: Any, split: str, seed: int) -> tuple[Any, list[Any]]:
    """One split of a transplant task: the split's background tiles with the recipe's structures planted."""
    from xbench.imagery.transplant import scene_palette, transplant
    from xbench.scenes import BANDS

    d = task.data
    tiles = background_tiles(d.backgrounds, d.size, sum(d.counts.values()))
    lo, hi = split_ranges(len(tiles.images), d.counts)[split]
    recipe = d.recipe
    if recipe.endswith(".toml") and not Path(recipe).is_absolute():
        recipe = str(Path(task.path).parent / recipe)
    pack, scenes = transplant(
        recipe,
        tiles.images[lo:hi],
        d.counts[split],
        seed,
        palette=scene_palette(tiles.images, BANDS),  # the whole scene's own spectra, the same in every split
        twins=(split == "test"),
        presence=d.presence,
        label_rule=task.label_rule,
        label_noise=d.label_noise if split == "train" else 0.0,
        cue=d.cue,
        cue_rate=d.cue_rates[split],
        georef=tiles.georef[lo:hi],
        georef_meta=tiles.georef_meta(),
    )
    pack.meta["tiling"] = tiles.report.to_dict()
    pack.meta["background_tiles"] = [lo, hi]
    return pack, scenes


def annotated_pack_for_task(
    sec: dict[str, Any], f: str, rule: Any, split_counts: dict[str, int], cache: Path
) -> tuple[Path, dict[str, Any]]:
    """Build (or reuse from the cache) the annotated tile pack of a `[data] rasters = ...` section.

    Returns the pack's path and the raw description hashed for model caches. Next to the pack,
    ``georef.csv`` lists each tile's source raster, pixel row/col, affine transform and CRS.
    """
    from xbench import __version__
    from xbench.imagery.annotate import annotated_pack

    w = f"{f}: data"
    n_tiles = sum(split_counts.values())
    extra = sorted(set(sec) - ANNOTATED_KEYS)
    if extra:
        raise XbenchInputError(f"{w}.{extra[0]}", "unknown key", expected="one of " + ", ".join(sorted(ANNOTATED_KEYS)))
    for key in ("rasters", "annotations", "size"):
        if key not in sec:
            raise XbenchInputError(f"{w}.{key}", "missing required key (data.rasters is set)")
    size = sec["size"]
    if isinstance(size, bool) or not isinstance(size, int) or not 16 <= size <= 512 or size % 4:
        raise XbenchInputError(f"{w}.size", "bad tile size", expected="a multiple of 4 in [16, 512]", found=size)
    options = raster_options(sec, w)
    files = resolve_rasters(sec["rasters"], f"{w}.rasters", f, cache)
    ann = sec["annotations"]
    if not isinstance(ann, str):
        raise XbenchInputError(f"{w}.annotations", "wrong type", expected="a path to a vector file", found=ann)
    if ann == GENERATED_ANNOTATED:
        ann_path = annotated_example(cache)[1]
    else:
        ann_path = Path(ann) if Path(ann).is_absolute() else Path(f).parent / ann
    if not ann_path.is_file():
        raise XbenchInputError(f"{w}.annotations", "annotation file not found", found=str(ann_path))
    attr = sec.get("class_attribute", "class")
    classes = sec.get("annotation_classes")
    if classes is not None and not (isinstance(classes, dict) and all(isinstance(v, str) for v in classes.values())):
        raise XbenchInputError(f"{w}.annotation_classes", "wrong type", expected="a table value = structure type")
    line_width = None if "line_width" not in sec else _num(sec["line_width"], f"{w}.line_width")
    raw = json.loads(json.dumps(sec, default=str)) | {
        "raster_sha256": [file_sha256(p) for p in files],
        "annotations_sha256": file_sha256(ann_path),
    }
    key = hashlib.sha256(
        json.dumps([raw, split_counts, __version__, PACK_VERSION], sort_keys=True).encode()
    ).hexdigest()
    folder = cache / "imagery" / "packs" / key[:32]
    path = folder / "tiles.npz"
    if path.is_file():
        try:
            load_pack(path)
            return path, raw
        except XbenchInputError:
            pass  # a damaged cache file is rebuilt
    try:
        pack = annotated_pack(
            files,
            ann_path,
            size,
            rule,
            class_attribute=attr,
            line_width=line_width,
            classes=classes,
            options=options,
            limit=n_tiles,
        )
    except XbenchInputError as exc:
        raise XbenchInputError(f"{w}", str(exc)) from None
    if len(pack) < n_tiles:
        raise XbenchInputError(
            f"{w}.train/val/test",
            "more tiles than the rasters give",
            expected=f"<= {len(pack)} usable tiles",
            found=f"{n_tiles} ({pack.meta['tiling']['skipped_nodata']} skipped for nodata, "
            f"{pack.meta['tiling']['dropped_out_of_range']} dropped out of range)",
        )
    save_pack(pack, path)
    assert pack.georef is not None  # annotated packs always carry it
    write_georef_csv(pack.georef, pack.meta["georef"], folder / "georef.csv", split_counts)
    (folder / "tiling.json").write_text(json.dumps(pack.meta["tiling"], indent=1))
    return path, raw


def write_georef_csv(
    georef: np.ndarray, meta: dict[str, Any], path: Path, split_counts: dict[str, int] | None = None
) -> Path:
    """A side table: pack tile, split and tile index within it (the ``tile`` of run records for the test
    split), source raster, pixel row/col, the six transform terms and the CRS of each tile."""
    import csv

    rows = georef_rows(georef, meta["sources"], meta["crs"])
    splits: list[tuple[str, int]] = []
    for name, n in (split_counts or {"all": len(rows)}).items():
        splits.extend((name, i) for i in range(n))
    splits.extend(("unused", i) for i in range(len(rows) - len(splits)))
    with open(path, "w", newline="") as fh:
        out = csv.writer(fh)
        out.writerow(["pack_tile", "split", "tile", "source", "row", "col", "a", "b", "c", "d", "e", "f", "crs"])
        for r, (split, k) in zip(rows, splits, strict=False):
            out.writerow([r["tile"], split, k, r["source"], r["row"], r["col"], *r["transform"], r["crs"]])
    return path


def transplant_from_rasters(
    recipe: Any,
    refs: list[str],
    count: int,
    seed: int,
    size: int,
    cache: Path,
    options: RasterOptions | None = None,
    tiling_progress: bool | None = None,
    **kwargs: Any,
) -> tuple[Any, list[Any]]:
    """`xbench synth --backgrounds`: tiles of the named rasters (or "@vellardine") with structures planted.

    ``kwargs`` go to :func:`xbench.imagery.transplant.transplant` (twins, presence, label_noise, ...).
    """
    from xbench.imagery.transplant import transplant
    from xbench.scenes import BANDS

    options = options or RasterOptions()
    if options.out_of_range == "keep":
        raise XbenchInputError("--out-of-range", "transplant needs reflectance in [0, 1]", expected="clip | drop-tile")
    files = resolve_rasters(list(refs), "--backgrounds", str(Path.cwd() / "cli"), cache)
    tiles = read_raster_tiles(files, size, options, limit=count, progress=tiling_progress, bands_as=BANDS)
    pack, scenes = transplant(
        recipe, tiles.images, count, seed, georef=tiles.georef, georef_meta=tiles.georef_meta(), **kwargs
    )
    pack.meta["tiling"] = tiles.report.to_dict()
    return pack, scenes
