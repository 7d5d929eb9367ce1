"""Report figures, drawn with matplotlib's object API on the Agg canvas (no pyplot, no display needed).

Palette: Okabe & Ito's colour-blind-safe colours for categories (explainers, models, classes, clusters),
with line styles and markers cycling as a second cue past seven categories; viridis for non-negative maps
and the diverging RdBu for signed ones (both readable with the common colour-vision deficiencies).

Tile images: natural colour is (red, green, blue), false colour (nir, red, green); each band is stretched
linearly between its 2nd and 98th percentile over all tiles in the figure (so tiles are comparable) and
clipped to [0, 1].
"""

from __future__ import annotations

import textwrap
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import BoundaryNorm, ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

if TYPE_CHECKING:
    from matplotlib.typing import RcKeyType

OKABE_ITO = ["#0072B2", "#D55E00", "#009E73", "#E69F00", "#CC79A7", "#56B4E9", "#000000", "#F0E442"]
LINE_COLOURS = OKABE_ITO[:7]  # yellow is too pale for thin lines on white
LINESTYLES = ["-", "--", ":", "-."]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "*"]
STRETCH_PERCENTILES = (2.0, 98.0)
DPI = 150

RC: dict[RcKeyType, Any] = {
    "font.size": 8,
    "axes.titlesize": 9,
    "axes.labelsize": 8,
    "legend.fontsize": 7,
    "xtick.labelsize": 7,
    "ytick.labelsize": 7,
    "figure.dpi": 100,
    "savefig.dpi": DPI,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "pdf.fonttype": 42,
}


@dataclass
class FigureFile:
    stem: str
    section: str
    title: str
    caption: str
    png: Path
    pdf: Path


def new_figure(
    width: float, height: float, layout: Literal["constrained", "compressed", "tight"] | None = "constrained"
) -> Figure:
    """A figure on the Agg canvas, whatever pyplot's backend is."""
    fig = Figure(figsize=(width, height), layout=layout)
    FigureCanvasAgg(fig)
    return fig


