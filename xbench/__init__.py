"""xbench: faithfulness benchmarks for explanations of multispectral tile classifiers.

The pipeline's verbs are functions of this package (they load their stage on first use, so ``import
xbench`` stays light)::

    import xbench
    pack, scenes = xbench.synthesize("conifer-upland", 16, seed=1, twins=True)
    trained = xbench.train("demo")                  # accuracy and reliance per model and seed
    summary = xbench.run("demo", "runs/demo")       # the benchmark grid -> a run folder
    xbench.report(["runs/demo"], "runs/report")     # tables, figures, methods text
    result = xbench.check("runs/demo", "results/demo", "results/gates.toml")

``xbench.explain`` and ``xbench.score`` run one explainer or one metric on arrays; ``xbench.load``
parses a task (a path, a shipped name or a dict) once.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

VERBS = ("load", "synthesize", "train", "run", "report", "check", "explain", "score")
__all__ = ["__version__", *VERBS]

if TYPE_CHECKING:
    from xbench.api import check, explain, load, report, run, score, synthesize, train  # noqa: F401


def __getattr__(name: str) -> Any:
    # Lazy: the verbs live in xbench.api, which imports the stages only when a verb is called.
    if name in VERBS:
        from xbench import api

        return getattr(api, name)
    raise AttributeError(f"module 'xbench' has no attribute {name!r}")
