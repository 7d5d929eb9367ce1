"""tables.tex compiles with pdflatex in a one-column and a two-column article, with no extra settings.

Skipped where pdflatex is absent; `.ci/run` installs it (Debian's texlive-latex-base and
texlive-latex-recommended) so that CI always runs these tests.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from test_report_outputs import make_run

from xbench.report import write_report

pytestmark = pytest.mark.skipif(shutil.which("pdflatex") is None, reason="pdflatex is not installed")

DOCUMENT = r"""\documentclass[{layout}]{{article}}
\usepackage[T1]{{fontenc}}
\usepackage{{booktabs}}
\usepackage{{graphicx}}
\begin{{document}}
\section{{Results}}
Some text before the tables.
\input{{tables.tex}}
Some text after the tables.
\end{{document}}
"""


@pytest.fixture(scope="module")
def tables_tex(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("latex-runs")
    # Two tasks, two models and two seeds: enough tables (result tables per block, rank tables and concept
    # tables) to overflow LaTeX's 18 waiting floats if the file did not flush them.
    runs = [
        make_run(base / "a", "upland-roads", ["cnn", "resnet"], [0, 1], rng_seed=1, artifacts=False),
        make_run(base / "b", "upland-clearings", ["cnn", "resnet"], [0, 1], rng_seed=2, artifacts=False),
    ]
    summary = write_report(runs, base / "report", "tex", n_resamples=200, figures=False)
    assert summary.n_tables > 18
    return base / "report" / "tables.tex"


@pytest.mark.parametrize("layout", ["onecolumn", "twocolumn"])
def test_tables_compile_in_both_layouts(tables_tex, tmp_path, layout):
    shutil.copy(tables_tex, tmp_path / "tables.tex")
    (tmp_path / "doc.tex").write_text(DOCUMENT.format(layout=layout))
    res = subprocess.run(
        ["pdflatex", "-interaction=nonstopmode", "-halt-on-error", "doc.tex"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=300,
    )
    log = (tmp_path / "doc.log").read_text(errors="replace")
    assert res.returncode == 0, res.stdout[-3000:]
    assert "Too many unprocessed floats" not in log
    assert "dead cycles" not in log
    assert "Overfull \\hbox" not in log  # every table fits the line (shrunk when wider)
    assert (tmp_path / "doc.pdf").stat().st_size > 0


def test_tables_tex_holds_every_table_including_concepts(tables_tex):
    tex = tables_tex.read_text()
    n = tex.count("\\begin{table*}")
    assert n == tex.count("\\end{table*}") and n > 18
    assert "concept" in tex.lower()
    assert tex.count("\\clearpage") >= n // 6


@pytest.mark.skipif(shutil.which("bibtex") is None, reason="bibtex is not installed")
def test_refs_bib_runs_through_bibtex_without_warnings(tmp_path):
    from xbench.report.bib import CATALOGUE, render_bib

    (tmp_path / "refs.bib").write_text(render_bib(list(CATALOGUE)))
    (tmp_path / "d.tex").write_text(
        "\\documentclass{article}\n\\begin{document}\n\\nocite{*}\n\\bibliographystyle{plain}\n"
        "\\bibliography{refs}\n\\end{document}\n"
    )
    run = dict(cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert subprocess.run(["pdflatex", "-interaction=nonstopmode", "d.tex"], **run).returncode == 0
    assert subprocess.run(["bibtex", "d"], **run).returncode == 0
    blg = (tmp_path / "d.blg").read_text()
    assert "Warning" not in blg and "error" not in blg.lower(), blg
    assert (tmp_path / "d.bbl").read_text().count("\\bibitem") == len(CATALOGUE)
