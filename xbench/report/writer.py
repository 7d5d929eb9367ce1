"""``write_report``: one call reads run folders and writes the whole report (prints nothing).

Output folder::

    tables.md  tables.tex  report.html      (as chosen by ``formats``)
    methods.md  refs.bib                    methods text with counts from the run, and its BibTeX
    summary.csv  ranks.csv                  every number in the tables, tidy
    figures/*.png  figures/*.pdf            gallery, curves, randomization, CD diagrams, clusters, reliance,
                                            cost vs quality
    report.log                              what was left out and why
"""

from __future__ import annotations

import base64
import html
import logging
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xbench.errors import XbenchInputError
from xbench.report import concept_figures as CF
from xbench.report import figures as F
from xbench.report import tables as T
from xbench.report.bib import render_bib
from xbench.report.compare import Column, Summary, summarize
from xbench.report.load import RunSet, load_runs
from xbench.report.methods import methods_text

FORMATS = ("md", "tex", "html")


@dataclass
class ReportSummary:
    """What ``write_report`` wrote and what it had to leave out."""

    out_dir: Path
    paths: list[Path] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    n_tables: int = 0
    n_figures: int = 0

    def __str__(self) -> str:
        return (
            f"report in {self.out_dir}: {self.n_tables} tables, {self.n_figures} figures, "
            f"{len(self.paths)} files, {len(self.warnings)} notes"
        )


def _formats(formats: Any) -> list[str]:
    if isinstance(formats, str):
        formats = [f for f in formats.split(",") if f.strip()]
    out = [str(f).strip().lower() for f in formats]
    bad = [f for f in out if f not in FORMATS]
    if bad:
        raise XbenchInputError(
            "report formats", f"unknown format {bad[0]!r}", expected=", ".join(FORMATS), found=",".join(out)
        )
    return list(dict.fromkeys(out))


def choose_headline(summary: Summary, metric: str, truth: str, log: list[str]) -> Column | None:
    for c in summary.columns:
        if c.metric == metric and c.truth == truth:
            return c
    fallback = next(
        (c for c in summary.columns if c.info.higher_is_better is not None and c.info.family not in ("cost",)),
        None,
    )
    log.append(
        f"headline metric {metric} ({truth}) not in the records; "
        + (f"using {fallback.label} for the cost figure and methods text" if fallback else "none used")
    )
    return fallback


# ---------------------------------------------------------------- figures


def cost_points(runs: RunSet, summary: Summary, column: Column, log: list[str]) -> pd.DataFrame:
    """Seconds per tile per (task, model, explainer), from the manifests' cell costs, else from records."""
    rows = []
    for m in runs.manifests:
        task = m.get("task")
        for c in m.get("cells") or []:
            if c.get("status") not in ("ok", None):
                continue
            cost = c.get("cost") or {}  # the explainer's own time (a cell's "seconds" include the metrics)
            secs, tiles = cost.get("seconds"), cost.get("tiles")
            if secs is not None and tiles:
                rows.append(
                    {
                        "task": task,
                        "model": c.get("model"),
                        "explainer": c.get("explainer"),
                        "seconds": float(secs) / float(tiles),
                    }
                )
    frame = pd.DataFrame(rows, columns=["task", "model", "explainer", "seconds"])
    if frame.empty:
        rec = runs.records[runs.records["metric"] == "seconds"]
        if rec.empty:
            log.append("cost vs quality: no timings in the manifests and no 'seconds' records; figure left out")
            return frame.assign(value=[])
        log.append("cost vs quality: timings from the 'seconds' records (no per-cell costs in the manifests)")
        frame = (
            rec.groupby(["task", "model", "explainer"], as_index=False)["value"]
            .mean()
            .rename(columns={"value": "seconds"})
        )
    secs = frame.groupby(["task", "model", "explainer"], as_index=False)["seconds"].mean()
    t = summary.table
    vals = t[(t["metric"] == column.metric) & (t["truth"] == column.truth)][["task", "model", "explainer", "mean"]]
    out = secs.merge(vals.rename(columns={"mean": "value"}), on=["task", "model", "explainer"], how="inner")
    out["block"] = out["task"] + " / " + out["model"]
    return out