def save(fig: Figure, folder: Path, stem: str) -> tuple[Path, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    png, pdf = folder / f"{stem}.png", folder / f"{stem}.pdf"
    with matplotlib.rc_context(RC):
        fig.savefig(png, dpi=DPI)
        fig.set_layout_engine("none")  # keep the layout found for the PNG instead of solving it again
        fig.savefig(pdf, metadata={"CreationDate": None})  # same input, same bytes
    return png, pdf


def style(index: int) -> dict[str, Any]:
    """Colour, line style and marker of the index-th category (distinct for the first 28)."""
    n = len(LINE_COLOURS)
    return {
        "color": LINE_COLOURS[index % n],
        "linestyle": LINESTYLES[(index // n) % len(LINESTYLES)],
        "marker": MARKERS[index % len(MARKERS)],
    }


CONTROL_LINESTYLES = {"random": (0, (1, 1.5)), "edges": (0, (4, 2)), "oracle": (0, (6, 2, 1, 2))}


def explainer_styles(explainers: list[str]) -> dict[str, dict[str, Any]]:
    """One style per explainer, the same in every figure; controls get dashed lines, so that curves
    lying on top of each other (controls often do) stay visible."""
    out = {e: style(i) for i, e in enumerate(explainers)}
    for e, ls in CONTROL_LINESTYLES.items():
        if e in out:
            out[e]["linestyle"] = ls
    return out


def file_stem(*parts: Any) -> str:
    import re

    return "__".join(re.sub(r"[^A-Za-z0-9._-]+", "-", str(p)) for p in parts)


# ---------------------------------------------------------------- tile images


def band_index(band_names, wanted: tuple[str, ...]) -> tuple[list[int], bool]:
    """Indices of the wanted bands; (first three bands, False) when some are missing."""
    names = [str(b).lower() for b in band_names]
    if all(w in names for w in wanted):
        return [names.index(w) for w in wanted], True
    return list(range(min(3, len(names)))), False


def stretch(images: np.ndarray, bands: list[int]) -> np.ndarray:
    """(G, C, H, W) reflectance -> (G, H, W, 3) in [0, 1], 2-98 % linear stretch per band over all tiles."""
    x = images[:, bands].astype(np.float64)
    if x.shape[1] < 3:  # fewer than three bands: grey
        x = np.repeat(x[:, :1], 3, axis=1)
    lo = np.nanpercentile(x, STRETCH_PERCENTILES[0], axis=(0, 2, 3), keepdims=True)
    hi = np.nanpercentile(x, STRETCH_PERCENTILES[1], axis=(0, 2, 3), keepdims=True)
    out = (x - lo) / np.where(hi - lo > 0, hi - lo, 1.0)
    return np.clip(np.nan_to_num(out), 0, 1).transpose(0, 2, 3, 1)


def _show_map(ax, m: np.ndarray, mask: np.ndarray | None) -> str:
    """Draw one map scaled to its own largest magnitude; returns the colour map used."""
    m = np.nan_to_num(np.asarray(m, dtype=np.float64))
    a = float(np.max(np.abs(m))) or 1.0
    signed = m.min() < -1e-9 * a
    cmap = "RdBu_r" if signed else "viridis"
    ax.imshow(m, cmap=cmap, vmin=-a if signed else 0.0, vmax=a, interpolation="nearest")
    if mask is not None and mask.any() and not mask.all():
        ax.contour(mask.astype(float), levels=[0.5], colors="black" if signed else "white", linewidths=0.6)
    return cmap


def _blank(ax) -> None:
    ax.set_xticks([])
    ax.set_yticks([])
    for s in ax.spines.values():
        s.set_visible(False)


def wrap_name(name: str, width: int = 10) -> str:
    """Break a hyphenated key over lines of about ``width`` characters (at hyphens) for narrow panels."""
    lines, current = [], ""
    for part in name.split("-"):
        piece = part if not current else current + "-" + part
        if current and len(piece) > width:
            lines.append(current + "-")
            current = part
        else:
            current = piece
    return "\n".join([*lines, current])


def choose_gallery_tiles(targets: np.ndarray | None, n_tiles: int, max_tiles: int) -> list[int]:
    """Row indices of the gallery: the first tile of every target class (so each class is shown), then the
    next tiles in order, at most ``max_tiles``."""
    if targets is None or len(targets) == 0:
        return list(range(min(n_tiles, max_tiles)))
    t = np.asarray(targets)[:n_tiles]
    firsts = [int(np.flatnonzero(t == c)[0]) for c in dict.fromkeys(t.tolist())]
    rest = [i for i in range(n_tiles) if i not in firsts]
    return sorted((firsts + rest)[:max_tiles])


GALLERY_WIDTH = 7.0  # inches: a page's text width
GALLERY_MAPS_PER_PART = 6


def gallery_map_names(keys: Iterable[str], explainers: list[str]) -> list[str]:
    """The explainers a gallery shows, in their order: the run's explainers first, then any other map."""
    keys = list(keys)
    names = [e for e in explainers if f"map__{e}" in keys]
    return names + sorted(k[5:] for k in keys if k.startswith("map__") and k[5:] not in names)


def gallery_part_count(keys: Iterable[str], explainers: list[str]) -> int:
    """Pages of :func:`gallery_figures` for an artifact with these keys (at least one)."""
    return max(1, -(-len(gallery_map_names(keys, explainers)) // GALLERY_MAPS_PER_PART))


def gallery_figures(
    data: dict[str, np.ndarray],
    explainers: list[str],
    title: str,
    max_tiles: int = 6,
    parts: Iterable[int] | None = None,
) -> tuple[list[Figure], list[str]]:
    """The heatmap gallery as page-wide figures: rows are tiles (the first of every class first), columns
    natural and false colour, planted structures, verified evidence and up to six explainers per figure
    (more explainers: more figures, each repeating the tile columns). Colour bars for the per-tile map
    scales and for the evidence sit under each figure. ``parts``: only these pages (1-based; each page is
    the same figure whichever others are drawn), e.g. to draw pages in different processes."""
    notes: list[str] = []
    images_all = np.asarray(data["images"])
    targets_all = data.get("targets")
    rows = choose_gallery_tiles(targets_all, len(images_all), max_tiles)
    images = images_all[rows]
    band_names = data.get("band_names", np.array([]))
    nat_idx, ok1 = band_index(band_names, ("red", "green", "blue"))
    fc_idx, ok2 = band_index(band_names, ("nir", "red", "green"))
    if not (ok1 and ok2):
        notes.append(f"{title}: bands red/green/blue/nir not all named; showing the first three bands")
    natural, false = stretch(images, nat_idx), stretch(images, fc_idx)
    planted = np.asarray(data["planted"])[rows] if "planted" in data else None
    evidence = np.asarray(data["evidence"])[rows] if "evidence" in data else None
    names = gallery_map_names(data, explainers)
    chunks = [names[i : i + GALLERY_MAPS_PER_PART] for i in range(0, len(names), GALLERY_MAPS_PER_PART)] or [[]]
    tiles, classes = data.get("tiles"), data.get("class_names")
    if targets_all is not None and classes is not None:
        missing = [str(c) for i, c in enumerate(classes) if i not in set(np.asarray(targets_all).tolist())]
        if missing:
            notes.append(f"{title}: the run's gallery tiles hold no tile of class {', '.join(missing)}")
    ev_max = float(np.nanmax(evidence)) if evidence is not None and evidence.size else 1.0
    figs = []
    wanted = set(range(1, len(chunks) + 1) if parts is None else parts)
    for part, chunk in enumerate(chunks, start=1):
        if part not in wanted:
            continue
        cols = ["natural\ncolour", "false\ncolour"]
        cols += ["planted"] if planted is not None else []
        cols += ["verified\nevidence"] if evidence is not None else []
        cols += [wrap_name(e) for e in chunk]
        cell = GALLERY_WIDTH / len(cols)
        with matplotlib.rc_context(RC):
            fig = new_figure(GALLERY_WIDTH, cell * (len(rows) + 1.6) + 0.9)
            grid = fig.add_gridspec(len(rows) + 1, len(cols), height_ratios=[1.0] * len(rows) + [0.9])
            signed_any = False
            for i in range(len(rows)):
                mask = planted[i].astype(bool) if planted is not None else None
                panels: list[Any] = [("rgb", natural[i]), ("rgb", false[i])]
                if planted is not None:
                    panels.append(("mask", planted[i]))
                if evidence is not None:
                    panels.append(("evidence", evidence[i]))
                panels += [("map", np.asarray(data[f"map__{e}"])[rows[i]]) for e in chunk]
                for j, (kind, arr) in enumerate(panels):
                    ax = fig.add_subplot(grid[i, j])
                    if kind == "rgb":
                        ax.imshow(arr, interpolation="nearest")
                    elif kind == "mask":
                        ax.imshow(arr.astype(float), cmap="gray", vmin=0, vmax=1, interpolation="nearest")
                    elif kind == "evidence":
                        ax.imshow(np.nan_to_num(arr), cmap="magma", vmin=0, vmax=ev_max or 1.0, interpolation="nearest")
                    else:
                        signed_any |= _show_map(ax, arr, mask) == "RdBu_r"
                    _blank(ax)
                    if i == 0:
                        ax.set_title(cols[j], fontsize=6.5)
                label = f"tile {int(tiles[rows[i]])}" if tiles is not None else f"tile {rows[i] + 1}"
                if targets_all is not None and classes is not None:
                    t = int(np.asarray(targets_all)[rows[i]])
                    if 0 <= t < len(classes):
                        label += f"\n{classes[t]}"
                fig.axes[-len(panels)].set_ylabel(label, fontsize=6.5)
            # colour bars: the evidence scale and the explainers' per-tile scales
            bars = [("magma", 0.0, ev_max or 1.0, "verified evidence\n(prob. drop × coverage)")]
            bars.append(("viridis", 0.0, 1.0, "non-negative map: 0 to the tile's max"))
            if signed_any:
                bars.append(("RdBu_r", -1.0, 1.0, "signed map: −max to +max"))
            bar_grid = grid[len(rows), :].subgridspec(2, len(bars), wspace=0.35, height_ratios=[0.25, 0.75])
            for k, (cmap, lo, hi, label) in enumerate(bars):
                cax = fig.add_subplot(bar_grid[0, k])
                sm = matplotlib.cm.ScalarMappable(norm=matplotlib.colors.Normalize(lo, hi), cmap=cmap)
                cb = fig.colorbar(sm, cax=cax, orientation="horizontal")
                cb.set_label(label, fontsize=6)
                cb.ax.tick_params(labelsize=5.5)
                if cmap != "magma":
                    cb.set_ticks([lo, hi], labels=["−max" if lo < 0 else "0", "max"])
            suffix = f" (part {part} of {len(chunks)})" if len(chunks) > 1 else ""
            fig.suptitle(title + suffix, fontsize=8)
        figs.append(fig)
    return figs, notes


def gallery_figure(
    data: dict[str, np.ndarray], explainers: list[str], title: str, max_tiles: int = 6
) -> tuple[Figure, list[str]]:
    """The first page of :func:`gallery_figures` (all explainers when there are at most six)."""
    figs, notes = gallery_figures(data, explainers, title, max_tiles)
    return figs[0], notes


# ---------------------------------------------------------------- curves


def pool_curves(frame: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Combine per-seed curve summaries (mean, sd, n) into one mean, sd and n per key (pooled variance)."""
    f = frame.copy()
    f["n"] = pd.to_numeric(f["n"], errors="coerce").fillna(0).astype(float)
    f["sd"] = pd.to_numeric(f["sd"], errors="coerce").fillna(0.0)
    f = f[(f["n"] > 0) & np.isfinite(pd.to_numeric(f["mean"], errors="coerce"))]
    f["s1"] = f["n"] * f["mean"]
    f["s2"] = (f["n"] - 1).clip(lower=0) * f["sd"] ** 2 + f["n"] * f["mean"] ** 2
    agg = (
        f.groupby(keys, sort=False)
        .agg(n=("n", "sum"), s1=("s1", "sum"), s2=("s2", "sum"), x=("x", "mean"), label=("label", "first"))
        .reset_index()
    )
    agg["mean"] = agg["s1"] / agg["n"]
    var = (agg["s2"] - agg["n"] * agg["mean"] ** 2) / (agg["n"] - 1).clip(lower=1)
    agg["sd"] = np.sqrt(var.clip(lower=0))
    return agg.drop(columns=["s1", "s2"])


def _band(ax, x, mean, sd, n, st) -> None:
    half = 1.96 * sd / np.sqrt(np.maximum(n, 1))
    ax.plot(x, mean, color=st["color"], linestyle=st["linestyle"], linewidth=1.3)
    ax.fill_between(x, mean - half, mean + half, color=st["color"], alpha=0.15, linewidth=0)


def _legend(fig, names: list[str], styles: dict[str, dict], marker: bool = False) -> None:
    handles = [
        Line2D(
            [],
            [],
            color=styles[e]["color"],
            linestyle=styles[e]["linestyle"],
            marker=styles[e]["marker"] if marker else None,
            linewidth=1.3,
        )
        for e in names
    ]
    fig.legend(handles, names, loc="outside right center", frameon=False, title="explainer")


def deletion_insertion_figure(
    curves: pd.DataFrame, explainers: list[str], styles: dict[str, dict], title: str, ncols: int = 4
) -> Figure | None:
    """Small multiples: one panel per explainer with its deletion and insertion curves (one colour per
    curve kind, one line style per baseline), the ``random`` control's curves in grey in every panel as
    the reference a useful explainer must beat."""
    c = curves[curves["curve"].isin(["deletion", "insertion"])]
    if c.empty:
        return None
    c = c.assign(baseline=c["baseline"].fillna("").astype(str))
    pooled = pool_curves(c, ["explainer", "curve", "baseline", "step"])
    baselines = list(dict.fromkeys(pooled["baseline"]))
    kinds = [k for k in ("deletion", "insertion") if k in set(pooled["curve"])]
    names = [e for e in explainers if e in set(pooled["explainer"])]
    kind_colour = {"deletion": "#B2182B", "insertion": "#2166AC"}
    base_style = dict(zip(baselines, ["-", "--", ":", "-."], strict=False))
    ncols = min(ncols, len(names))
    nrows = -(-len(names) // ncols)

    def line(ax, e: str, kind: str, b: str, colour: str, width: float, band: bool) -> None:
        d = pooled[(pooled["explainer"] == e) & (pooled["curve"] == kind) & (pooled["baseline"] == b)]
        if d.empty:
            return
        d = d.sort_values("step")
        x, m = 100 * d["x"].to_numpy(), d["mean"].to_numpy()
        ax.plot(x, m, color=colour, linestyle=base_style.get(b, "-"), linewidth=width)
        if band:
            half = 1.96 * d["sd"].to_numpy() / np.sqrt(np.maximum(d["n"].to_numpy(), 1))
            ax.fill_between(x, m - half, m + half, color=colour, alpha=0.15, linewidth=0)

    with matplotlib.rc_context(RC):
        fig = new_figure(1.75 * ncols + 0.2, 1.45 * nrows + 0.9)
        axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True)
        for k, e in enumerate(names):
            ax = axes[k // ncols, k % ncols]
            for b in baselines:
                for kind in kinds:
                    if e != "random" and "random" in names:
                        line(ax, "random", kind, b, "0.65", 0.8, False)
                    line(ax, e, kind, b, kind_colour[kind], 1.3, True)
            ax.set_title(e, fontsize=7.5)
            ax.set_xlim(0, 100)
            ax.grid(alpha=0.3, linewidth=0.4)
            if k % ncols == 0:
                ax.set_ylabel("target prob.")
            if k + ncols >= len(names):
                ax.xaxis.set_tick_params(labelbottom=True)
        for k in range(len(names), nrows * ncols):
            axes[k // ncols, k % ncols].set_visible(False)
        handles = [Line2D([], [], color=kind_colour[k], linewidth=1.3) for k in kinds]
        labels = [f"{k} ({'fast drop is good' if k == 'deletion' else 'fast rise is good'})" for k in kinds]
        if len(baselines) > 1:
            handles += [Line2D([], [], color="black", linestyle=base_style[b], linewidth=1) for b in baselines]
            labels += [f"baseline: {b or 'default'}" for b in baselines]
        if "random" in names:
            handles.append(Line2D([], [], color="0.65", linewidth=0.8))
            labels.append("random control (reference)")
        fig.legend(handles, labels, loc="outside lower center", ncol=min(4, len(labels)), frameon=False)
        fig.suptitle(
            f"{title}\nx: % of the tile's pixels removed or inserted, most relevant first; "
            "mean over tiles and seeds, band = mean ± 1.96 sd/√n",
            fontsize=8,
        )
    return fig


def randomization_figure(
    curves: pd.DataFrame, explainers: list[str], styles: dict[str, dict], title: str
) -> Figure | None:
    kinds = {
        "randomization-spearman": "Spearman rank correlation\n(original vs randomized map)",
        "randomization-ssim": "SSIM\n(original vs randomized map)",
    }
    c = curves[curves["curve"].isin(list(kinds))]
    if c.empty:
        return None
    pooled = pool_curves(c, ["explainer", "curve", "step"])
    present = [k for k in kinds if k in set(pooled["curve"])]
    names = [e for e in explainers if e in set(pooled["explainer"])]
    with matplotlib.rc_context(RC):
        fig = new_figure(3.6 * len(present) + 1.6, 3.2)
        axes = fig.subplots(1, len(present), squeeze=False)[0]
        for ax, kind in zip(axes, present, strict=True):
            steps: dict[int, str] = {}
            for e in names:
                d = pooled[(pooled["explainer"] == e) & (pooled["curve"] == kind)].sort_values("step")
                if d.empty:
                    continue
                steps.update(zip(d["step"].astype(int), d["label"].fillna("").astype(str), strict=True))
                _band(
                    ax,
                    d["step"].to_numpy(),
                    d["mean"].to_numpy(),
                    d["sd"].to_numpy(),
                    d["n"].to_numpy(),
                    styles[e],
                )
                ax.plot(
                    d["step"],
                    d["mean"],
                    linestyle="none",
                    marker=styles[e]["marker"],
                    markersize=4,
                    markerfacecolor="none",  # hollow: coinciding curves stay visible
                    color=styles[e]["color"],
                )
            ticks = sorted(steps)
            ax.set_xticks(ticks)
            ax.set_xticklabels([steps[t] or str(t) for t in ticks], rotation=40, ha="right")
            ax.set_ylabel(kinds[kind])
            ax.axhline(0, color="0.5", linewidth=0.6)
            ax.grid(alpha=0.3, linewidth=0.5)
        _legend(fig, names, styles, marker=True)
        fig.supxlabel("layers randomized in cascade, from the output down to the named layer", fontsize=8)
        fig.suptitle(f"{title}: model-parameter randomization, mean over tiles and seeds (band: 95 % CI)", fontsize=9)
    return fig


# ---------------------------------------------------------------- critical-difference diagram


def cd_figure(names: list[str], ranks: np.ndarray, cd: float, title: str) -> Figure:
    """Average ranks on a line (1 = best, at the left); bars join explainers closer than CD."""
    from xbench.report.stats import cd_groups

    order = np.argsort(ranks, kind="stable")
    r = np.asarray(ranks, dtype=float)[order]
    names = [names[i] for i in order]
    k = len(names)
    groups = cd_groups(r, cd)
    n_left = (k + 1) // 2
    rows = max(n_left, k - n_left)
    top_gap, row_h, grp_h = 0.35, 0.32, 0.13
    y_rows0 = -(0.25 + grp_h * max(len(groups), 1))
    height = 1.1 + 0.22 * rows + 0.1 * len(groups)
    with matplotlib.rc_context(RC):
        fig = new_figure(7.0, height, layout=None)
        fig.subplots_adjust(left=0.24, right=0.76, top=0.80, bottom=0.04)
        ax = fig.add_subplot()
        lo, hi = 1, max(k, 2)
        ax.set_xlim(lo - 0.05 * (hi - lo), hi + 0.05 * (hi - lo))
        ax.set_ylim(y_rows0 - row_h * rows, top_gap + 0.45)
        ax.axis("off")
        ax.plot([lo, hi], [0, 0], color="black", linewidth=1.0)
        for t in range(lo, hi + 1):
            ax.plot([t, t], [0, 0.08], color="black", linewidth=1.0)
            ax.text(t, 0.12, str(t), ha="center", va="bottom", fontsize=8)
        ax.text((lo + hi) / 2, 0.38, "average rank (1 = best)", ha="center", va="bottom", fontsize=8)
        if np.isfinite(cd):
            ax.plot([lo, lo + cd], [top_gap + 0.3, top_gap + 0.3], color="black", linewidth=1.6)
            for xx in (lo, lo + cd):
                ax.plot([xx, xx], [top_gap + 0.25, top_gap + 0.35], color="black", linewidth=1.0)
            ax.text(lo + cd + 0.05 * (hi - lo), top_gap + 0.3, f"CD = {cd:.2f}", va="center", fontsize=8)
        x_left, x_right = lo - 0.04 * (hi - lo), hi + 0.04 * (hi - lo)
        for i, (name, rank) in enumerate(zip(names, r, strict=True)):
            left = i < n_left
            row = i if left else k - 1 - i
            y = y_rows0 - row_h * row
            x_end = x_left if left else x_right
            ax.plot([rank, rank, x_end], [0, y, y], color="0.25", linewidth=0.8)
            ax.text(
                x_end + (-0.015 if left else 0.015) * (hi - lo),
                y,
                f"{name} ({rank:.2f})",
                ha="right" if left else "left",
                va="center",
                fontsize=8,
                clip_on=False,
            )
        for g, (a, b) in enumerate(groups):
            y = -0.15 - grp_h * g
            ax.plot([r[a] - 0.03, r[b] + 0.03], [y, y], color="black", linewidth=3.0, solid_capstyle="round")
        fig.suptitle(title, fontsize=9)
    return fig


# ---------------------------------------------------------------- reliance


def reliance_figure(reliance: pd.DataFrame, title: str) -> Figure | None:
    r = reliance.copy()
    for col in ("mean_drop", "ci_low", "ci_high"):
        r[col] = pd.to_numeric(r[col], errors="coerce")
    r = r[np.isfinite(r["mean_drop"])]
    if r.empty:
        return None
    kinds = sorted(set(r["kind"].astype(str)) - {"cue"}) + (["cue"] if "cue" in set(r["kind"]) else [])
    models = list(dict.fromkeys(r["model"].astype(str)))
    width = 0.8 / len(models)
    with matplotlib.rc_context(RC):
        fig = new_figure(max(4.0, 0.9 * len(kinds) * max(1, len(models) / 2) + 2.0), 3.2)
        ax = fig.add_subplot()
        for m_i, model in enumerate(models):
            colour = OKABE_ITO[m_i % 7]
            for k_i, kind in enumerate(kinds):
                d = r[(r["model"].astype(str) == model) & (r["kind"].astype(str) == kind)].sort_values("seed")
                if d.empty:
                    continue
                x0 = k_i - 0.4 + width * (m_i + 0.5)
                ax.bar(
                    x0,
                    d["mean_drop"].mean(),
                    width=width * 0.9,
                    color=colour,
                    alpha=0.55,
                    label=model if k_i == 0 else None,
                )
                xs = x0 + np.linspace(-0.25, 0.25, len(d)) * width if len(d) > 1 else np.array([x0])
                low = (d["mean_drop"] - d["ci_low"]).clip(lower=0).fillna(0)
                high = (d["ci_high"] - d["mean_drop"]).clip(lower=0).fillna(0)
                ax.errorbar(
                    xs,
                    d["mean_drop"],
                    yerr=[low, high],
                    fmt="o",
                    markersize=3,
                    color="black",
                    elinewidth=0.8,
                    capsize=2,
                )
        ax.axhline(0, color="0.4", linewidth=0.7)
        ax.set_xticks(range(len(kinds)))
        ax.set_xticklabels(kinds)
        ax.set_xlabel(
            "structure type removed in the counterfactual twin" + (" (cue: the spurious cue)" if "cue" in kinds else "")
        )
        ax.set_ylabel("mean drop in target-class\nprobability (Δp)")
        ax.legend(title="model", frameon=False, loc="best")
        ax.grid(axis="y", alpha=0.3, linewidth=0.5)
        fig.suptitle(
            f"{title}: interventional importance\nbars: mean over seeds; points: single seeds with 95 % CI",
            fontsize=9,
        )
    return fig


# ---------------------------------------------------------------- cost vs quality


def _place_labels(ax, points: list[tuple[str, float, float]], min_gap: float = 11.0) -> None:
    """Label points, nudging a label up (in points) while it would overlap one already placed."""
    ax.autoscale_view()
    scale = 72.0 / ax.figure.dpi
    placed: list[tuple[float, float, float]] = []  # x, y (points), text width (points)
    for name, x, y in sorted(points, key=lambda t: t[2]):
        px, py = (v * scale for v in ax.transData.transform((x, y)))
        width = 4.2 * len(name)
        dy = 3.0
        while any(abs(py + dy - qy) < min_gap and px < qx + qw and qx < px + width for qx, qy, qw in placed):
            dy += min_gap
        placed.append((px, py + dy, width))
        ax.annotate(
            name,
            (x, y),
            xytext=(4, dy),
            textcoords="offset points",
            fontsize=7,
            arrowprops={"arrowstyle": "-", "color": "0.6", "linewidth": 0.5} if dy > 3.0 else None,
        )


def cost_quality_figure(
    points: pd.DataFrame, explainers: list[str], styles: dict[str, dict], y_label: str, title: str
) -> Figure | None:
    """points: explainer, block, seconds (per tile), value. One panel per task x model block and one point
    per explainer in it, so that every point in a panel was measured on the same tiles with the same model
    (averaging over blocks would compare methods run on different sets of blocks). Controls are drawn
    hollow: they are anchors, not candidates."""
    p = points[np.isfinite(points["seconds"]) & (points["seconds"] > 0) & np.isfinite(points["value"])]
    if p.empty:
        return None
    blocks = list(dict.fromkeys(p["block"]))
    ncols = min(3, len(blocks))
    nrows = -(-len(blocks) // ncols)
    controls = ("random", "edges", "oracle")
    with matplotlib.rc_context(RC):
        fig = new_figure(3.1 * ncols + 0.3, 2.7 * nrows + 0.5)
        axes = fig.subplots(nrows, ncols, squeeze=False, sharey=True)
        for k, block in enumerate(blocks):
            ax = axes[k // ncols, k % ncols]
            d = p[p["block"] == block]
            labels: list[tuple[str, float, float]] = []
            for e in [e for e in explainers if e in set(d["explainer"])]:
                row = d[d["explainer"] == e].iloc[0]
                st = styles[e]
                hollow = e in controls
                ax.scatter(
                    [row["seconds"]],
                    [row["value"]],
                    s=30,
                    marker=st["marker"],
                    facecolors="none" if hollow else st["color"],
                    edgecolors=st["color"] if hollow else "black",
                    linewidths=0.9 if hollow else 0.4,
                    zorder=3,
                )
                labels.append((e, float(row["seconds"]), float(row["value"])))
            ax.set_xscale("log")
            _place_labels(ax, labels)
            ax.set_title(block)
            ax.set_xlabel("explainer time per tile (s, log)")
            if k % ncols == 0:
                ax.set_ylabel(y_label)
            ax.grid(alpha=0.3, linewidth=0.5, which="both")
        for k in range(len(blocks), nrows * ncols):
            axes[k // ncols, k % ncols].set_visible(False)
        # wrapped to the figure's width: one panel is ~3.4 in wide, too narrow for the title on one line
        width_chars = max(30, int(fig.get_figwidth() * 12))
        fig.suptitle(textwrap.fill(title + " (hollow markers: controls)", width_chars), fontsize=9)
    return fig


# ---------------------------------------------------------------- one tile, every explainer

CORE_COVERAGE = 0.5  # the planted truth's default core threshold (coverage at or above it)


def tile_figure(
    data: dict[str, np.ndarray],
    index: int,
    explainers: list[str],
    values: dict[str, list[str]],
    title: str,
    ncols: int = 5,
) -> Figure:
    """One tile: natural and false colour, planted truth (core and fringe when coverage is known), verified
    evidence, then one panel per explainer (its map, a colour bar, its metric values underneath).

    ``values`` maps an explainer to lines of text ("mass-accuracy 0.61"). Bands are stretched 2-98 % over
    this tile alone; each map is scaled to its own largest magnitude (viridis, or RdBu when signed).
    """
    images = np.asarray(data["images"])[index : index + 1]
    band_names = data.get("band_names", np.array([]))
    nat_idx, _ = band_index(band_names, ("red", "green", "blue"))
    fc_idx, _ = band_index(band_names, ("nir", "red", "green"))
    natural, false = stretch(images, nat_idx)[0], stretch(images, fc_idx)[0]
    planted = np.asarray(data["planted"])[index].astype(bool) if "planted" in data else None
    coverage = np.asarray(data["coverage"])[index] if "coverage" in data else None
    evidence = np.asarray(data["evidence"])[index] if "evidence" in data else None
    names = [e for e in explainers if f"map__{e}" in data]
    names += sorted(k[5:] for k in data if k.startswith("map__") and k[5:] not in names)
    truth_panels: list[tuple[str, str, Any]] = [
        ("natural colour\n(red, green, blue)", "rgb", natural),
        ("false colour\n(nir, red, green)", "rgb", false),
    ]
    if planted is not None:
        if coverage is not None:
            if coverage.ndim == 3:  # one plane per structure type: the largest coverage per pixel
                coverage = coverage.max(axis=0)
            core_fringe = np.where(coverage >= CORE_COVERAGE, 2, np.where(coverage > 0, 1, 0))
            truth_panels.append(("planted truth\n(core and fringe)", "truth", core_fringe))
        else:
            truth_panels.append(("planted structures", "truth", planted.astype(int) * 2))
    if evidence is not None:
        truth_panels.append(("verified evidence\n(model-checked)", "map", evidence))
    n_rows = 1 + -(-len(names) // ncols)
    truth_cmap = ListedColormap(["#f2f2f2", "#f0a35e", "#8c2d04"])
    with matplotlib.rc_context(RC):
        fig = new_figure(2.0 * ncols, 2.35 * n_rows + 0.5)
        grid = fig.add_gridspec(n_rows, ncols)
        for j, (label, kind, arr) in enumerate(truth_panels[:ncols]):
            ax = fig.add_subplot(grid[0, j])
            if kind == "rgb":
                ax.imshow(arr, interpolation="nearest")
            elif kind == "truth":
                ax.imshow(arr, cmap=truth_cmap, norm=BoundaryNorm([-0.5, 0.5, 1.5, 2.5], 3), interpolation="nearest")
                ax.legend(
                    handles=[Patch(color="#8c2d04", label="core"), Patch(color="#f0a35e", label="fringe")]
                    if coverage is not None
                    else [Patch(color="#8c2d04", label="planted")],
                    loc="upper center",
                    bbox_to_anchor=(0.5, -0.02),
                    ncol=2,
                    frameon=False,
                    fontsize=6,
                )
            else:
                im = ax.imshow(np.nan_to_num(arr), cmap="magma", vmin=0, interpolation="nearest")
                fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03).ax.tick_params(labelsize=6)
            ax.set_title(label, fontsize=7)
            _blank(ax)
        for k, e in enumerate(names):
            ax = fig.add_subplot(grid[1 + k // ncols, k % ncols])
            m = np.nan_to_num(np.asarray(data[f"map__{e}"])[index].astype(np.float64))
            a = float(np.max(np.abs(m))) or 1.0
            signed = m.min() < -1e-9 * a
            im = ax.imshow(m, cmap="RdBu_r" if signed else "viridis", vmin=-a if signed else 0, vmax=a)
            if planted is not None and planted.any() and not planted.all():
                ax.contour(planted.astype(float), levels=[0.5], colors="black" if signed else "white", linewidths=0.6)
            fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03).ax.tick_params(labelsize=6)
            ax.set_title(e, fontsize=8, fontweight="bold")
            ax.set_xlabel("\n".join(values.get(e, ["no values recorded"])), fontsize=6.5, linespacing=1.15)
            ax.set_xticks([])
            ax.set_yticks([])
        fig.suptitle(title, fontsize=9)
    return fig
