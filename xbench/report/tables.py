"""Comparison tables: one neutral table model, rendered as Markdown, LaTeX (booktabs) and HTML.

Results tables: one per (task, model) block and metric family; rows are explainers, cells the mean with its
bootstrap interval, its place between the controls (a) and a mark when a real method differs from the
column's best real method (all pairs with Holm); bold: methods that cannot be told apart from the best.
Rank tables: one per model family (torch models, black boxes) and metric family; average ranks of the real
methods across task x model x seed blocks with the Friedman test, and the Nemenyi CD where Friedman rejects.
"""

from __future__ import annotations

import html
import math
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from xbench.report.compare import CONTROLS, Column, Summary
from xbench.report.meta import family_rank
from xbench.stats import MIN_N_FOR_CI


@dataclass
class TCell:
    main: str = ""  # "" renders as a dash (no value)
    ci: str = ""
    mark: str = ""
    bold: bool = False
    anchor: str = ""  # position between the controls, e.g. "a 0.63"


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


def fmt_p(p: float | np.floating | None) -> str:
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
            header = [(c.label.split(" (")[0], _sub(c, block)) for c in fcols]
            explainers = [e for e in summary.explainers if e in set(block["explainer"])]
            cells: dict[str, list[TCell]] = {e: [] for e in explainers}
            ns: list[int] = []
            tests: list[dict] = []
            percentile = 0
            col_notes: list[str] = []
            for c in fcols:
                sub = block[(block["metric"] == c.metric) & (block["truth"] == c.truth)].set_index("explainer")
                d = decimals_for(sub["mean"].to_numpy())
                if (sub["unit"] == "tile").any():
                    ns.extend(int(n) for n in sub["n"])
                    methods = sub[sub["role"] == "method"]
                    if len(methods):
                        tests.append(
                            {
                                "label": c.label,
                                "m": int(methods["n_comparisons"].max()),
                                "min_n": int(methods["min_n_for_test"].max()),
                                "n": int(methods["test_n"].max()),
                                "comparator": str(methods["comparator"].iloc[0]),
                                "unit": str(methods["test_unit"].iloc[0]),
                            }
                        )
                percentile += int((sub["ci_method"] == "percentile").sum())
                note = summary.column_notes.get((task, model, c.metric, c.truth))
                if note:
                    col_notes.append(note)
                flag = summary.control_notes.get((task, model, c.metric, c.truth))
                if flag:
                    col_notes.append(f"{c.label}: {flag}")
                for e in explainers:
                    if e not in sub.index or not np.isfinite(sub.at[e, "mean"]):
                        cells[e].append(TCell())
                        continue
                    r = sub.loc[e]
                    ci = f"[{fmt(r['ci_low'], d)}, {fmt(r['ci_high'], d)}]" if np.isfinite(r["ci_low"]) else ""
                    anchor = f"a {fmt(r['anchor'], 2)}" if e not in CONTROLS and np.isfinite(r["anchor"]) else ""
                    cells[e].append(TCell(fmt(r["mean"], d), ci, str(r["mark"]), bool(r["top_group"]), anchor))
            caption = _result_caption(conf, s, seeds, ns, fcols, block, percentile, tests, col_notes)
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
    tests: list[dict],
    col_notes: list[str],
) -> str:
    parts = []
    if ns:
        n_text = f"{min(ns)}" if min(ns) == max(ns) else f"{min(ns)} to {max(ns)}"
        if len(seeds) > 1:
            parts.append(
                f"Mean over {_seed_text(seeds)} of each seed's mean over its explained test tiles (n = {n_text} "
                f"seed × tile values) with a {conf}% hierarchical bootstrap interval ({s['n_resamples']} resamples: "
                "seeds drawn with replacement, then tiles within each drawn seed)."
            )
        else:
            parts.append(
                f"Mean over n = {n_text} explained test tiles (tiles with a defined value) with a {conf}% "
                f"{s['ci_method']} bootstrap confidence interval ({s['n_resamples']} resamples over tiles), "
                f"{_seed_text(seeds)}."
            )
    if any((block[(block["metric"] == c.metric) & (block["truth"] == c.truth)]["unit"] == "seed").all() for c in cols):
        parts.append(
            f"† One value per seed: mean over {_seed_text(seeds)} (with a {conf}% {s['ci_method']} "
            f"interval when there are at least {MIN_N_FOR_CI} seeds), not tested."
        )
    if any(c.info.by_magnitude for c in cols):
        parts.append("|·|: ranked by the magnitude of the similarity to the randomized model's map (toward 0 = moved).")
    parts.append(
        "a: where a method's mean sits between the controls, (x - random) / (oracle - random): 0 = random, "
        "1 = oracle (no a: undefined, e.g. the oracle does not beat random). Controls are anchors: never bold, "
        "marked or tested."
    )
    if tests:
        against = s.get("against")
        m = max(t["m"] for t in tests)
        if against:
            parts.append(
                f"Marks: two-sided Wilcoxon signed-rank test of each method against `{against}` (declared before the "
                f"run), paired by unit, Holm-corrected over the {m} comparisons of the column: * p < 0.05, "
                "** p < 0.01, *** p < 0.001."
            )
        else:
            parts.append(
                "Bold: the best real method and every method that cannot be told apart from it. Marks: its "
                "difference from the best, two-sided Wilcoxon signed-rank test paired by unit, Holm-corrected over "
                f"all {m} pairs of real methods in the column: * p < 0.05, ** p < 0.01, *** p < 0.001."
            )
        if any(t["unit"] == "tile" for t in tests):
            parts.append(
                "Tiles are the units (each tile's value averaged over the seeds): p-values are conditional on the "
                + (
                    "trained network of this block."
                    if len(seeds) <= 1
                    else f"{len(seeds)} trained networks of this block."
                )
            )
        if any(t["unit"] == "seed" for t in tests):
            parts.append(
                f"In {', '.join(t['label'] for t in tests if t['unit'] == 'seed')} the units are the "
                f"{len(seeds)} model seeds (each seed's mean over tiles): independent training runs."
            )
        untestable = [t for t in tests if t["n"] < t["min_n"]]
        if untestable:
            parts.append(
                "No test is possible at its n in "
                + "; ".join(
                    f"{t['label']} (n = {t['n']}; the exact test needs n ≥ {t['min_n']} to reject at "
                    f"α = {s['alpha']:g} after Holm over {t['m']} comparisons)"
                    for t in untestable
                )
                + "."
            )
    if percentile:
        parts.append(f"In {percentile} cell(s) BCa was undefined and the percentile interval is shown.")
    parts += col_notes
    parts.append("A dash: no value.")
    return " ".join(parts)


