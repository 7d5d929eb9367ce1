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

import functools
import html
import logging
import warnings
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from xbench.errors import XbenchInputError
from xbench.report import breakdown as B
from xbench.report import concept_figures as CF
from xbench.report import figures as F
from xbench.report import page as P
from xbench.report import recommend as R
from xbench.report import tables as T
from xbench.report.bib import render_bib
from xbench.report.compare import Column, Summary, order_explainers, summarize, variant_sensitivity
from xbench.report.drawing import Drawing, Unit, default_jobs, draw_units
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
    recommendations: list[R.BlockRecommendation] = field(default_factory=list)

    def __str__(self) -> str:
        return (
            f"report in {self.out_dir}: {self.n_tables} tables, {self.n_figures} figures, "
            f"{len(self.paths)} files, {len(self.warnings)} notes"
        )


def _formats(formats: str | Iterable[str]) -> list[str]:
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


def explainer_costs(runs: RunSet, log: list[str]) -> pd.DataFrame:
    """Explainer seconds per tile per (task, model, explainer), from the manifests' cell costs, else records."""
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
            log.append("cost per tile: no timings in the manifests and no 'seconds' records")
            return frame
        log.append("cost per tile: timings from the 'seconds' records (no per-cell costs in the manifests)")
        frame = (
            rec.groupby(["task", "model", "explainer"], as_index=False)["value"]
            .mean()
            .rename(columns={"value": "seconds"})
        )
    return frame.groupby(["task", "model", "explainer"], as_index=False)["seconds"].mean()


def cost_points(costs: pd.DataFrame, summary: Summary, column: Column) -> pd.DataFrame:
    """One point per (task, model, explainer): seconds per tile and the column's mean in that block."""
    t = summary.table
    vals = t[(t["metric"] == column.metric) & (t["truth"] == column.truth)][["task", "model", "explainer", "mean"]]
    out = costs.merge(vals.rename(columns={"mean": "value"}), on=["task", "model", "explainer"], how="inner")
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
        "Rows: explained test tiles with their target class (the first tile of every class is shown). "
        "Columns: natural colour (red, green, blue) and false colour (nir, red, green), bands stretched "
        "2-98 %; planted structures (white); model-verified evidence; explainer maps, each scaled to its "
        "tile's largest magnitude (colour bars below); outlines mark planted structures."
    ),
    "curves": (
        "One panel per explainer: target-class probability as its most relevant pixels are removed "
        "(deletion, red: a fast drop is good) or inserted into the baseline image (insertion, blue: a fast "
        "rise is good); grey: the random control. Mean over tiles and seeds; bands: mean ± 1.96 sd/√n."
    ),
    "randomization": (
        "Similarity between each explainer's map for the trained model and for the model with its "
        "layers randomized in cascade, by layer (Spearman rank correlation and SSIM). An explainer "
        "that depends on the learned weights falls towards zero; one that stays high ignores the "
        "model. Bands: mean ± 1.96 sd/√n."
    ),
    "cd": (
        "Average rank of each real method across the task × model × seed blocks (1 = best, at the left; "
        "controls are not ranked). Drawn only where the Friedman test rejects. Thick "
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
        "Explainer time per tile (log scale) against {label}, one panel per task × model block and one "
        "point per explainer in it (so that points in a panel share tiles and model). Hollow markers: "
        "controls (anchors, not candidates)."
    ),
}


def _draw(
    make, folder: Path, stem: str, section: str, title: str, caption: str, notes: list[str]
) -> list[F.FigureFile]:
    """Make one figure, save it as PNG and PDF, say why not in ``notes`` when it cannot be drawn."""
    try:
        fig = make()
    except Exception as exc:  # one odd input must not sink the whole report
        notes.append(f"figure {stem}: not drawn ({type(exc).__name__}: {exc})")
        return []
    if isinstance(fig, tuple):
        fig, more = fig
        notes.extend(more)
    if fig is None:
        notes.append(f"figure {stem}: nothing to draw")
        return []
    png, pdf = F.save(fig, folder, stem)
    return [F.FigureFile(stem, section, title, caption, png, pdf)]


def _note_unit(text: str) -> Unit:
    """A unit that draws nothing and adds ``text`` to the log in its place among the figures."""

    def unit(notes: list[str]) -> list[F.FigureFile]:
        notes.append(text)
        return []

    return unit


