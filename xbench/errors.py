"""Errors raised at xbench's boundaries, and the TOML loader that names file, key and line.

Every stage raises :class:`XbenchInputError` for bad input. The message always names where the problem
is (file, key or array), what was expected and what was found, so the CLI can print it as one line.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any


class XbenchInputError(ValueError):
    """Bad input at a boundary (recipe, task file, tile pack, user model, gate file...)."""

    def __init__(self, where: str, problem: str, *, expected: Any = None, found: Any = None):
        self.where = where
        self.problem = problem
        self.expected = expected
        self.found = found
        msg = f"{where}: {problem}"
        if expected is not None:
            msg += f" (expected {expected}"
            msg += f", found {found!r})" if found is not None else ")"
        elif found is not None:
            msg += f" (found {found!r})"
        super().__init__(msg)


def load_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file as plain data; syntax errors name the file and line."""
    path = Path(path)
    if not path.is_file():
        raise XbenchInputError(str(path), "file not found")
    try:
        with path.open("rb") as fh:
            return tomllib.load(fh)
    except UnicodeDecodeError as exc:
        raise XbenchInputError(str(path), f"not UTF-8 text (byte {exc.start})", expected="a UTF-8 TOML file") from None
    except tomllib.TOMLDecodeError as exc:
        # tomllib puts "(at line L, column C)" in its message; keep it.
        raise XbenchInputError(str(path), f"TOML syntax error: {exc}") from None


def repo_root() -> Path:
    """The folder holding the shipped `synthetic/`, `tasks/` and `results/` folders."""
    return Path(__file__).resolve().parent.parent
