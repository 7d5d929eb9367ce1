"""Comparison tables: one neutral table model, rendered as Markdown, LaTeX (booktabs) and HTML.

Results tables: one per (task, model) block and metric family; rows are explainers, cells the mean with its
bootstrap interval and a mark when the explainer differs significantly from the column's best (bold).
Rank tables: one per metric family; average ranks across blocks with the Friedman test and Nemenyi CD.
"""

from __future__ import annotations

import html
import math
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from xbench.report.compare import Column, Summary
from xbench.report.meta import family_rank
from xbench.report.stats import MIN_N_FOR_CI


@dataclass
class TCell:
    main: str = ""  # "" renders as a dash (no value)
    ci: str = ""
    mark: str = ""
    bold: bool = False


@dataclass
class TableSpec:
    ident: str
    title: str
    caption: str
    header: list[tuple[str, str]]  # (group, sub): group = metric name, sub = truth and direction
    rows: list[tuple[str, list[TCell]]]
    footer: list[tuple[str, list[str]]] = field(default_factory=list)
    number: int = 0
    row_label: str = "Explainer"


# ---------------------------------------------------------------- formatting helpers


def decimals_for(values) -> int | None:
    """Decimals showing about three significant digits of the largest magnitude (0 to 4); None (three
    significant digits per value) when the magnitudes span more than a factor 20, e.g. seconds per tile."""
    v = np.abs(np.asarray([x for x in values if x is not None and np.isfinite(x)], dtype=np.float64))
    v = v[v > 0]
    if v.size == 0:
        return 3
    if v.max() / v.min() > 20 or v.max() < 1e-3:
        return None
    if v.max() <= 1.0 + 1e-9:  # scores in [0, 1] or [-1, 1]: always three decimals
        return 3
    return int(min(4, max(0, 2 - math.floor(math.log10(v.max())))))


def fmt(value: float, decimals: int | None) -> str:
    if value is None or not np.isfinite(value):
        return ""
    if decimals is None:
        return f"{value:#.3g}".rstrip(".")
    text = f"{value:.{decimals}f}"
    return "0" if re.fullmatch(r"-0\.?0*", text) else text


def fmt_p(p: float) -> str:
    if p is None or not np.isfinite(p):
        return "n/a"
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def slug(*parts: str) -> str:
    return re.sub(r"[^A-Za-z0-9]+", "-", "-".join(parts)).strip("-").lower()


def _seed_text(seeds: list[int]) -> str:
    return f"{len(seeds)} model seed{'s' if len(seeds) != 1 else ''} ({', '.join(map(str, seeds))})"


# ---------------------------------------------------------------- building the tables


def result_tables(summary: Summary) -> list[TableSpec]:
    s = summary.settings
    conf = int(round(100 * s["confidence"]))
    out: list[TableSpec] = []
    for task, model in summary.blocks:
        block = summary.block_table(task, model)
        if block.empty:
            continue
        seeds = summary.seeds.get((task, model), [])
        present = set(zip(block["metric"], block["truth"], strict=True))
        cols = [c for c in summary.columns if c.key in present]
        families = sorted({c.info.family for c in cols}, key=family_rank)
        parts = []
        for fam in families:
            chunks = chunk_columns([c for c in cols if c.info.family == fam])
            parts += [(fam, i + 1, len(chunks), chunk) for i, chunk in enumerate(chunks)]
        for fam, part, n_parts, fcols in parts:
            header = [(c.metric, _sub(c, block)) for c in fcols]
            explainers = [e for e in summary.explainers if e in set(block["explainer"])]
            cells: dict[str, list[TCell]] = {e: [] for e in explainers}
            ns: list[int] = []
            k_tested = []
            percentile = 0
            for c in fcols:
                sub = block[(block["metric"] == c.metric) & (block["truth"] == c.truth)].set_index("explainer")
                d = decimals_for(sub["mean"].to_numpy())
                if (sub["unit"] == "tile").any():
                    ns.extend(int(n) for n in sub["n"])
                    k_tested.append(int(sub["test_n"].gt(0).sum()))
                percentile += int((sub["ci_method"] == "percentile").sum())
                for e in explainers:
                    if e not in sub.index or not np.isfinite(sub.at[e, "mean"]):
                        cells[e].append(TCell())
                        continue
                    r = sub.loc[e]
                    ci = f"[{fmt(r['ci_low'], d)}, {fmt(r['ci_high'], d)}]" if np.isfinite(r["ci_low"]) else ""
                    cells[e].append(TCell(fmt(r["mean"], d), ci, str(r["mark"]), bool(r["best"])))
            caption = _result_caption(conf, s, seeds, ns, fcols, block, percentile, max(k_tested or [0]))
            title = f"{task}, model {model}: {fam} metrics"
            if n_parts > 1:
                title += f" (part {part} of {n_parts})"
            out.append(
                TableSpec(
                    slug("results", task, model, fam, *([str(part)] if n_parts > 1 else [])),
                    title,
                    caption,
                    header,
                    [(e, cells[e]) for e in explainers],
                )
            )
    return out


