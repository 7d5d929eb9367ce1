"""The activation-cluster figure: which cluster drives which class, and what each cluster looks like.

Design (ours): a cluster x class heat map of the mean *drop* of the class's probability when the cluster is
replaced inside the network (original minus replaced, on the tiles of that class where the cluster
occurs; positive = the cluster supports the class), on a diverging scale centred on 0, each cell annotated
with the mean, its 95% t-interval (mean +- t(0.975, n-1) sd / sqrt(n); common practice) and n ("no tiles"
when no explained tile of the class holds the cluster). Row labels
give each cluster's colour, the structure type it is labelled with and that overlap (IoU), or "no type"
with the best overlap when it is below the explainer's minimum. A strip above shows up to four tiles in
natural colour over their cluster maps, in the row colours.
"""

from __future__ import annotations

from typing import Any

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.colors import BoundaryNorm, ListedColormap, TwoSlopeNorm
from matplotlib.figure import Figure, SubFigure
from scipy import stats

from xbench.report.figures import OKABE_ITO, RC, _blank, band_index, new_figure, stretch


def cluster_colours(n: int) -> ListedColormap:
    """One categorical colour per cluster (Okabe & Ito up to eight, then viridis steps)."""
    colours = (
        OKABE_ITO[:n] if n <= len(OKABE_ITO) else [matplotlib.colormaps["viridis"](i / max(n - 1, 1)) for i in range(n)]
    )
    return ListedColormap(colours)