def _gallery_bands(runs: RunSet) -> dict[str, list[str]]:
    bands: dict[str, list[str]] = {}
    for a in runs.galleries():
        if a.task in bands:
            continue
        try:
            with np.load(a.path, allow_pickle=False) as d:
                if "band_names" in d.files:
                    bands[a.task] = [str(b) for b in d["band_names"]]
        except Exception:
            continue
    return bands


CAPTIONS = {
    "gallery": (
        "Rows: explained test tiles (with the target class). Columns: natural colour (red, green, "
        "blue) and false colour (nir, red, green), each band stretched linearly between its 2nd and "
        "98th percentile over the tiles shown; the planted structure mask (white); the model-verified "
        "evidence map; then each explainer's map for the same tiles. Maps are scaled per tile to their "
        "largest magnitude (viridis for non-negative maps, RdBu centred on zero for signed maps); the "
        "outline marks the planted structures."
    ),
    "curves": (
        "Target-class probability as the most relevant pixels (by each explainer's map) are removed "
        "(deletion: a fast drop is good) or inserted into the baseline image (insertion: a fast rise "
        "is good). Lines: mean over tiles, pooled over seeds; bands: mean ± 1.96 sd/√n."
    ),
    "randomization": (
        "Similarity between each explainer's map for the trained model and for the model with its "
        "layers randomized in cascade, by layer (Spearman rank correlation and SSIM). An explainer "
        "that depends on the learned weights falls towards zero; one that stays high ignores the "
        "model. Bands: mean ± 1.96 sd/√n."
    ),
    "cd": (
        "Average rank of each explainer across the task × model blocks (1 = best, at the left). Thick "
        "bars join explainers whose average ranks differ by less than the Nemenyi critical difference "
        "(CD = {cd:.2f} at α = {alpha:g}, Demsar 2006): those are not significantly different."
    ),
    "clusters": (
        "Top: tiles in natural colour under their activation-cluster maps (one colour per cluster). "
        "Bottom: mean drop of each class's probability (original minus replaced) when a cluster is "
        "replaced inside the network, on the tiles of that class holding the cluster, with 95 % "
        "t-intervals and n; positive = the cluster supports the class. Rows: the structure type each "
        "cluster is labelled with and its IoU (no type below the explainer's minimum overlap)."
    ),
    "reliance": (
        "Mean drop in the target-class probability when all structures of a type (or the spurious "
        "cue) are removed in the counterfactual twin. Bars: mean over seeds; points: each seed's "
        "estimate with its 95 % confidence interval."
    ),
    "cost": (
        "Explainer time per tile (log scale) against {label}. Large markers: geometric mean time and "
        "mean score over the task × model blocks; small markers: single blocks."
    ),
}