MAX_COLUMNS = 4


def chunk_columns(cols: list[Column], limit: int = MAX_COLUMNS) -> list[list[Column]]:
    """Split a family's columns into tables of at most ``limit`` columns, keeping a metric's truths
    together (a wide table would be shrunk to an unreadable size on a page)."""
    groups: list[list[Column]] = []
    for c in cols:
        if groups and groups[-1][0].metric == c.metric:
            groups[-1].append(c)
        else:
            groups.append([c])
    chunks: list[list[Column]] = []
    for g in groups:
        if chunks and len(chunks[-1]) + len(g) <= limit:
            chunks[-1].extend(g)
        else:
            chunks.append(list(g))
    return chunks


def _sub(c: Column, block) -> str:
    sub = block[(block["metric"] == c.metric) & (block["truth"] == c.truth)]
    parts = [] if c.truth == "none" else [c.truth]
    if len(sub) and (sub["unit"] == "seed").all():
        parts.append("per seed†")
    if c.arrow:
        parts.append(c.arrow)
    return " ".join(parts)


def _result_caption(
    conf: int,
    s: dict,
    seeds: list[int],
    ns: list[int],
    cols: list[Column],
    block,
    percentile: int,
    k_tested: int,
) -> str:
    parts = []
    if ns:
        n_text = f"{min(ns)}" if min(ns) == max(ns) else f"{min(ns)} to {max(ns)}"
        parts.append(
            f"Mean over n = {n_text} explained test tiles (tiles with a defined value) with a {conf}% "
            f"{s['ci_method']} bootstrap confidence interval ({s['n_resamples']} resamples over tiles); each "
            f"tile's value is first averaged over {_seed_text(seeds)}."
        )
    if any((block[(block["metric"] == c.metric) & (block["truth"] == c.truth)]["unit"] == "seed").all() for c in cols):
        parts.append(
            f"† One value per seed: mean over {_seed_text(seeds)} (with a {conf}% {s['ci_method']} "
            f"interval when there are at least {MIN_N_FOR_CI} seeds), not tested."
        )
    if any(c.arrow for c in cols):
        parts.append("Bold: best explainer in the column (↑ higher is better, ↓ lower is better).")
    if ns:
        parts.append(
            "Marks: two-sided Wilcoxon signed-rank test against the column's best explainer, paired by tile, "
            f"Holm-corrected across the comparisons in the column (up to {k_tested}): * p < 0.05, ** p < "
            "0.01, "
            "*** p < 0.001; unmarked: no significant difference from the best."
        )
    if percentile:
        parts.append(f"In {percentile} cell(s) BCa was undefined and the percentile interval is shown.")
    parts.append("A dash: no value.")
    return " ".join(parts)


