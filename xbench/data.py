"""Tile packs: the `.npz` exchange format for synthetic and user data (contract in DEVELOPERS.md, "Tile pack").

A pack is validated whenever it crosses a boundary (load, save, user input). Errors name the file and
the array, what was expected and what was found.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
import zipfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO

import numpy as np

from xbench.errors import XbenchInputError

if TYPE_CHECKING:
    import pandas as pd

DEFAULT_BANDS = ("blue", "green", "red", "nir", "swir1", "swir2")


@dataclass
class TilePack:
    """Tiles, labels, planted-structure masks and (optionally) structure-free twins.

    images: float32 (N, C, H, W) surface reflectance in [0, 1].
    labels: int64 (N,) class index into ``class_names`` (possibly noisy).
    masks: bool (N, K, H, W), one plane per structure type named in ``mask_names``;
        a pixel is True when the type's sub-pixel coverage there is above zero.
    twins: optional float32 (N, C, H, W), each tile with every planted structure removed (same noise).
    clean_labels: optional int64 (N,), labels before label noise.
    cue: optional bool (N,), whether the spurious cue was applied to the tile.
    coverage: optional float32 (N, K, H, W) sub-pixel area fraction per structure type.
    georef: optional float64 (N, 9) where each tile came from in a georeferenced raster: source index (into
        ``meta["georef"]["sources"]``), pixel row and column of its top-left corner, and the tile's affine
        transform a, b, c, d, e, f (``meta["georef"]["crs"]`` holds each source's CRS).
    meta: free JSON-serialisable information (recipe, seeds, label rule text...).
    """

    images: np.ndarray
    labels: np.ndarray
    class_names: list[str]
    band_names: list[str]
    masks: np.ndarray
    mask_names: list[str]
    twins: np.ndarray | None = None
    clean_labels: np.ndarray | None = None
    cue: np.ndarray | None = None
    coverage: np.ndarray | None = None
    meta: dict[str, Any] = field(default_factory=dict)
    georef: np.ndarray | None = None

    def __len__(self) -> int:
        return int(self.images.shape[0])

    @property
    def n_classes(self) -> int:
        return len(self.class_names)

    def subset(self, index: np.ndarray | slice) -> TilePack:
        """The same pack restricted to some tiles (views where numpy allows)."""

        def pick(a: np.ndarray | None) -> np.ndarray | None:
            return None if a is None else a[index]

        return TilePack(
            images=self.images[index],
            labels=self.labels[index],
            class_names=list(self.class_names),
            band_names=list(self.band_names),
            masks=self.masks[index],
            mask_names=list(self.mask_names),
            twins=pick(self.twins),
            clean_labels=pick(self.clean_labels),
            cue=pick(self.cue),
            coverage=pick(self.coverage),
            meta=dict(self.meta),
            georef=pick(self.georef),
        )

    def type_mask(self, names: list[str] | tuple[str, ...]) -> np.ndarray:
        """Union (N, H, W) of the planes of the given structure types (absent types add nothing)."""
        out = np.zeros((len(self),) + self.images.shape[2:], dtype=bool)
        for name in names:
            if name in self.mask_names:
                out |= self.masks[:, self.mask_names.index(name)]
        return out


def _check(cond: bool, where: str, problem: str, expected: str, found: Any) -> None:
    if not cond:
        raise XbenchInputError(where, problem, expected=expected, found=found)


def validate_pack(pack: TilePack, source: str = "tile pack") -> TilePack:
    """Check every array of a pack against the contract; returns the pack or raises XbenchInputError."""
    img = pack.images
    _check(
        isinstance(img, np.ndarray) and img.ndim == 4,
        f"{source}: array 'images'",
        "wrong shape",
        "4-d array (N, C, H, W)",
        getattr(img, "shape", type(img).__name__),
    )
    n, c, h, w = img.shape
    _check(img.dtype == np.float32, f"{source}: array 'images'", "wrong dtype", "float32", str(img.dtype))
    _check(n > 0, f"{source}: array 'images'", "no tiles", "N >= 1", n)
    finite = np.isfinite(img)
    if not finite.all():
        bad = int(np.argwhere(~finite)[0][0])
        raise XbenchInputError(f"{source}: array 'images'", f"non-finite values (NaN or inf), first in tile {bad}")
    lo, hi = float(img.min()), float(img.max())
    # a raster read with the out-of-range policy "keep" declares it; its values stay as measured
    kept = pack.meta.get("out_of_range") == "keep"
    _check(
        kept or (lo >= 0.0 and hi <= 1.0),
        f"{source}: array 'images'",
        "reflectance out of range",
        "values in [0, 1]",
        f"min {lo:.4g}, max {hi:.4g}",
    )
    lab = pack.labels
    _check(
        isinstance(lab, np.ndarray) and lab.shape == (n,),
        f"{source}: array 'labels'",
        "wrong shape",
        f"({n},)",
        getattr(lab, "shape", None),
    )
    _check(np.issubdtype(lab.dtype, np.integer), f"{source}: array 'labels'", "wrong dtype", "int64", str(lab.dtype))
    k = len(pack.class_names)
    _check(k >= 2, f"{source}: array 'class_names'", "too few classes", ">= 2 names", k)
    if lab.size and (lab.min() < 0 or lab.max() >= k):
        raise XbenchInputError(
            f"{source}: array 'labels'",
            "label outside the classes",
            expected=f"integers in [0, {k - 1}]",
            found=f"{int(lab.min())}..{int(lab.max())}",
        )
    _check(
        len(pack.band_names) == c,
        f"{source}: array 'band_names'",
        "length differs from the band axis",
        f"{c} names",
        len(pack.band_names),
    )
    m = pack.masks
    _check(
        isinstance(m, np.ndarray) and m.ndim == 4 and m.shape[0] == n and m.shape[2:] == (h, w),
        f"{source}: array 'masks'",
        "wrong shape",
        f"({n}, K, {h}, {w})",
        getattr(m, "shape", None),
    )
    _check(m.dtype == np.bool_, f"{source}: array 'masks'", "masks must be boolean", "bool", str(m.dtype))
    _check(
        len(pack.mask_names) == m.shape[1],
        f"{source}: array 'mask_names'",
        "length differs from the masks' type axis",
        f"{m.shape[1]} names",
        len(pack.mask_names),
    )
    for name, arr in (("twins", pack.twins), ("coverage", pack.coverage)):
        if arr is None:
            continue
        want = img.shape if name == "twins" else m.shape
        _check(arr.shape == want, f"{source}: array '{name}'", "wrong shape", str(want), arr.shape)
        _check(arr.dtype == np.float32, f"{source}: array '{name}'", "wrong dtype", "float32", str(arr.dtype))
        _check(bool(np.isfinite(arr).all()), f"{source}: array '{name}'", "non-finite values", "finite", "NaN/inf")
        if name == "coverage":
            lo, hi = float(arr.min(initial=0.0)), float(arr.max(initial=0.0))
            _check(lo >= 0.0 and hi <= 1.0, f"{source}: array 'coverage'", "out of range", "[0, 1]", f"{lo}..{hi}")
    if pack.georef is not None:
        _check(pack.georef.shape == (n, 9), f"{source}: array 'georef'", "wrong shape", f"({n}, 9)", pack.georef.shape)
    for name, arr in (("clean_labels", pack.clean_labels), ("cue", pack.cue)):
        if arr is not None:
            _check(arr.shape == (n,), f"{source}: array '{name}'", "wrong shape", f"({n},)", arr.shape)
    pack.labels = lab.astype(np.int64, copy=False)
    return pack


def save_pack(pack: TilePack, path: str | Path) -> Path:
    """Validate and write a pack atomically (write to a temporary file, then rename), as an ``.npz`` archive
    whose reflectances are stored and everything else deflated (see :func:`write_npz`)."""
    path = Path(path)
    validate_pack(pack, str(path))
    arrays: dict[str, np.ndarray] = {
        "images": pack.images,
        "labels": pack.labels.astype(np.int64),
        "class_names": np.array(pack.class_names),
        "band_names": np.array(pack.band_names),
        "masks": pack.masks,
        "mask_names": np.array(pack.mask_names),
        "meta_json": np.array(json.dumps(pack.meta, sort_keys=True)),
    }
    for name in ("twins", "clean_labels", "cue", "coverage", "georef"):
        if getattr(pack, name) is not None:
            arrays[name] = getattr(pack, name)

    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            write_npz_archive(fh, arrays, stored=REFLECTANCE_ARRAYS)

    atomic_write(path, write)
    return path


# Noise-textured reflectances: deflate shrinks them by ~10% at 6x the time of the whole rest of a pack
# (measured on the demo's training pack: 1.95 s compressed, 0.34 s with these stored; 30 vs 34 MB).
REFLECTANCE_ARRAYS = ("images", "twins")


def write_npz_archive(fh: BinaryIO, arrays: dict[str, np.ndarray], stored: tuple[str, ...] = ()) -> None:
    """``numpy.savez_compressed`` with the arrays named in ``stored`` kept uncompressed (numpy offers no
    per-array choice). ``numpy.load`` reads the archive like any other ``.npz``."""
    with zipfile.ZipFile(fh, mode="w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name, array in arrays.items():
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))  # same arrays, same bytes
            info.compress_type = zipfile.ZIP_STORED if name in stored else zipfile.ZIP_DEFLATED
            with archive.open(info, "w", force_zip64=True) as member:
                np.lib.format.write_array(member, np.asanyarray(array), allow_pickle=True)


def atomic_write(path: str | Path, write: Callable[[str], Any]) -> None:
    """Write a file whole or not at all: ``write(tmp)`` fills a temporary file beside ``path``, which is
    flushed to disk (fsync) and then renamed over ``path``; the folder entry is synced too.

    The one atomic write of the package (run store, model and data caches, tile packs, synth outputs).
    A killed process leaves the old file or the new one, never a truncated one.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix="." + path.name, suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes owner-only files; results and packs are meant to be shared
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    try:
        dir_fd = os.open(path.parent, os.O_RDONLY)
    except OSError:  # some file systems do not open folders; the rename is done either way
        return
    try:
        os.fsync(dir_fd)
    except OSError:
        pass
    finally:
        os.close(dir_fd)


def file_sha256(path: str | Path) -> str:
    """sha256 of a file's bytes (read in blocks)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


REQUIRED_ARRAYS = ("images", "labels", "class_names", "band_names", "masks", "mask_names")


def _read_pack(data: Any, path: Path) -> TilePack:
    with data:
        # Coverage (float in [0, 1]) may stand in for the boolean masks: masks = coverage > 0.
        present = set(data.files) | ({"masks"} if "coverage" in data.files else set())
        missing = [k for k in REQUIRED_ARRAYS if k not in present]
        if missing:
            raise XbenchInputError(
                str(path),
                f"missing array(s) {', '.join(missing)}",
                expected=", ".join(REQUIRED_ARRAYS),
                found=sorted(data.files),
            )
        meta = json.loads(str(data["meta_json"])) if "meta_json" in data.files else {}
        pack = TilePack(
            images=data["images"],
            labels=data["labels"],
            class_names=[str(s) for s in data["class_names"]],
            band_names=[str(s) for s in data["band_names"]],
            masks=data["masks"] if "masks" in data.files else np.asarray(data["coverage"]) > 0,
            mask_names=[str(s) for s in data["mask_names"]],
            twins=data["twins"] if "twins" in data.files else None,
            clean_labels=data["clean_labels"] if "clean_labels" in data.files else None,
            cue=data["cue"] if "cue" in data.files else None,
            coverage=data["coverage"] if "coverage" in data.files else None,
            meta=meta,
            georef=data["georef"] if "georef" in data.files else None,
        )
    return pack


def load_pack(path: str | Path) -> TilePack:
    """Read and validate a tile pack; errors name the file and the array."""
    path = Path(path)
    if not path.is_file():
        raise XbenchInputError(str(path), "tile pack not found")
    try:
        data = np.load(path, allow_pickle=False)
    except Exception as exc:  # zip or npy format errors from numpy
        raise XbenchInputError(str(path), f"not a readable .npz tile pack ({exc})") from None
    try:
        pack = _read_pack(data, path)
    except XbenchInputError:
        raise
    except ValueError as exc:  # numpy refuses object (pickled) arrays with allow_pickle=False
        if "allow_pickle" in str(exc) or "Object arrays" in str(exc):
            raise XbenchInputError(
                str(path), "holds pickled (object) arrays, which are never loaded", expected="plain numeric arrays"
            ) from None
        raise XbenchInputError(str(path), f"damaged .npz tile pack ({exc})") from None
    except Exception as exc:  # truncated members, bad zip entries, bad JSON
        raise XbenchInputError(str(path), f"damaged .npz tile pack ({type(exc).__name__}: {exc})") from None
    return validate_pack(pack, str(path))


# per-tile attributes for the report's breakdowns by class, structure type and coverage
TILE_COLUMNS = ["task", "tile", "class_name", "main_type", "coverage"]


def tiles_from_pack(task: str, pack: TilePack, human_types: list[str] | None = None) -> pd.DataFrame:
    """One row per tile of the pack (columns :data:`TILE_COLUMNS`): class name, the planted type with the
    largest coverage among ``human_types`` (default: every type) and its share of the tile ("none" when
    nothing is planted). The run writes it as ``tiles.parquet``; the report's breakdowns read it."""
    import pandas as pd

    names = [str(n) for n in pack.mask_names]
    keep = [i for i, n in enumerate(names) if human_types is None or n in human_types]
    if pack.coverage is not None:
        share = np.asarray(pack.coverage, dtype=np.float64)[:, keep].mean(axis=(2, 3))
    else:
        share = np.asarray(pack.masks, dtype=np.float64)[:, keep].mean(axis=(2, 3))
    main = share.argmax(axis=1) if keep else np.zeros(len(pack.labels), int)
    top = share[np.arange(len(main)), main] if keep else np.zeros(len(main))
    return pd.DataFrame(
        {
            "task": task,
            "tile": np.arange(len(pack.labels)),
            "class_name": [str(pack.class_names[int(c)]) for c in pack.labels],
            "main_type": [names[keep[m]] if t > 0 else "none" for m, t in zip(main, top, strict=True)],
            "coverage": top,
        }
    )
