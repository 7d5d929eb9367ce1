"""Drawing a report's figures on two cores: a forked copy of this process takes figures from the same list.

Rendering figures is most of a report's time and runs on one core. Where ``fork`` is the platform's safe way
to start a process (Linux), one forked child draws figures beside this process: both take the next undrawn
figure from a shared counter, so a long gallery does not hold the other side up. Fork, not spawn: the child
starts with the runs, tables and styles already in memory, so nothing is pickled but each drawn figure's
file names, notes and warnings on the way back. The files are the same bytes whoever draws them (tests); the
returned list, the notes and the warnings (raised again here, to reach the caller's filters) keep the units'
order; a child that dies leaves its figures to this process.
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import warnings
from collections.abc import Callable, Sequence
from typing import Any

# a unit draws and saves its figures, appends its notes to the list it is given, and returns what it wrote
Unit = Callable[[list[str]], list[Any]]


def can_fork() -> bool:
    """Fork only on Linux (macOS's system frameworks are not fork-safe, Windows has no fork), and not from a
    daemonic process (a pool's worker may not have children)."""
    return (
        sys.platform.startswith("linux")
        and "fork" in multiprocessing.get_all_start_methods()
        and not multiprocessing.current_process().daemon
    )


def draw_units(units: Sequence[Unit], jobs: int = 2) -> list[tuple[list[Any], list[str]]]:
    """Run every unit once; per unit (what it returned, its notes), in the units' order.

    ``jobs`` >= 2 on a forking platform with >= 2 units: this process and one forked child share the list;
    otherwise one after the other here."""
    results: dict[int, Drawn] = {}
    if jobs >= 2 and len(units) >= 2 and can_fork():
        results = _shared(units)
    for i, unit in enumerate(units):  # serial, or what a dead child left undrawn
        if i not in results:
            results[i] = _run(unit)
    out = []
    for i in range(len(units)):
        files, notes, caught = results[i]
        for category, message in caught:  # warnings reach the caller's filters, whoever drew the unit
            warnings.warn(message, category, stacklevel=2)
        out.append((files, notes))
    return out


Drawn = tuple[list[Any], list[str], list[tuple[type[Warning], str]]]


def _run(unit: Unit) -> Drawn:
    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        files = unit(notes)
    return files, notes, [(w.category, str(w.message)) for w in caught]


def _shared(units: Sequence[Unit]) -> dict[int, Drawn]:
    ctx = multiprocessing.get_context("fork")
    counter = ctx.Value("i", 0)
    receive, send = ctx.Pipe(duplex=False)

    def take() -> int | None:
        with counter.get_lock():
            i = counter.value
            if i >= len(units):
                return None
            counter.value = i + 1
            return i

    def child() -> None:
        receive.close()
        drawn = {}
        while (i := take()) is not None:
            drawn[i] = _run(units[i])
        send.send(drawn)
        send.close()

    process = ctx.Process(target=child, daemon=True)
    try:
        process.start()
    except OSError:  # no process to be had (limits): everything is drawn here
        receive.close()
        send.close()
        return {}
    send.close()
    results: dict[int, Drawn] = {}
    while (i := take()) is not None:
        results[i] = _run(units[i])
    try:
        results.update(receive.recv())
    except (EOFError, OSError):  # the child died: its figures are drawn again by the caller
        pass
    finally:
        receive.close()
        process.join()
    return results


def default_jobs() -> int:
    """Two where there are two cores to use."""
    return 2 if (os.cpu_count() or 1) >= 2 else 1
