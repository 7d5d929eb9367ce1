"""Report figures, drawn with matplotlib's object API on the Agg canvas (no pyplot, no display needed).

Palette: Okabe & Ito's colour-blind-safe colours for categories (explainers, models, classes, clusters),
with line styles and markers cycling as a second cue past seven categories; viridis for non-negative maps
and the diverging RdBu for signed ones (both readable with the common colour-vision deficiencies).

Tile images: natural colour is (red, green, blue), false colour (nir, red, green); each band is stretched
linearly between its 2nd and 98th percentile over all tiles in the figure (so tiles are comparable) and
clipped to [0, 1].
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

OKABE_ITO = ["#0072B2", "#D55E00", "#009E73", "#E69F00", "#CC79A7", "#56B4E9", "#000000", "#F0E442"]
LINE_COLOURS = OKABE_ITO[:7]  # yellow is too pale for thin lines on white
LINESTYLES = ["-", "--", ":", "-."]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "*"]
STRETCH_PERCENTILES = (2.0, 98.0)
DPI = 150

RC = {
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


def new_figure(width: float, height: float, layout: str | None = "constrained") -> Figure:
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


def gallery_figure(
    data: dict[str, np.ndarray], explainers: list[str], title: str, max_tiles: int = 6
) -> tuple[Figure, list[str]]:
    """Rows: tiles. Columns: natural and false colour, planted mask, verified evidence, explainer maps."""
    notes: list[str] = []
    images = np.asarray(data["images"])
    g = min(len(images), max_tiles)
    images = images[:g]
    band_names = data.get("band_names", np.array([]))
    nat_idx, ok1 = band_index(band_names, ("red", "green", "blue"))
    fc_idx, ok2 = band_index(band_names, ("nir", "red", "green"))
    if not (ok1 and ok2):
        notes.append(f"{title}: bands red/green/blue/nir not all named; showing the first three bands")
    natural, false = stretch(images, nat_idx), stretch(images, fc_idx)
    planted = np.asarray(data["planted"])[:g] if "planted" in data else None
    evidence = np.asarray(data["evidence"])[:g] if "evidence" in data else None
    maps = [(e, np.asarray(data[f"map__{e}"])[:g]) for e in explainers if f"map__{e}" in data]
    extra = sorted(k[5:] for k in data if k.startswith("map__") and k[5:] not in explainers)
    maps += [(e, np.asarray(data[f"map__{e}"])[:g]) for e in extra]
    cols = ["natural colour\n(red, green, blue)", "false colour\n(nir, red, green)"]
    if planted is not None:
        cols.append("planted\nstructures")
    if evidence is not None:
        cols.append("verified\nevidence")
    cols += [e for e, _ in maps]
    size = 1.15
    with matplotlib.rc_context(RC):
        fig = new_figure(size * len(cols) + 0.4, size * g + 1.0)
        axes = np.atleast_2d(fig.subplots(g, len(cols), squeeze=False))
        tiles = data.get("tiles")
        targets, classes = data.get("targets"), data.get("class_names")
        cmaps = set()
        for i in range(g):
            mask = planted[i].astype(bool) if planted is not None else None
            panels: list[Any] = [("rgb", natural[i]), ("rgb", false[i])]
            if planted is not None:
                panels.append(("mask", planted[i]))
            if evidence is not None:
                panels.append(("map", evidence[i]))
            panels += [("map", m[i]) for _, m in maps]
            for j, (kind, arr) in enumerate(panels):
                ax = axes[i, j]
                if kind == "rgb":
                    ax.imshow(arr, interpolation="nearest")
                elif kind == "mask":
                    ax.imshow(arr.astype(float), cmap="gray", vmin=0, vmax=1, interpolation="nearest")
                else:
                    cmaps.add(_show_map(ax, arr, mask))
                _blank(ax)
                if i == 0:
                    ax.set_title(cols[j], fontsize=7)
            label = f"tile {int(tiles[i])}" if tiles is not None and i < len(tiles) else f"tile {i + 1}"
            if targets is not None and classes is not None and i < len(targets):
                t = int(targets[i])
                if 0 <= t < len(classes):
                    label += f"\ntarget: {classes[t]}"
            axes[i, 0].set_ylabel(label, fontsize=7)
        fig.suptitle(title, fontsize=9)
        scale = (
            "viridis: 0 to the map's maximum"
            if cmaps == {"viridis"}
            else "viridis: 0 to max (non-negative maps); RdBu: -max to +max (signed maps)"
        )
        fig.supxlabel(
            f"Bands stretched 2-98 % over the tiles shown. Maps scaled per tile ({scale}); "
            "outline: planted structures.",
            fontsize=7,
        )
    return fig, notes


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
    curves: pd.DataFrame, explainers: list[str], styles: dict[str, dict], title: str
) -> Figure | None:
    c = curves[curves["curve"].isin(["deletion", "insertion"])]
    if c.empty:
        return None
    c = c.assign(baseline=c["baseline"].fillna("").astype(str))
    pooled = pool_curves(c, ["explainer", "curve", "baseline", "step"])
    baselines = list(dict.fromkeys(pooled["baseline"]))
    kinds = [k for k in ("deletion", "insertion") if k in set(pooled["curve"])]
    names = [e for e in explainers if e in set(pooled["explainer"])]
    with matplotlib.rc_context(RC):
        fig = new_figure(3.2 * len(kinds) + 1.6, 2.6 * len(baselines) + 0.4)
        axes = fig.subplots(len(baselines), len(kinds), squeeze=False)
        for i, b in enumerate(baselines):
            for j, kind in enumerate(kinds):
                ax = axes[i, j]
                for e in names:
                    d = pooled[(pooled["explainer"] == e) & (pooled["curve"] == kind) & (pooled["baseline"] == b)]
                    if d.empty:
                        continue
                    d = d.sort_values("step")
                    _band(
                        ax,
                        100 * d["x"].to_numpy(),
                        d["mean"].to_numpy(),
                        d["sd"].to_numpy(),
                        d["n"].to_numpy(),
                        styles[e],
                    )
                verb = "removed" if kind == "deletion" else "inserted"
                ax.set_xlabel(f"pixels {verb}, most relevant first (% of tile)")
                ax.set_ylabel("target-class probability")
                ax.set_title(f"{kind}" + (f" (baseline: {b})" if b else ""))
                ax.set_xlim(0, 100)
                ax.grid(alpha=0.3, linewidth=0.5)
        _legend(fig, names, styles)
        fig.suptitle(f"{title}: mean over tiles and seeds, band = mean ± 1.96 sd/√n", fontsize=9)
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
    """points: explainer, block, seconds (per tile), value. One faint point per block, a labelled mean."""
    p = points[np.isfinite(points["seconds"]) & (points["seconds"] > 0) & np.isfinite(points["value"])]
    if p.empty:
        return None
    names = [e for e in explainers if e in set(p["explainer"])]
    means: list[tuple[str, float, float]] = []
    with matplotlib.rc_context(RC):
        fig = new_figure(6.0, 4.0)
        ax = fig.add_subplot()
        for e in names:
            d = p[p["explainer"] == e]
            st = styles[e]
            if len(d) > 1:
                ax.scatter(
                    d["seconds"],
                    d["value"],
                    s=12,
                    color=st["color"],
                    marker=st["marker"],
                    alpha=0.35,
                    linewidths=0,
                )
            sx, sy = float(np.exp(np.log(d["seconds"]).mean())), float(d["value"].mean())
            ax.scatter(
                [sx],
                [sy],
                s=36,
                color=st["color"],
                marker=st["marker"],
                edgecolors="black",
                linewidths=0.5,
                zorder=3,
            )
            means.append((e, sx, sy))
        ax.set_xscale("log")
        _place_labels(ax, means)
        ax.set_xlabel("explainer time per tile (s, log scale)")
        ax.set_ylabel(y_label)
        ax.grid(alpha=0.3, linewidth=0.5, which="both")
        fig.suptitle(title, fontsize=9)
    return fig