def rank_tables(summary: Summary) -> list[TableSpec]:
    alpha = summary.settings["alpha"]
    out = []
    groups = list(dict.fromkeys(g for g, _, _ in summary.rank_tests))
    for group in groups:
        tests = [
            summary.rank_tests[(group, c.metric, c.truth)]
            for c in summary.columns
            if (group, c.metric, c.truth) in summary.rank_tests
        ]
        for fam in sorted({t.column.info.family for t in tests}, key=family_rank):
            ft = [t for t in tests if t.column.info.family == fam]
            explainers = [e for e in summary.explainers if any(e in t.explainers for t in ft)]
            rows: dict[str, list[TCell]] = {e: [] for e in explainers}
            for t in ft:
                best = float(np.min(t.avg_ranks))
                for e in explainers:
                    if e in t.explainers:
                        r = float(t.avg_ranks[t.explainers.index(e)])
                        rows[e].append(TCell(f"{r:.2f}", bold=bool(np.isclose(r, best))))
                    else:
                        rows[e].append(TCell())
            footer = [
                ("blocks N", [str(len(t.blocks)) for t in ft]),
                ("methods k", [str(len(t.explainers)) for t in ft]),
                ("Friedman χ²", [fmt(t.friedman.statistic, 2) or "n/a" for t in ft]),
                ("Friedman p", [fmt_p(t.friedman.p_value).replace("p = ", "").replace("p ", "") for t in ft]),
                (
                    f"Nemenyi CD (α = {alpha:g})",
                    [(fmt(t.cd, 2) or "n/a") if t.rejects else "not drawn" for t in ft],
                ),
            ]
            n_blocks = sorted({len(t.blocks) for t in ft})
            tasks = sorted({b[0] for t in ft for b in t.blocks})
            models = sorted({b[1] for t in ft for b in t.blocks})
            excluded = sorted({e for t in ft for e in t.excluded})
            caption = (
                f"Ranking of the {group} ({', '.join(models)}): average rank of each real method (1 = best) across "
                f"{'/'.join(map(str, n_blocks))} task × model × seed block(s), a block's value being the seed's "
                "mean over tiles (ties share their average rank). Controls are anchors and never ranked. "
                "Friedman test over blocks (n/a with fewer than 3 methods or 2 blocks). Blocks of the same task "
                f"share its test tiles ({', '.join(tasks)}), and seeds of one model share its data: the blocks are "
                "not fully independent, so the p-values are approximate. Nemenyi critical difference "
                f"CD = q · sqrt(k(k+1)/(6N)) at α = {alpha:g} (Demsar 2006), given only where the Friedman test "
                "rejects. Bold: best average rank."
                + (
                    f" A dash: the method lacks a value in some block ({', '.join(excluded)}; the document's notes "
                    "say why)."
                    if excluded
                    else ""
                )
            )
            not_drawn = [
                f"{t.column.label} ({fmt_p(t.friedman.p_value)})" for t in ft if not t.rejects and len(t.blocks) >= 2
            ]
            if not_drawn:
                caption += (
                    f" The Friedman test does not reject at α = {alpha:g} for {', '.join(not_drawn)}: the average "
                    "ranks there do not show that any method differs, and no critical-difference diagram is drawn."
                )
            header = [(t.column.label.split(" (")[0], "" if t.column.truth == "none" else t.column.truth) for t in ft]
            out.append(
                TableSpec(
                    slug("ranks", group, fam),
                    f"Average ranks across tasks, {group}: {fam} metrics",
                    caption,
                    header,
                    [(e, rows[e]) for e in explainers],
                    footer,
                )
            )
    return out


