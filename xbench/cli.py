"""The `xbench` command: parses arguments, hands them to one verb module, prints errors as one line.

Each verb lives in ``xbench/commands/<verb>.py`` with ``add_arguments(parser)`` and ``run(args) -> int``.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from xbench import __version__
from xbench.errors import XbenchInputError

VERBS: dict[str, str] = {
    "synth": "synthesize landscape tiles with planted structures (and their twins)",
    "train": "train or load the models of a task and print their accuracy and reliance",
    "run": "run a task's benchmark grid and write the result store",
    "report": "statistics, tables, figures and methods text from run folders",
    "check": "compare a run against a baseline under faithfulness gates (exit 1 on a regression)",
    "demo": "the whole pipeline on the small demo task, report included",
    "explainers": "list the explainers with their citations, needs and defaults",
    "metrics": "list the metrics with definitions, citations, ranges and needs",
    "show": "one tile's bands, truths and every explainer's map with its metric values, as a PNG",
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="xbench", description=__doc__.splitlines()[0])
    parser.add_argument("--version", action="version", version=f"xbench {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for verb, help_text in VERBS.items():
        p = sub.add_parser(verb, help=help_text, description=help_text)
        module = importlib.import_module(f"xbench.commands.{verb}")
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: usage errors exit 2, --help and --version exit 0
        return int(exc.code or 0)
    if not getattr(args, "verb", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except XbenchInputError as exc:
        print(f"xbench {args.verb}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"xbench {args.verb}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
