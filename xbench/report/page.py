"""The HTML report page: its style sheet, its skeleton and the rendering of each section.

``writer.py`` decides what goes into the report; this module only decides how the HTML page looks. The
page is one self-contained file (figures inlined as PNG data), readable offline.
"""

from __future__ import annotations

import base64
import html
import re
from collections.abc import Sequence
from string import Template

from xbench.report import figures as F
from xbench.report import recommend as R
from xbench.report import tables as T

# Our own palette: deep spruce for headings and rules, warm sand for the recommendation panel, slate text.
STYLE = """
:root{--ink:#1f2a30;--muted:#5b6770;--spruce:#1d4d4f;--moss:#6a8f3a;--sand:#f6efe0;--sand-edge:#d9c7a0;
--rule:#c9d3d6;--paper:#fcfcfa}
*{box-sizing:border-box}
body{font-family:'DejaVu Sans','Noto Sans',system-ui,sans-serif;margin:0;color:var(--ink);
background:var(--paper);line-height:1.5}
header.top{background:var(--spruce);color:#fff;padding:1.2em 2em .9em}
header.top h1{margin:0;font-size:1.5em;letter-spacing:.02em}
header.top p{margin:.3em 0 0;color:#d7e4e2;font-size:.9em}
header.top code{background:rgba(255,255,255,.12);color:#fff}
main{max-width:1180px;margin:0 auto;padding:0 2em 3em}
nav.toc{margin:1.2em 0;padding:.6em 1em;border-left:4px solid var(--moss);background:#fff}
nav.toc h2{margin:.1em 0 .3em;font-size:1em;border:0;color:var(--spruce)}
nav.toc ol{columns:2;margin:0;padding-left:1.4em;font-size:.9em}
h2{color:var(--spruce);border-bottom:2px solid var(--rule);padding-bottom:.15em;margin-top:2em}
h3{color:var(--spruce);margin:1.4em 0 .4em;font-size:1.05em}
a{color:var(--spruce)}
section.advice{background:var(--sand);border:1px solid var(--sand-edge);border-radius:6px;padding:.4em 1.4em 1em;
margin-top:1.5em}
section.advice h2{border-bottom-color:var(--sand-edge)}
section.advice ul.reading li{margin:.2em 0}
table.advice{border-collapse:collapse;width:100%;background:#fff;font-size:.9em}
table.advice th{background:var(--spruce);color:#fff;text-align:left;padding:.35em .6em;font-weight:600}
table.advice td{border-top:1px solid var(--rule);padding:.35em .6em;vertical-align:top;text-align:left}
span.pick.lead span.cost{color:#eef3e6}
span.pick{display:inline-block;margin:.1em .3em .1em 0;padding:.05em .45em;border-radius:3px;background:#e6eedb;
border:1px solid #b9cc9c;white-space:nowrap}
span.pick.lead{background:var(--moss);color:#fff;border-color:var(--moss);font-weight:600}
span.cost{color:var(--muted);font-size:.85em}
ul.caveats li{color:#6d4b1f;font-size:.9em}
table{border-collapse:collapse;margin:.6em 0 .3em;font-size:.85em}
thead tr:first-child th{border-top:2px solid var(--spruce)}thead tr:last-child th{border-bottom:1px solid var(--spruce)}
tbody tr:last-child td,tbody tr:last-child th{border-bottom:2px solid var(--spruce)}
th,td{padding:.25em .6em;text-align:center}th.name{text-align:left;font-weight:normal}
tfoot th,tfoot td{font-size:.9em;color:var(--muted)}
.ci{color:var(--muted);font-size:.85em}td.na{color:#9aa3a8}
figure{margin:1.2em 0}figcaption{font-size:.85em;color:var(--ink);max-width:62em}
figure.plot img{max-width:100%;height:auto;border:1px solid var(--rule);background:#fff}
code{background:#eef1f1;padding:0 .25em;border-radius:2px}
ul.notes li{font-size:.85em;color:var(--muted)}
td.why{text-align:left}
"""

PAGE = Template(
    """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8"/>
<meta name="viewport" content="width=device-width, initial-scale=1"/>
<title>$title</title>
<style>$style</style>
</head>
<body>
<header class="top"><h1>$title</h1><p>$subtitle</p></header>
<main>
<nav class="toc"><h2>Contents</h2><ol>$toc</ol></nav>
$sections
</main>
</body>
</html>
"""
)


def inline_markdown(text: str) -> str:
    s = html.escape(text, quote=True)
    s = re.sub(r"`([^`]+)`", r"<code>\1</code>", s)
    s = re.sub(r"\*\*([^*]+)\*\*", r"<b>\1</b>", s)
    s = re.sub(r"\*([^*]+)\*", r"<em>\1</em>", s)
    return s


def markdown_to_html(md: str) -> str:
    """The small subset methods.md uses: headings, paragraphs, '- ' lists, `code` and *emphasis*."""
    out: list[str] = []
    para: list[str] = []
    items: list[str] = []

    def flush() -> None:
        if para:
            out.append("<p>" + inline_markdown(" ".join(para)) + "</p>")
            para.clear()
        if items:
            out.append("<ul>" + "".join(f"<li>{inline_markdown(i)}</li>" for i in items) + "</ul>")
            items.clear()

    for line in md.splitlines():
        if line.startswith("#"):
            flush()
            level = min(len(line) - len(line.lstrip("#")) + 1, 6)
            out.append(f"<h{level}>{inline_markdown(line.lstrip('#').strip())}</h{level}>")
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


