"""The `xbench` command: parses arguments, hands them to one verb module, prints errors as one line.

Each verb lives in ``xbench/commands/<verb>.py`` with ``add_arguments(parser)`` and ``run(args) -> int``.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import sys
import warnings

from xbench import __version__
from xbench.errors import XbenchInputError

DESCRIPTION = (
    "Benchmark explanation methods for multispectral satellite-tile classifiers: synthesize landscape tiles "
    "with planted structures and counterfactual twins, train small CPU models, explain them with pixel and "
    "concept methods, score the maps against planted and model-verified evidence, and report or gate the "
    "comparison."
)
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


class OneLineParser(argparse.ArgumentParser):
    """Usage errors as one line (``xbench run: error: ...``) and exit 2, without the usage block."""

    def error(self, message: str) -> None:  # type: ignore[override]
        print(f"{self.prog}: error: {message} (see {self.prog} --help)", file=sys.stderr)
        sys.exit(2)


def build_parser() -> argparse.ArgumentParser:
    parser = OneLineParser(prog="xbench", description=DESCRIPTION)
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
    verb = f"xbench {args.verb}"

    def one_line_warning(message, category, filename, lineno, file=None, line=None) -> None:  # noqa: ANN001
        try:
            print(f"{verb}: warning: {' '.join(str(message).split())}", file=sys.stderr)
        except (BrokenPipeError, OSError):
            pass

    saved = warnings.showwarning
    warnings.showwarning = one_line_warning  # library warnings as one line each, without source lines
    try:
        return _run_verb(args, verb)
    finally:
        warnings.showwarning = saved


def _run_verb(args: argparse.Namespace, verb: str) -> int:
    try:
        return int(args._run(args) or 0)
    except XbenchInputError as exc:
        return _fail(verb, str(exc))
    except KeyboardInterrupt:
        print(f"{verb}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # `xbench explainers | head`: the reader left; say so once, on stderr
        _silence_stdout()
        return _fail(verb, "output closed before everything was written (broken pipe)")
    except MemoryError:
        return _fail(verb, "out of memory: the sizes asked for are too large for this machine (lower them)")
    except UnicodeError as exc:
        # the decode/encode/translate subclasses carry `reason`; a bare UnicodeError has only its message
        return _fail(verb, f"a file is not UTF-8 text ({getattr(exc, 'reason', exc)})")
    except OSError as exc:  # read-only or full destinations, missing folders, permissions
        return _fail(verb, _describe_os_error(exc))
    except SystemExit as exc:  # user code (a model factory, a plugin) calling sys.exit
        return _fail(verb, f"user code called sys.exit({exc.code!r}); nothing was measured", code=1)


def _fail(verb: str, message: str, code: int = 2) -> int:
    text = " ".join(str(message).split())  # one line, whatever the message held
    try:
        print(f"{verb}: error: {text}", file=sys.stderr)
    except (BrokenPipeError, OSError):
        pass
    return code


def _describe_os_error(exc: OSError) -> str:
    where = exc.filename if exc.filename is not None else "output"
    reasons = {
        errno.EACCES: "permission denied",
        errno.EROFS: "read-only file system",
        errno.ENOSPC: "no space left on the device",
        errno.EDQUOT: "disk quota exceeded",
        errno.ENOENT: "no such file or folder",
        errno.EISDIR: "is a folder, not a file",
        errno.ENOTDIR: "a part of the path is not a folder",
    }
    return f"{where}: {reasons.get(exc.errno or 0, exc.strerror or type(exc).__name__)}"


def _silence_stdout() -> None:
    """Point stdout at /dev/null so that the interpreter's last flush does not fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):
        pass


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