def rank_tables(summary: Summary) -> list[TableSpec]:
    alpha = summary.settings["alpha"]
    out = []
    tests = [summary.rank_tests[c.key] for c in summary.columns if c.key in summary.rank_tests]
    for fam in sorted({t.column.info.family for t in tests}, key=family_rank):
        ft = [t for t in tests if t.column.info.family == fam]
        explainers = [e for e in summary.explainers if any(e in t.explainers for t in ft)]
        rows = {e: [] for e in explainers}
        for t in ft:
            best = float(np.min(t.avg_ranks))
            for e in explainers:
                if e in t.explainers:
                    r = float(t.avg_ranks[t.explainers.index(e)])
                    rows[e].append(TCell(f"{r:.2f}", bold=bool(np.isclose(r, best))))
                else:
                    rows[e].append(TCell())
        footer = [
            ("blocks N", [str(t.friedman.n_blocks or len(t.blocks)) for t in ft]),
            ("explainers k", [str(len(t.explainers)) for t in ft]),
            ("Friedman χ²", [fmt(t.friedman.statistic, 2) or "n/a" for t in ft]),
            ("Friedman p", [fmt_p(t.friedman.p_value).replace("p = ", "").replace("p ", "") for t in ft]),
            (f"Nemenyi CD (α = {alpha:g})", [fmt(t.cd, 2) or "n/a" for t in ft]),
        ]
        n_blocks = sorted({len(t.blocks) for t in ft})
        caption = (
            f"Average rank of each explainer (1 = best) across {'/'.join(map(str, n_blocks))} task × model "
            "block(s); a block's value is the mean shown in the results tables (ties share their average "
            "rank). "
            "Friedman test over blocks (n/a with fewer than 3 explainers or 2 blocks). Nemenyi critical "
            f"difference CD = q · sqrt(k(k+1)/(6N)) at α = {alpha:g}, q the studentized range quantile "
            "(infinite degrees of freedom) over sqrt(2) (Demsar 2006): average ranks closer than CD are not "
            "significantly different. Bold: best average rank. A dash: the explainer lacks a value in some "
            "block and is left out of that column."
        )
        header = [
            (t.column.metric, " ".join(p for p in ([] if t.column.truth == "none" else [t.column.truth]))) for t in ft
        ]
        out.append(
            TableSpec(
                slug("ranks", fam),
                f"Average ranks across tasks and models: {fam} metrics",
                caption,
                header,
                [(e, rows[e]) for e in explainers],
                footer,
            )
        )
    return out


CONCEPT_ROWS_SHOWN = 60


def concept_tables(concepts: pd.DataFrame | None) -> tuple[list[TableSpec], list[str]]:
    """Concept reports (TCAV, activation clusters) per task and model, one row per seed and concept.

    Not averaged over seeds: cluster identities are arbitrary per seed. Markdown and HTML only (a long
    list does not suit a LaTeX float); every row is in concepts.csv.
    """
    notes: list[str] = []
    if concepts is None or concepts.empty:
        return [], notes
    out = []
    cols = [
        ("class", "class_name"),
        ("score", "score"),
        ("spread", "spread"),
        ("p-value", "p_value"),
        ("matched type", "matched_type"),
        ("IoU", "iou"),
        ("purity", "purity"),
    ]
    for (task, model), g in concepts.groupby(["task", "model"], sort=False):
        g = g.sort_values(["explainer", "seed", "concept", "class_name"], kind="stable")
        rows = []
        for r in g.head(CONCEPT_ROWS_SHOWN).itertuples(index=False):
            cells = []
            for _, key in cols:
                v = getattr(r, key)
                if isinstance(v, (int, float, np.floating)) and not isinstance(v, bool):
                    cells.append(
                        TCell(fmt_p(v).replace("p = ", "").replace("p ", "") if key == "p_value" else fmt(float(v), 3))
                    )
                else:
                    cells.append(TCell("" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v)))
            rows.append((f"{r.explainer} / seed {r.seed} / {r.concept}", cells))
        if len(g) > CONCEPT_ROWS_SHOWN:
            notes.append(
                f"concept table {task}/{model}: {len(g)} rows, first {CONCEPT_ROWS_SHOWN} shown; all in concepts.csv"
            )
        caption = (
            "Concept reports as the concept explainers recorded them, one row per seed, concept and "
            "class (not averaged over seeds: cluster identities differ between seeds). Matched type, "
            "IoU and purity compare a concept with the planted structure types. A dash: not reported."
        )
        out.append(
            TableSpec(
                slug("concepts", task, model),
                f"{task}, model {model}: concept reports",
                caption,
                [(name, "") for name, _ in cols],
                rows,
                row_label="explainer / seed / concept",
            )
        )
    return out, notes


def number_tables(tables: list[TableSpec]) -> list[TableSpec]:
    for i, t in enumerate(tables, 1):
        t.number = i
    return tables


def _groups(header: list[tuple[str, str]]) -> list[tuple[str, int]]:
    """Consecutive header columns with the same group, as (group, span)."""
    out: list[tuple[str, int]] = []
    for g, _ in header:
        if out and out[-1][0] == g:
            out[-1] = (g, out[-1][1] + 1)
        else:
            out.append((g, 1))
    return out