def variant_tables(sensitivity: pd.DataFrame) -> list[TableSpec]:
    """Protocol sensitivity: Kendall's tau between the run's ranking of the real methods and each variant's,
    one table per task, rows variant / model, columns the metrics the variants re-scored."""
    out: list[TableSpec] = []
    if sensitivity is None or sensitivity.empty:
        return out
    for task, g in sensitivity.groupby("task", sort=False):
        cols = list(dict.fromkeys(g["column"]))
        header = [(c.split(" (")[0], c.split(" (")[1].rstrip(")") if " (" in c else "") for c in cols]
        rows = []
        for (variant, model), r in g.groupby(["variant", "model"], sort=False):
            by_col = r.set_index("column")
            cells = []
            for c in cols:
                if c not in by_col.index:
                    cells.append(TCell())
                    continue
                x = by_col.loc[c]
                mark = "‡" if bool(x["flipped"]) else ""
                if x["oracle_beats_random"] is False:
                    mark += "§"
                cells.append(
                    TCell(fmt(float(x["kendall_tau"]), 2) or "n/a", f"({x['swapped_pairs']}/{x['pairs']})", mark)
                )
            rows.append((f"{variant} / {model}", cells))
        caption = (
            "Kendall's tau (tau-b) between the ranking of the real methods by their mean in the run and in each "
            "protocol variant (1 = same order, -1 = reversed), with the number of method pairs whose order "
            "swapped. ‡: the ranking flips (the top method changes, or tau ≤ 0). §: in the variant the oracle "
            "no longer beats random on that column. A dash: the variant did not re-score that column."
        )
        out.append(
            TableSpec(
                slug("variants", str(task)),
                f"{task}: protocol sensitivity",
                caption,
                header,
                rows,
                row_label="variant / model",
            )
        )
    return out


def flags_markdown(title: str, items: list[str]) -> str:
    if not items:
        return ""
    return f"\n## {title}\n\n" + "\n".join(f"- {x}" for x in items) + "\n"


def left_out_markdown(summary: Summary) -> str:
    """The document's own list of what the rankings leave out and why (empty when nothing is)."""
    if not summary.left_out:
        return ""
    return "\n## Left out of the rankings, and why\n\n" + "\n".join(f"- {x}" for x in summary.left_out) + "\n"


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
            out.append(" ".join(x for x in (v, c.ci) if x) + _md(c.mark) + (f" ({c.anchor})" if c.anchor else ""))
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
    "§": r"\textsuperscript{\S}",
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
    if not mark:
        return ""
    return f"$^{{{mark}}}$" if set(mark) <= {"*"} else tex_escape(mark)


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
            anchor = f" {{\\scriptsize ({c.anchor})}}" if c.anchor else ""
            out.append(v + ci + _tex_mark(c.mark) + anchor)
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
            anchor = f' <span class="ci">({_h(c.anchor)})</span>' if c.anchor else ""
            out.append(f"<td>{v}{ci}{mark}{anchor}</td>")
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
