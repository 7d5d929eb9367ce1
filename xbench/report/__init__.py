"""Reports for methods sections: statistics, tables, figures, methods text and BibTeX.

One call writes everything::

    from xbench.report import write_report
    summary = write_report(["runs/demo"], "runs/demo/report", formats=("md", "tex", "html"))

Modules: ``load`` (run folders), ``stats`` (bootstrap, Wilcoxon + Holm, Friedman, Nemenyi), ``compare``
(records -> table numbers), ``tables`` (Markdown, LaTeX, HTML), ``figures``, ``methods``, ``bib``, ``writer``.
"""

from xbench.api import make_module_callable
from xbench.report.writer import ReportSummary, write_report

__all__ = ["ReportSummary", "write_report"]

# `xbench.report(...)` is also the front door's verb (see xbench.api.make_module_callable).
make_module_callable(__name__, "report")