def recommendation_html(recs: list[R.BlockRecommendation], alpha: float) -> str:
    """The recommendation section: per block, the plain reading, the top groups with costs, the caveats."""
    h = html.escape
    out = ['<section class="advice" id="advice"><h2>Which explainer to use</h2>']
    out.append(
        "<p>Per task and model: the explainers that cannot be told apart from the best on each question "
        f"(paired Wilcoxon tests of every pair of methods, Holm-adjusted, α = {alpha:g}), with their cost per tile. "
        "Controls (<code>random</code>, <code>edges</code>, <code>oracle</code>) are anchors, not candidates.</p>"
    )
    if not recs:
        out.append("<p>No block has a localization, faithfulness or sanity metric: nothing to recommend.</p>")
    for r in recs:
        out.append(f"<h3>{h(r.title)}</h3>")
        out.append('<ul class="reading">' + "".join(f"<li>{inline_markdown(s)}</li>" for s in r.reading) + "</ul>")
        out.append(
            '<table class="advice"><thead><tr><th>question</th><th>metric</th>'
            "<th>top group: mean (cost per tile)</th><th>anchors</th></tr></thead><tbody>"
        )
        for a in r.aspects:
            picks = "".join(
                f'<span class="pick{" lead" if i == 0 else ""}">{h(e)} {h(R._fmt(a.means[e]))} '
                f'<span class="cost">({h(R.fmt_seconds(r.seconds_per_tile.get(e)))})</span></span>'
                for i, e in enumerate(a.group)
            )
            anchors = "<br/>".join(f"{h(e)} {h(R._fmt(v))}" for e, v in a.anchors.items()) or "–"
            out.append(
                f"<tr><td><b>{h(a.aspect)}</b>: {h(R.ASPECT_QUESTION[a.aspect])}</td>"
                f"<td>{h(a.label)} {h(a.arrow)}</td><td>{picks}</td><td>{anchors}</td></tr>"
            )
        out.append("</tbody></table>")
        if r.caveats:
            out.append('<ul class="caveats">' + "".join(f"<li>{inline_markdown(c)}</li>" for c in r.caveats) + "</ul>")
    out.append("</section>")
    return "\n".join(out)


def figure_html(f: F.FigureFile) -> str:
    h = html.escape
    data = base64.b64encode(f.png.read_bytes()).decode("ascii")
    return (
        f'<figure class="plot" id="{h(f.stem)}"><img src="data:image/png;base64,{data}" '
        f'alt="{h(f.title)}"/><figcaption><b>{h(f.title)}.</b> {h(f.caption)}</figcaption></figure>'
    )


FIGURE_SECTIONS = [
    ("gallery", "Heatmap gallery"),
    ("curves", "Deletion and insertion"),
    ("randomization", "Randomization sanity check"),
    ("clusters", "Activation clusters"),
    ("reliance", "Interventional importance"),
    ("cost", "Cost vs quality"),
    ("breakdown", "Breakdowns"),
]


def render_page(
    run_dirs: list,
    recs: list[R.BlockRecommendation],
    alpha: float,
    results: list[T.TableSpec],
    ranks: list[T.TableSpec],
    figs: list[F.FigureFile],
    methods_md: str,
    log: list[str],
    concepts: Sequence[T.TableSpec] = (),
    extra_sections: Sequence[tuple[str, str, str]] = (),
) -> str:
    """The whole HTML page. ``extra_sections``: (anchor, heading, inner HTML) placed before the methods."""
    h = html.escape
    toc = [("advice", "Which explainer to use"), ("results", "Results by task and model"), ("ranks", "Ranks")]
    toc += [(f"fig-{k}", v) for k, v in FIGURE_SECTIONS if any(f.section == k for f in figs)]
    if concepts:
        toc.append(("concepts", "Concept reports"))
    toc += [(a, t) for a, t, _ in extra_sections]
    toc += [("methods", "Methods text"), ("notes", "Notes")]

    body = [recommendation_html(recs, alpha)]
    body.append('<section id="results"><h2>Results by task and model</h2>')
    body += [T.to_html(t) for t in results] or ["<p>No results.</p>"]
    body.append("</section>")
    body.append('<section id="ranks"><h2>Ranks across tasks and models</h2>')
    body += [T.to_html(t) for t in ranks] or ["<p>No rank statistics.</p>"]
    body += [figure_html(f) for f in figs if f.section == "cd"]
    body.append("</section>")
    for key, name in FIGURE_SECTIONS:
        chosen = [f for f in figs if f.section == key]
        if chosen:
            body.append(f'<section id="fig-{key}"><h2>{h(name)}</h2>')
            body += [figure_html(f) for f in chosen]
            body.append("</section>")
    if concepts:
        body.append('<section id="concepts"><h2>Concept reports</h2>')
        body += [T.to_html(t) for t in concepts]
        body.append("</section>")
    for anchor, title, inner in extra_sections:
        body.append(f'<section id="{h(anchor)}"><h2>{h(title)}</h2>{inner}</section>')
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
    return PAGE.substitute(
        title="xbench comparison report",
        subtitle="Run folders: " + ", ".join(f"<code>{h(str(d))}</code>" for d in run_dirs),
        style=STYLE,
        toc="".join(f'<li><a href="#{h(a)}">{h(t)}</a></li>' for a, t in toc),
        sections="\n".join(body),
    )