# ---------------------------------------------------------------- Markdown


def _md(text: str) -> str:
    return re.sub(r"([|*_\\`])", r"\\\1", text)


def to_markdown(t: TableSpec) -> str:
    head = [_md(t.row_label)] + [_md(f"{g} {s}".strip()) for g, s in t.header]
    lines = [
        f"### Table {t.number}. {_md(t.title)}",
        "",
        "| " + " | ".join(head) + " |",
        "| :-- | " + " | ".join("--:" for _ in t.header) + " |",
    ]
    for name, cells in t.rows:
        out = []
        for c in cells:
            if not c.main:
                out.append("–")
                continue
            v = f"**{c.main}**" if c.bold else c.main
            out.append(" ".join(x for x in (v, c.ci) if x) + _md(c.mark))
        lines.append(f"| {_md(name)} | " + " | ".join(out) + " |")
    for label, values in t.footer:
        lines.append(f"| *{_md(label)}* | " + " | ".join(_md(v) for v in values) + " |")
    lines += ["", f"*{_md(t.caption)}*", ""]
    return "\n".join(lines)


# ---------------------------------------------------------------- LaTeX

_TEX_SPECIAL = {
    "\\": r"\textbackslash{}",
    "&": r"\&",
    "%": r"\%",
    "$": r"\$",
    "#": r"\#",
    "_": r"\_",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
}
_TEX_UNICODE = {
    "↑": r"$\uparrow$",
    "↓": r"$\downarrow$",
    "χ²": r"$\chi^2$",
    "α": r"$\alpha$",
    "×": r"$\times$",
    "·": r"$\cdot$",
    "–": "--",
    "—": "---",
    "≥": r"$\geq$",
    "≤": r"$\leq$",
    "±": r"$\pm$",
    "†": r"\textsuperscript{\dag}",
    "‡": r"\textsuperscript{\ddag}",
    "<": r"$<$",
    ">": r"$>$",
}


def tex_escape(text: str) -> str:
    """Escape LaTeX specials, map the few Unicode signs we use, set significance stars as superscripts."""
    out = "".join(_TEX_SPECIAL.get(ch, ch) for ch in str(text))
    for k, v in _TEX_UNICODE.items():
        out = out.replace(k, v)
    return re.sub(r"(\*+)", lambda m: f"$^{{{m.group(1)}}}$", out)


def _tex_mark(mark: str) -> str:
    return f"$^{{{mark}}}$" if mark else ""


def to_latex(t: TableSpec) -> str:
    ncol = len(t.header)
    lines = [
        r"\begin{table*}[p]",  # a float page of its own: fits one- and two-column papers (spans both columns)
        r"  \centering",
        r"  \small",
        f"  \\caption{{{tex_escape(t.title)}. {tex_escape(t.caption)}}}",
        f"  \\label{{tab:xbench-{t.ident}}}",
    ]
    lines.append(r"  \xbenchfit{%")  # shrink to the line width (and page height) when larger; never enlarge
    lines.append(f"  \\begin{{tabular}}{{l{'c' * ncol}}}")
    lines.append(r"  \toprule")
    groups = _groups(t.header)
    row1, rules, col = [tex_escape(t.row_label) if not any(s for _, s in t.header) else ""], [], 2
    for g, span in groups:
        row1.append(f"\\multicolumn{{{span}}}{{c}}{{{tex_escape(g)}}}" if span > 1 else tex_escape(g))
        rules.append(f"\\cmidrule(lr){{{col}-{col + span - 1}}}")
        col += span
    lines.append("  " + " & ".join(row1) + r" \\")
    if any(s for _, s in t.header):
        lines.append("  " + " ".join(rules))
        lines.append("  " + " & ".join([tex_escape(t.row_label)] + [tex_escape(s) for _, s in t.header]) + r" \\")
    lines.append(r"  \midrule")
    for name, cells in t.rows:
        out = []
        for c in cells:
            if not c.main:
                out.append("--")
                continue
            v = f"\\textbf{{{c.main}}}" if c.bold else c.main
            ci = f" {{\\scriptsize {c.ci}}}" if c.ci else ""
            out.append(v + ci + _tex_mark(c.mark))
        lines.append("  " + " & ".join([tex_escape(name)] + out) + r" \\")
    if t.footer:
        lines.append(r"  \midrule")
        for label, values in t.footer:
            lines.append("  " + " & ".join([tex_escape(label)] + [tex_escape(v) for v in values]) + r" \\")
    lines.append(r"  \bottomrule")
    lines.append(r"  \end{tabular}%")
    lines.append("  }")
    lines.append(r"\end{table*}")
    return "\n".join(lines) + "\n"