def drop_table(score_changes: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per (cluster, class): mean drop, 95% t-interval low and high, and n, over the finite values of
    ``score_changes`` (n_clusters, N, n_classes) (the explainer leaves NaN where a tile is not of the class
    or lacks the cluster). Interval NaN for n < 2."""
    d = np.asarray(score_changes, dtype=np.float64)
    n = np.isfinite(d).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, np.nansum(d, axis=1) / np.maximum(n, 1), np.nan)
        sq = np.nansum((d - mean[:, None, :]) ** 2, axis=1)
        sd = np.sqrt(sq / np.maximum(n - 1, 1))
        half = stats.t.ppf(0.975, np.maximum(n - 1, 1)) * sd / np.sqrt(np.maximum(n, 1))
    half = np.where(n >= 2, half, np.nan)
    return mean, mean - half, mean + half, n


def cluster_labels(n_clusters: int, rows: pd.DataFrame | None) -> list[str]:
    """'cluster c: type (IoU 0.41)' or 'cluster c: no type (best IoU 0.05)' from the concept rows."""
    labels = []
    for c in range(n_clusters):
        label = f"cluster {c}"
        if rows is not None and len(rows):
            sel = rows[rows["concept"] == f"cluster-{c}"]
            if len(sel):
                r = sel.iloc[0]
                iou = r.get("iou")
                iou_text = f"IoU {float(iou):.2f}" if iou is not None and np.isfinite(float(iou)) else "IoU n/a"
                matched = r.get("matched_type")
                if isinstance(matched, str) and matched:
                    label += f": {matched} ({iou_text})"
                else:
                    label += f": no type (best {iou_text})"
        labels.append(label)
    return labels


def cluster_drop_figure(
    data: dict[str, np.ndarray], rows: pd.DataFrame | None, title: str, max_tiles: int = 4
) -> Figure:
    """The figure described in the module docstring. ``data``: a ``clusters__*.npz`` artifact
    (``score_changes``, ``cluster_maps``, ``images``, ``class_names``); ``rows``: the concept rows of that
    run's ``activation-clusters`` cell (for the row labels), or None."""
    changes = np.asarray(data["score_changes"], dtype=np.float64)
    k, _, n_classes = changes.shape
    classes = [str(c) for c in data.get("class_names", [])][:n_classes] or [f"class {j}" for j in range(n_classes)]
    mean, lo, hi, n = drop_table(changes)
    labels = cluster_labels(k, rows)
    cmap_clusters = cluster_colours(max(k, 1))
    images = np.asarray(data.get("images", np.zeros((0, 3, 1, 1))))
    maps = np.asarray(data.get("cluster_maps", np.zeros((0, 1, 1), int)))
    g = min(len(images), len(maps), max_tiles)
    with matplotlib.rc_context(RC):
        fig = new_figure(max(2.0 + 1.5 * n_classes, 1.4 * g) + 2.2, 1.2 + 0.45 * k + (1.6 if g else 0))
        # with gallery tiles: the cluster maps on top, the drop table below; without: the table alone
        top: SubFigure | None = None
        table: Figure | SubFigure = fig
        if g:
            top, table = fig.subfigures(2, 1, squeeze=False, height_ratios=[1.6, 0.45 * k + 1.0])[:, 0]
        if top is not None:
            band_names = data.get("band_names", np.array(["blue", "green", "red"]))
            idx, _ = band_index(band_names, ("red", "green", "blue"))
            rgb = stretch(images[:g], idx)
            axes = top.subplots(1, g, squeeze=False)[0]
            h, w = images.shape[-2:]
            norm = BoundaryNorm(np.arange(-0.5, max(k, 1) + 0.5), cmap_clusters.N)
            for i, ax in enumerate(axes):
                ax.imshow(rgb[i], interpolation="nearest")
                ax.imshow(
                    np.ma.masked_less(maps[i], 0),
                    cmap=cmap_clusters,
                    norm=norm,
                    alpha=0.55,
                    interpolation="nearest",
                    extent=(-0.5, w - 0.5, h - 0.5, -0.5),
                )
                _blank(ax)
                ax.set_title(f"tile {i + 1}", fontsize=7)
            top.suptitle(f"{title}: cluster maps over natural colour", fontsize=8)
        ax = table.subplots()
        finite = np.abs(mean[np.isfinite(mean)])
        vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
        im = ax.imshow(
            np.ma.masked_invalid(mean),
            cmap="RdBu_r",
            norm=TwoSlopeNorm(vcenter=0.0, vmin=-vmax, vmax=vmax),
            aspect="auto",
        )
        for c in range(k):
            for j in range(n_classes):
                if n[c, j] == 0:
                    text = "no tiles"
                elif np.isfinite(lo[c, j]):
                    text = f"{mean[c, j]:+.3f}\n[{lo[c, j]:+.3f}, {hi[c, j]:+.3f}]\nn={n[c, j]}"
                else:
                    text = f"{mean[c, j]:+.3f}\nn={n[c, j]}"
                strong = np.isfinite(mean[c, j]) and abs(mean[c, j]) > 0.6 * vmax
                ax.text(j, c, text, ha="center", va="center", fontsize=6, color="white" if strong else "black")
        ax.set_xticks(range(n_classes), classes)
        ax.set_yticks(range(k), labels)
        for c, tick in enumerate(ax.get_yticklabels()):
            tick.set_color("black")
            tick.set_bbox({"facecolor": cmap_clusters(c), "alpha": 0.35, "edgecolor": "none", "pad": 1.5})
        ax.set_xlabel("class whose probability is measured (on tiles of that class)")
        ax.set_ylabel("replaced cluster: labelled type (overlap)")
        ax.spines[:].set_visible(False)
        bar = table.colorbar(im, ax=ax, shrink=0.9)
        bar.set_label("mean probability drop (original - replaced)")
        table.suptitle(f"{title}: class-probability drop when a cluster is replaced, 95% t-intervals", fontsize=8)
    return fig


def rows_for(concepts: pd.DataFrame | None, task: str, model: str, seed: int) -> pd.DataFrame | None:
    """The ``activation-clusters`` concept rows of one (task, model, seed), or None."""
    if concepts is None or not len(concepts):
        return None
    sel = concepts[
        (concepts["task"] == task)
        & (concepts["model"] == model)
        & (concepts["seed"] == seed)
        & (concepts["explainer"] == "activation-clusters")
    ]
    return sel if len(sel) else None


__all__: list[Any] = ["cluster_drop_figure", "drop_table", "cluster_labels", "rows_for"]
