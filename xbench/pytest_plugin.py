"""pytest plugin (entry point ``pytest11``): assert the faithfulness of *your* model and explainer.

Installed with xbench and loaded by pytest automatically. It provides

- the fixture ``xbench_task_run``: a function ``run(task, *, explainers=None, models=None, seeds=None,
  jobs=1)`` that runs an xbench task (a task file path or a shipped task's name) into a fresh temporary
  folder with :func:`xbench.runs.run_task` and returns that run folder. ``explainers`` (keys) replaces
  the task's explainers, e.g. with your own key registered through
  :func:`xbench.explainers.register_explainer` (with ``jobs=1`` cells run in this process, so a key
  registered by the test module is found; worker processes find only entry-point plugins);
  ``models`` and ``seeds`` narrow the task's models and seeds. A failed cell fails the test.
- :func:`assert_faithful` (also as the fixture ``xbench_assert_faithful``): apply gates to a run folder,
  against a baseline run folder when given (absolute gates need none), and fail with the gate table.

ini options: ``xbench_task`` (default task for ``xbench_task_run``), ``xbench_gates`` (default gate file
for ``xbench_assert_faithful``).

This module imports only the standard library and pytest at import time; xbench's heavy stages (torch,
the runner) are imported when a fixture is used.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import pytest

__all__ = ["assert_faithful", "xbench_task_run", "xbench_assert_faithful"]


def assert_faithful(run_dir: str | Path, gates: Any = None, baseline: str | Path | None = None, **options: Any) -> Any:
    """Apply gates to ``run_dir`` and raise AssertionError with the gate table when one fails.

    ``gates``: a gate file path, gate data shaped like the TOML (``{"default": {...}, "gate": [...]}``),
    or None for the built-in gates. ``baseline``: a baseline run folder, or None for absolute gates only.
    Returns the :class:`xbench.check.CheckResult` when every gate passes.
    """
    __tracebackhide__ = True
    from xbench.check import assert_faithful as _assert_faithful

    return _assert_faithful(run_dir, gates=gates, baseline=baseline, **options)


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addini("xbench_task", "default xbench task file for the xbench_task_run fixture", default="")
    parser.addini("xbench_gates", "default gate file for the xbench_assert_faithful fixture", default="")


def _ini_path(config: pytest.Config, name: str) -> str | None:
    value = config.getini(name)
    if not value:
        return None
    path = Path(value)
    if not path.is_absolute():
        path = Path(config.rootpath) / path
    return str(path)


def _keys(value: str | int | Iterable[Any] | None, cast: Callable = str) -> list | None:
    if value is None:
        return None
    items = [value] if isinstance(value, str | int) else list(value)
    return [cast(v) for v in items]


@pytest.fixture(scope="session")
def xbench_task_run(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Callable:
    """Run a small xbench task into a temporary folder and return the run folder (a ``Path``).

    Call it: ``run_dir = xbench_task_run("tasks/ci.toml", explainers=["my-explainer", "random"])``.
    Session-scoped, so module-scoped fixtures can use it; a call with the same arguments as an earlier
    one in the session returns the earlier run folder instead of running again.
    """
    done: dict[tuple, Path] = {}

    def run(
        task: str | Path | None = None,
        *,
        explainers: str | Iterable[str] | None = None,
        models: str | Iterable[str] | None = None,
        seeds: int | Iterable[int] | None = None,
        jobs: int = 1,
    ) -> Path:
        __tracebackhide__ = True
        from xbench.runs import run_task

        if task is None:
            task = _ini_path(request.config, "xbench_task")
            if task is None:
                raise pytest.UsageError("xbench_task_run: give a task, or set the ini option xbench_task")
        wanted = (_keys(explainers), _keys(models), _keys(seeds, int))
        key = (
            str(Path(task).resolve()) if Path(task).is_file() else str(task),
            *(None if w is None else tuple(w) for w in wanted),
            jobs,
        )
        if key in done:
            return done[key]
        out = tmp_path_factory.mktemp("xbench-run")
        summary = run_task(task, out, jobs=jobs, explainers=wanted[0], models=wanted[1], seeds=wanted[2])
        if summary.cells_failed:
            details = "; ".join(f"{f['cell']}: {f['error']}" for f in summary.failures[:3])
            pytest.fail(f"xbench_task_run: {summary.cells_failed} cell(s) failed ({details})", pytrace=False)
        done[key] = Path(summary.out_dir)
        return done[key]

    return run


@pytest.fixture(scope="session")
def xbench_assert_faithful(request: pytest.FixtureRequest) -> Callable:
    """:func:`assert_faithful` with the ini option ``xbench_gates`` as the default gate file."""
    default_gates = _ini_path(request.config, "xbench_gates")

    def check(run_dir: str | Path, gates: Any = None, baseline: str | Path | None = None, **options: Any) -> Any:
        __tracebackhide__ = True
        chosen = gates if gates is not None else default_gates
        return assert_faithful(run_dir, gates=chosen, baseline=baseline, **options)

    return check