LATEX_PREAMBLE_NOTE = (
    "% xbench comparison tables. Needs \\usepackage{booktabs} and \\usepackage{graphicx}\n"
    "% in the preamble; \\input this file where the tables go (one- or two-column article).\n"
)
# \xbenchfit{...}: the table at its natural size, shrunk to the line width and to 85 % of the text height when
# larger. Defined once (\providecommand), so the file can be input twice.
LATEX_FIT_MACRO = r"""\makeatletter
\@ifundefined{xbench@box}{\newsavebox{\xbench@box}}{}
\providecommand{\xbenchfit}[1]{\begingroup\sbox{\xbench@box}{#1}%
  \ifdim\wd\xbench@box>\linewidth\sbox{\xbench@box}{\resizebox{\linewidth}{!}{\usebox{\xbench@box}}}\fi
  \@tempdima=\ht\xbench@box\advance\@tempdima by \dp\xbench@box
  \ifdim\@tempdima>0.85\textheight\sbox{\xbench@box}{\resizebox*{!}{0.85\textheight}{\usebox{\xbench@box}}}\fi
  \usebox{\xbench@box}\endgroup}
\makeatother
"""
LATEX_FLUSH_EVERY = 6  # \clearpage after this many tables: LaTeX holds at most 18 floats in waiting


def latex_document_body(tables: list[TableSpec]) -> str:
    """The whole tables.tex: the note, the fit macro, the tables, a \\clearpage every few tables and at the end."""
    parts = [LATEX_PREAMBLE_NOTE, LATEX_FIT_MACRO]
    for i, t in enumerate(tables, start=1):
        parts.append(to_latex(t))
        if i % LATEX_FLUSH_EVERY == 0 or i == len(tables):
            parts.append("\\clearpage\n")
    return "\n".join(parts)


# ---------------------------------------------------------------- HTML


def _h(text: str) -> str:
    return html.escape(str(text), quote=True)


def to_html(t: TableSpec) -> str:
    groups = _groups(t.header)
    two_rows = any(s for _, s in t.header)
    lines = [
        f'<figure class="table" id="{_h(t.ident)}">',
        f"<figcaption><b>Table {t.number}.</b> {_h(t.title)}. {_h(t.caption)}</figcaption>",
        "<table>",
        "<thead>",
    ]
    rowspan = ' rowspan="2"' if two_rows else ""
    first = [f'<th{rowspan} class="name">{_h(t.row_label)}</th>']
    for g, span in groups:
        first.append(
            f'<th colspan="{span}">{_h(g)}</th>'
            if span > 1
            else (f"<th>{_h(g)}</th>" if not two_rows else f'<th class="grp">{_h(g)}</th>')
        )
    lines.append("<tr>" + "".join(first) + "</tr>")
    if two_rows:
        lines.append("<tr>" + "".join(f"<th>{_h(s)}</th>" for _, s in t.header) + "</tr>")
    lines += ["</thead>", "<tbody>"]
    for name, cells in t.rows:
        out = []
        for c in cells:
            if not c.main:
                out.append('<td class="na">–</td>')
                continue
            v = f"<strong>{_h(c.main)}</strong>" if c.bold else _h(c.main)
            ci = f' <span class="ci">{_h(c.ci)}</span>' if c.ci else ""
            mark = f"<sup>{_h(c.mark)}</sup>" if c.mark else ""
            out.append(f"<td>{v}{ci}{mark}</td>")
        lines.append(f'<tr><th class="name">{_h(name)}</th>' + "".join(out) + "</tr>")
    lines.append("</tbody>")
    if t.footer:
        lines.append("<tfoot>")
        for label, values in t.footer:
            lines.append(
                f'<tr><th class="name">{_h(label)}</th>' + "".join(f"<td>{_h(v)}</td>" for v in values) + "</tr>"
            )
        lines.append("</tfoot>")
    lines += ["</table>", "</figure>"]
    return "\n".join(lines)