def gallery_units(runs: RunSet, explainers: list[str], folder: Path, gallery_tiles: int) -> list[Unit]:
    """One unit per page of every heatmap gallery: they need only the explainers' order, so the report starts
    drawing them before its statistics (see :func:`write_report`)."""
    units: list[Unit] = []

    def gallery(a, title: str, part: int, parts: int, notes: list[str]) -> list[F.FigureFile]:
        """One page of an artifact's gallery; the artifact's notes are the same on every page and are kept
        once, with the first."""
        try:
            pages, more = F.gallery_figures(a.load(), explainers, title, gallery_tiles, parts=[part])
        except Exception as exc:  # one odd artifact must not sink the whole report
            if part == 1:
                notes.append(f"gallery {title}: not drawn ({type(exc).__name__}: {exc})")
            return []
        if part == 1:
            notes.extend(more)
        stem = F.file_stem("gallery", a.task, a.model, a.seed) + (f"__part{part}" if parts > 1 else "")
        suffix = f" (part {part} of {parts})" if parts > 1 else ""
        caption = CAPTIONS["gallery"]
        return _draw(lambda: pages[0], folder, stem, "gallery", f"Heatmap gallery: {title}{suffix}", caption, notes)

    for a in sorted(runs.galleries(), key=lambda a: (a.task, a.model, a.seed)):
        title = f"{a.task}, model {a.model}, seed {a.seed}"
        try:
            parts = F.gallery_part_count(a.keys(), explainers)
        except Exception as exc:  # an unreadable archive: one note in its place
            units.append(_note_unit(f"gallery {title}: not drawn ({type(exc).__name__}: {exc})"))
            continue
        units += [functools.partial(gallery, a, title, part, parts) for part in range(1, parts + 1)]
    return units