def make_figures(
    runs: RunSet, summary: Summary, headline: Column | None, folder: Path, log: list[str], gallery_tiles: int
) -> list[F.FigureFile]:
    out: list[F.FigureFile] = []
    styles = F.explainer_styles(summary.explainers)

    def emit(make, stem: str, section: str, title: str, caption: str) -> None:
        try:
            fig = make()
        except Exception as exc:  # one odd input must not sink the whole report
            log.append(f"figure {stem}: not drawn ({type(exc).__name__}: {exc})")
            return
        if isinstance(fig, tuple):
            fig, notes = fig
            log.extend(notes)
        if fig is None:
            log.append(f"figure {stem}: nothing to draw")
            return
        png, pdf = F.save(fig, folder, stem)
        out.append(F.FigureFile(stem, section, title, caption, png, pdf))

    for a in sorted(runs.galleries(), key=lambda a: (a.task, a.model, a.seed)):
        title = f"{a.task}, model {a.model}, seed {a.seed}"
        emit(
            lambda a=a, title=title: F.gallery_figure(a.load(), summary.explainers, title, gallery_tiles),
            F.file_stem("gallery", a.task, a.model, a.seed),
            "gallery",
            f"Heatmap gallery: {title}",
            CAPTIONS["gallery"],
        )
    if runs.curves is not None:
        for (task, model), c in runs.curves.groupby(["task", "model"], sort=False):
            title = f"{task}, model {model}"
            emit(
                lambda c=c, title=title: F.deletion_insertion_figure(c, summary.explainers, styles, title),
                F.file_stem("curves", task, model),
                "curves",
                f"Deletion and insertion curves: {title}",
                CAPTIONS["curves"],
            )
            emit(
                lambda c=c, title=title: F.randomization_figure(c, summary.explainers, styles, title),
                F.file_stem("randomization", task, model),
                "randomization",
                f"Model-parameter randomization: {title}",
                CAPTIONS["randomization"],
            )
    else:
        log.append("no curves.parquet: deletion, insertion and randomization figures left out")
    for col in summary.columns:
        rt = summary.rank_tests.get(col.key)
        if rt is None:
            continue
        if len(rt.blocks) < 2:
            log.append(f"CD diagram for {col.label}: needs at least 2 task x model blocks, has {len(rt.blocks)}")
            continue
        fr = rt.friedman
        ptext = f"Friedman p = {fr.p_value:.3g}" if np.isfinite(fr.p_value) else "Friedman test n/a"
        title = f"{col.label} {col.arrow}: N = {len(rt.blocks)} task × model blocks, {ptext}"
        emit(
            lambda rt=rt, title=title: F.cd_figure(rt.explainers, rt.avg_ranks, rt.cd, title),
            F.file_stem("cd", col.metric, col.truth),
            "cd",
            f"Critical-difference diagram: {col.label}",
            CAPTIONS["cd"].format(cd=rt.cd, alpha=summary.settings["alpha"]),
        )
    for a in sorted(runs.clusters(), key=lambda a: (a.task, a.model, a.seed)):
        title = f"{a.task}, model {a.model}, seed {a.seed}"
        emit(
            lambda a=a, title=title: CF.cluster_drop_figure(
                a.load(), CF.rows_for(runs.concepts, a.task, a.model, a.seed), title
            ),
            F.file_stem("clusters", a.task, a.model, a.seed),
            "clusters",
            f"Activation clusters: {title}",
            CAPTIONS["clusters"],
        )
    if runs.reliance is not None:
        for task, r in runs.reliance.groupby("task", sort=False):
            emit(
                lambda r=r, task=task: F.reliance_figure(r, str(task)),
                F.file_stem("reliance", task),
                "reliance",
                f"Interventional importance: {task}",
                CAPTIONS["reliance"],
            )
    else:
        log.append("no reliance.parquet: reliance chart left out")
    if headline is not None:
        points = cost_points(runs, summary, headline, log)
        if len(points):
            ylabel = f"{headline.label} {headline.arrow}".strip()
            emit(
                lambda: F.cost_quality_figure(
                    points, summary.explainers, styles, ylabel, f"Cost vs quality: {headline.label}"
                ),
                "cost_quality",
                "cost",
                f"Cost vs quality: {headline.label}",
                CAPTIONS["cost"].format(label=headline.label),
            )
    return out


# ---------------------------------------------------------------- HTML page

CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2em auto;max-width:1200px;color:#222;
line-height:1.45;padding:0 1em}
h1{font-size:1.6em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
table{border-collapse:collapse;margin:.6em 0 .3em;font-size:.85em}
thead tr:first-child th{border-top:2px solid #222}thead tr:last-child th{border-bottom:1px solid #222}
tbody tr:last-child td,tbody tr:last-child th{border-bottom:2px solid #222}
th,td{padding:.25em .6em;text-align:center}th.name{text-align:left;font-weight:normal}
tfoot th,tfoot td{font-size:.9em;color:#444}
.ci{color:#555;font-size:.85em}td.na{color:#999}
figure{margin:1.2em 0}figcaption{font-size:.85em;color:#333;max-width:60em}
figure.plot img{max-width:100%;height:auto;border:1px solid #eee}
nav ul{columns:2}code{background:#f4f4f4;padding:0 .2em}.notes li{font-size:.85em;color:#555}
"""


def _inline_md(text: str) -> str:
    s = html.escape(text, quote=True)
    s = re.sub(r"`([^`]+)`", r"<code>\1</code>", s)
    s = re.sub(r"\*([^*]+)\*", r"<em>\1</em>", s)
    return s


def markdown_to_html(md: str) -> str:
    """The small subset methods.md uses: headings, paragraphs, '- ' lists, `code` and *emphasis*."""
    out, para, items = [], [], []

    def flush() -> None:
        if para:
            out.append("<p>" + _inline_md(" ".join(para)) + "</p>")
            para.clear()
        if items:
            out.append("<ul>" + "".join(f"<li>{_inline_md(i)}</li>" for i in items) + "</ul>")
            items.clear()

    for line in md.splitlines():
        if line.startswith("#"):
            flush()
            level = min(len(line) - len(line.lstrip("#")) + 1, 6)
            out.append(f"<h{level}>{_inline_md(line.lstrip('#').strip())}</h{level}>")
        elif line.startswith("- "):
            if para:
                flush()
            items.append(line[2:])
        elif not line.strip():
            flush()
        else:
            para.append(line.strip())
    flush()
    return "\n".join(out)


def html_page(
    runs: RunSet,
    results: list[T.TableSpec],
    ranks: list[T.TableSpec],
    figs: list[F.FigureFile],
    methods_md: str,
    log: list[str],
    concepts: list[T.TableSpec] = (),
) -> str:
    h = T._h
    sections = [
        ("gallery", "Heatmap gallery"),
        ("curves", "Deletion and insertion"),
        ("randomization", "Randomization sanity check"),
        ("clusters", "Activation clusters"),
        ("reliance", "Interventional importance"),
        ("cost", "Cost vs quality"),
    ]
    body = [
        "<header>",
        "<h1>xbench comparison report</h1>",
        "<p>Run folders: " + ", ".join(f"<code>{h(str(d))}</code>" for d in runs.dirs) + ".</p>",
        "</header>",
        "<nav><h2>Contents</h2><ul>",
        '<li><a href="#results">Results by task and model</a></li>',
        '<li><a href="#ranks">Ranks across tasks and models</a></li>',
    ]
    body += [f'<li><a href="#fig-{k}">{h(v)}</a></li>' for k, v in sections if any(f.section == k for f in figs)]
    if concepts:
        body.append('<li><a href="#concepts">Concept reports</a></li>')
    body += [
        '<li><a href="#methods">Methods text</a></li>',
        '<li><a href="#notes">Notes</a></li>',
        "</ul></nav>",
    ]

    def figure_html(f: F.FigureFile) -> str:
        data = base64.b64encode(f.png.read_bytes()).decode("ascii")
        return (
            f'<figure class="plot" id="{h(f.stem)}"><img src="data:image/png;base64,{data}" '
            f'alt="{h(f.title)}"/><figcaption><b>{h(f.title)}.</b> {h(f.caption)}</figcaption></figure>'
        )

    body.append('<section id="results"><h2>Results by task and model</h2>')
    body += [T.to_html(t) for t in results] or ["<p>No results.</p>"]
    body.append("</section>")
    body.append('<section id="ranks"><h2>Ranks across tasks and models</h2>')
    body += [T.to_html(t) for t in ranks] or ["<p>No rank statistics.</p>"]
    body += [figure_html(f) for f in figs if f.section == "cd"]
    body.append("</section>")
    for key, name in sections:
        chosen = [f for f in figs if f.section == key]
        if chosen:
            body.append(f'<section id="fig-{key}"><h2>{h(name)}</h2>')
            body += [figure_html(f) for f in chosen]
            body.append("</section>")
    if concepts:
        body.append('<section id="concepts"><h2>Concept reports</h2>')
        body += [T.to_html(t) for t in concepts]
        body.append("</section>")
    body.append('<section id="methods"><h2>Methods text</h2>')
    body.append(markdown_to_html(re.sub(r"^# .*\n", "", methods_md)))
    body.append("</section>")
    body.append('<section id="notes"><h2>Notes</h2>')
    body.append(
        '<ul class="notes">' + "".join(f"<li>{h(x)}</li>" for x in log) + "</ul>"
        if log
        else "<p>Nothing was left out.</p>"
    )
    body.append("</section>")
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8"/>\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1"/>\n'
        "<title>xbench comparison report</title>\n<style>"
        + CSS
        + "</style>\n</head>\n<body>\n"
        + "\n".join(body)
        + "\n</body>\n</html>\n"
    )


# ---------------------------------------------------------------- entry point


FIGURE_PREFIXES = ("gallery__", "curves__", "randomization__", "cd__", "clusters__", "reliance__", "cost_quality")


def _stale_figures(folder: Path, written: set[Path]) -> list[Path]:
    """Figure files of an earlier report in the same folder (our names only) that this one did not write."""
    if not folder.is_dir():
        return []
    return sorted(
        p
        for p in folder.iterdir()
        if p.suffix in (".png", ".pdf") and p.name.startswith(FIGURE_PREFIXES) and p not in written
    )


def write_report(
    run_dirs: Any,
    out_dir: str | Path | None = None,
    formats: Any = FORMATS,
    *,
    headline_metric: str = "mass-accuracy",
    headline_truth: str = "planted",
    confidence: float = 0.95,
    n_resamples: int = 2000,
    alpha: float = 0.05,
    seed: int = 0,
    gallery_tiles: int = 6,
    figures: bool = True,
) -> ReportSummary:
    """Read the run folders and write tables, figures, methods text and BibTeX into ``out_dir``.

    ``out_dir`` defaults to ``<first run folder>/report``. ``headline_metric`` / ``headline_truth`` choose
    the quality axis of the cost figure and the worked CD numbers in the methods text. Prints nothing.
    """
    fmts = _formats(formats)
    runs = load_runs(run_dirs)
    out = Path(out_dir) if out_dir is not None else runs.dirs[0] / "report"
    out.mkdir(parents=True, exist_ok=True)
    log = list(runs.log)
    result = ReportSummary(out)
    mpl_logger = logging.getLogger("matplotlib")
    mpl_level = mpl_logger.level
    mpl_logger.setLevel(logging.ERROR)  # prints nothing: font notices would reach stderr
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            summary = summarize(
                runs.records,
                runs.manifests,
                confidence=confidence,
                n_resamples=n_resamples,
                seed=seed,
                alpha=alpha,
            )
            log += summary.log
            headline = choose_headline(summary, headline_metric, headline_truth, log)
            figs = make_figures(runs, summary, headline, out / "figures", log, gallery_tiles) if figures else []
            results = T.result_tables(summary)
            ranks = T.rank_tables(summary)
            concept_specs, notes = T.concept_tables(runs.concepts)
            log += notes
            T.number_tables(results + ranks + concept_specs)
            methods_md, cites = methods_text(runs, summary, headline, _gallery_bands(runs))
            log += [f"no refs.bib entry for the citation of {u}" for u in cites.unmatched]
    finally:
        mpl_logger.setLevel(mpl_level)
    for w in caught:
        msg = f"{w.category.__name__}: {w.message}"
        if msg not in log:
            log.append(msg)

    stale = _stale_figures(out / "figures", {p for f in figs for p in (f.png, f.pdf)}) if figures else []
    for path in stale:
        path.unlink()
    if stale:
        log.append(f"removed {len(stale)} figure file(s) left in {out / 'figures'} by an earlier report")

    def write(name: str, text: str) -> None:
        path = out / name
        path.write_text(text, encoding="utf-8")
        result.paths.append(path)

    summary.table.to_csv(out / "summary.csv", index=False, float_format="%.12g")
    result.paths.append(out / "summary.csv")
    rank_rows = [
        {
            "metric": rt.column.metric,
            "truth": rt.column.truth,
            "explainer": e,
            "avg_rank": float(r),
            "n_blocks": len(rt.blocks),
            "k": len(rt.explainers),
            "friedman_chi2": rt.friedman.statistic,
            "friedman_p": rt.friedman.p_value,
            "q_alpha": rt.q_alpha,
            "cd": rt.cd,
        }
        for rt in summary.rank_tests.values()
        for e, r in zip(rt.explainers, rt.avg_ranks, strict=True)
    ]
    pd.DataFrame(rank_rows).to_csv(out / "ranks.csv", index=False, float_format="%.12g")
    result.paths.append(out / "ranks.csv")
    if runs.concepts is not None:
        runs.concepts.to_csv(out / "concepts.csv", index=False, float_format="%.12g")
        result.paths.append(out / "concepts.csv")
    if "md" in fmts:
        write(
            "tables.md",
            "# xbench comparison tables\n\n" + "\n".join(T.to_markdown(t) for t in results + ranks + concept_specs),
        )
    if "tex" in fmts:
        write("tables.tex", T.LATEX_PREAMBLE_NOTE + "\n" + "\n".join(T.to_latex(t) for t in results + ranks))
    if "html" in fmts:
        write("report.html", html_page(runs, results, ranks, figs, methods_md, log, concept_specs))
    write("methods.md", methods_md)
    write("refs.bib", render_bib(cites.keys))
    for f in figs:
        result.paths += [f.png, f.pdf]
    write("report.log", "\n".join(log) + ("\n" if log else ""))
    result.warnings = log
    result.n_tables = len(results) + len(ranks) + len(concept_specs)
    result.n_figures = len(figs)
    return result