def make_figures(
    runs: RunSet,
    summary: Summary,
    headline: Column | None,
    folder: Path,
    log: list[str],
    gallery_tiles: int,
    costs: pd.DataFrame | None = None,
    jobs: int = 1,
    galleries: Drawing | None = None,
) -> list[F.FigureFile]:
    """Every figure of the report, drawn and saved into ``folder`` (on two cores where ``jobs`` >= 2, see
    :mod:`xbench.report.drawing`); notes go to ``log`` in the figures' order, whoever drew them.
    ``galleries``: the gallery pages already being drawn (:func:`gallery_units`), else drawn here."""
    units: list[Unit] = []
    styles = F.explainer_styles(summary.explainers)

    def note(text: str) -> None:  # a note between figures keeps its place in the log
        units.append(_note_unit(text))

    def emit(make, stem: str, section: str, title: str, caption: str) -> None:
        units.append(lambda notes: _draw(make, folder, stem, section, title, caption, notes))

    if galleries is None:
        galleries = Drawing(gallery_units(runs, summary.explainers, folder, gallery_tiles), jobs=1)
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
        note("no curves.parquet: deletion, insertion and randomization figures left out")
    for rt in summary.rank_tests.values():
        col = rt.column
        stem = F.file_stem("cd", col.metric, col.truth) + ("" if rt.group == "torch models" else "__black-box")
        if len(rt.blocks) < 2:
            note(f"CD diagram for {col.label} ({rt.group}): needs at least 2 blocks, has {len(rt.blocks)}")
            continue
        fr = rt.friedman
        if not rt.rejects:  # no diagram without a rejecting Friedman test: a sentence in the rank table instead
            ptext = f"p = {fr.p_value:.3g}" if np.isfinite(fr.p_value) else "not defined"
            note(f"CD diagram for {col.label} ({rt.group}) not drawn: Friedman test does not reject ({ptext})")
            continue
        ptext = f"Friedman p = {fr.p_value:.3g}"
        title = f"{col.label} {col.arrow}, {rt.group}: N = {len(rt.blocks)} task × model × seed blocks, {ptext}"
        emit(
            lambda rt=rt, title=title: F.cd_figure(rt.explainers, rt.avg_ranks, rt.cd, title),
            stem,
            "cd",
            f"Critical-difference diagram: {col.label}, {rt.group}",
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
        note("no reliance.parquet: reliance chart left out")
    if headline is not None:
        points = cost_points(costs if costs is not None else explainer_costs(runs, log), summary, headline)
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
    rest = draw_units(units, jobs)  # beside the gallery pages still being drawn, if any
    out: list[F.FigureFile] = []
    for files, notes in galleries.finish() + rest:  # this process takes the gallery pages left, if any
        out += files
        log.extend(notes)
    return out


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


def find_variants(runs: RunSet, log: list[str]) -> dict[str, RunSet]:
    """Protocol variants written beside the run folders (``DIR/variants/NAME/``), read as run sets by name."""
    found: dict[str, list[Path]] = {}
    for d in runs.dirs:
        folder = Path(d) / "variants"
        if folder.is_dir():
            for sub in sorted(folder.iterdir()):
                if (sub / "records.parquet").is_file() or (sub / "records.csv").is_file():
                    found.setdefault(sub.name, []).append(sub)
    out = {}
    for name, dirs in found.items():
        try:
            out[name] = load_runs(dirs)
        except XbenchInputError as exc:
            log.append(f"variant {name}: not read ({exc})")
    return out


def summary_records(runs: RunSet, models: list[str] | None) -> pd.DataFrame:
    r = runs.records
    return r[r["model"].isin(models)] if models else r


def write_report(
    run_dirs: str | Path | Iterable[str | Path],
    out_dir: str | Path | None = None,
    formats: str | Iterable[str] = FORMATS,
    *,
    headline_metric: str = "mass-accuracy",
    headline_truth: str = "planted",
    confidence: float = 0.95,
    n_resamples: int = 2000,
    alpha: float = 0.05,
    seed: int = 0,
    gallery_tiles: int = 6,
    figures: bool = True,
    against: str | None = None,
    models: list[str] | None = None,
    jobs: int | None = None,
) -> ReportSummary:
    """Read the run folders and write tables, figures, methods text and BibTeX into ``out_dir``.

    ``out_dir`` defaults to ``<first run folder>/report``. ``headline_metric`` / ``headline_truth`` choose
    the quality axis of the cost figure and the worked CD numbers in the methods text. ``against`` names a
    real method declared before the run as the comparator of the paired tests (default: all pairs with Holm);
    ``models`` chooses the models whose blocks enter (default: all). ``jobs``: processes drawing the figures
    (default 2 on two or more cores; forked, Linux only; the files are the same either way). Prints nothing.
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
    n_jobs = default_jobs() if jobs is None else jobs
    galleries: Drawing | None = None
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if figures:  # the gallery pages need only the explainers' order (summarize's): a forked child
                # starts drawing them now, while this process computes the statistics
                order = order_explainers(summary_records(runs, models), runs.manifests)
                galleries = Drawing(gallery_units(runs, order, out / "figures", gallery_tiles), n_jobs)
            summary = summarize(
                runs.records,
                runs.manifests,
                confidence=confidence,
                n_resamples=n_resamples,
                seed=seed,
                alpha=alpha,
                against=against,
                models=models,
            )
            log += summary.log
            headline = choose_headline(summary, headline_metric, headline_truth, log)
            costs = explainer_costs(runs, log)
            recs = R.recommend(summary.table, runs.records, costs, summary.seeds, alpha=alpha)
            figs = (
                make_figures(
                    runs, summary, headline, out / "figures", log, gallery_tiles, costs, jobs=n_jobs,
                    galleries=galleries,
                )
                if figures
                else []
            )  # fmt: skip
            results = T.result_tables(summary)
            ranks = T.rank_tables(summary)
            variant_runs = find_variants(runs, log)
            sensitivity, variant_flags = variant_sensitivity(
                summary_records(runs, models), {k: v.records for k, v in variant_runs.items()}, summary.explainers
            )
            ranks += T.variant_tables(sensitivity)
            concept_specs, notes = T.concept_tables(runs.concepts)
            log += notes
            breakdowns = B.breakdown_tables(
                summary.table, runs.records, B.tile_attributes(runs.dirs, runs.manifests, log)
            )
            T.number_tables(results + ranks + concept_specs + breakdowns)
            methods_md, cites = methods_text(runs, summary, headline, _gallery_bands(runs), variant_runs, variant_flags)
            log += [f"no refs.bib entry for the citation of {u}" for u in cites.unmatched]
    finally:
        mpl_logger.setLevel(mpl_level)
        if galleries is not None:
            galleries.close()  # an error before the figures: the child stops (after finish: nothing to do)
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
            "group": rt.group,
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
    if len(sensitivity):
        sensitivity.to_csv(out / "variants.csv", index=False, float_format="%.12g")
        result.paths.append(out / "variants.csv")
    if runs.concepts is not None:
        runs.concepts.to_csv(out / "concepts.csv", index=False, float_format="%.12g")
        result.paths.append(out / "concepts.csv")
    advice_md = R.to_markdown(recs, alpha)
    R.recommendation_rows(recs).to_csv(out / "recommendations.csv", index=False, float_format="%.12g")
    result.paths.append(out / "recommendations.csv")
    write("recommendations.md", advice_md)
    skipped_md, skipped_html = skipped_section(runs.reasons)
    self_checks = self_check_warnings(runs.manifests)
    if "md" in fmts:
        write(
            "tables.md",
            advice_md
            + "\n# xbench comparison tables\n\n"
            + "\n".join(T.to_markdown(t) for t in results + ranks + concept_specs)
            + ("\n# Breakdowns\n\n" + "\n".join(T.to_markdown(t) for t in breakdowns) if breakdowns else "")
            + T.left_out_markdown(summary)
            + T.flags_markdown("Protocol sensitivity: rankings that flip", variant_flags)
            + T.flags_markdown(SELF_CHECK_TITLE, self_checks)
            + ("\n" + skipped_md if skipped_md else ""),
        )
    if "tex" in fmts:
        write("tables.tex", T.latex_document_body(results + ranks + concept_specs + breakdowns))
    if "html" in fmts:
        extra = [("breakdowns", "Breakdowns", "\n".join(T.to_html(t) for t in breakdowns))] if breakdowns else []
        extra += [("skipped", "Skipped metrics and undefined values", skipped_html)] if skipped_html else []
        if summary.left_out:
            items = "".join(f"<li>{P.inline_markdown(x)}</li>" for x in summary.left_out)
            extra += [("left-out", "Left out of the rankings, and why", f"<ul>{items}</ul>")]
        if variant_flags:
            items = "".join(f"<li>{P.inline_markdown(x)}</li>" for x in variant_flags)
            extra += [("protocol", "Protocol sensitivity: rankings that flip", f"<ul>{items}</ul>")]
        if self_checks:
            items = "".join(f"<li>{P.inline_markdown(x)}</li>" for x in self_checks)
            extra += [("self-checks", SELF_CHECK_TITLE, f"<ul>{items}</ul>")]
        write(
            "report.html",
            P.render_page(runs.dirs, recs, alpha, results, ranks, figs, methods_md, log, concept_specs, extra),
        )
    write("methods.md", methods_md)
    write("refs.bib", render_bib(cites.keys))
    for f in figs:
        result.paths += [f.png, f.pdf]
    log += [f"warning: {x}" for x in self_checks]  # the page has its own section for them
    write("report.log", "\n".join(log) + ("\n" if log else ""))
    result.warnings = log
    result.n_tables = len(results) + len(ranks) + len(concept_specs) + len(breakdowns)
    result.n_figures = len(figs)
    result.recommendations = recs
    return result


SELF_CHECK_TITLE = "Self-checks that failed"


def self_check_warnings(manifests: list[dict]) -> list[str]:
    """One line per cell whose metric left a warning in its notes (e.g. the completeness gap of integrated
    gradients or DeepLIFT above 5% of the score change): a self-check of the explainer that failed."""
    out = []
    for m in manifests:
        for c in m.get("cells") or []:
            for tag, text in sorted((c.get("notes") or {}).items()):
                if tag.endswith(" warning"):
                    what = tag[: -len(" warning")]
                    where = f"{m.get('task')}/{c.get('model')} seed {c.get('seed')}"
                    out.append(f"`{c.get('explainer')}` on {where}, {what}: {text}")
    return out


def skipped_section(reasons: pd.DataFrame | None) -> tuple[str, str]:
    """Markdown and HTML listing every (task, model, metric, truth, reason) with the explainers it hit."""
    if reasons is None or reasons.empty:
        return "", ""
    r = reasons.fillna("").astype({"explainer": str, "metric": str, "truth": str, "reason": str})
    grouped = (
        r.groupby(["task", "model", "metric", "truth", "reason"], sort=True)
        .agg(explainers=("explainer", lambda x: ", ".join(sorted({e for e in x if e}))), seeds=("seed", "nunique"))
        .reset_index()
    )
    md = [
        "# Skipped metrics and undefined values",
        "",
        "| task / model | metric | explainers | reason |",
        "|---|---|---|---|",
    ]
    rows_html = []
    for g in grouped.itertuples():
        metric = g.metric + (f" ({g.truth})" if g.truth and g.truth != "none" else "") if g.metric else "(whole cell)"
        md.append(f"| {g.task} / {g.model} | {metric} | {g.explainers or 'all'} | {g.reason} |")
        rows_html.append(
            f"<tr><td>{html.escape(f'{g.task} / {g.model}')}</td><td>{html.escape(metric)}</td>"
            f"<td>{html.escape(g.explainers or 'all')}</td><td class='why'>{html.escape(g.reason)}</td></tr>"
        )
    inner = (
        "<p>Values the run could not compute, with the reason it recorded (NaN cells in the tables come from "
        "these).</p><table><thead><tr><th>task / model</th><th>metric</th><th>explainers</th><th>reason</th>"
        "</tr></thead><tbody>" + "".join(rows_html) + "</tbody></table>"
    )
    return "\n".join(md) + "\n", inner
