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
    return Drawing(units, jobs, min_units=2).finish()


Drawn = tuple[list[Any], list[str], list[tuple[type[Warning], str]]]


class Drawing:
    """Units drawn by a forked child from the moment this is made, while this process does other work (the
    report's statistics); :meth:`finish` joins in on the units left, gathers the child's and returns what
    :func:`draw_units` returns. Without a child (``jobs`` < 2, no fork, fewer than ``min_units`` units)
    :meth:`finish` draws everything here. Make one, then call :meth:`finish` (or :meth:`close` on an error
    path, which stops the child)."""

    def __init__(self, units: Sequence[Unit], jobs: int = 2, min_units: int = 1):
        self.units = list(units)
        self.process: Any = None
        if jobs >= 2 and len(self.units) >= max(min_units, 1) and can_fork():
            self._start()

    def _start(self) -> None:
        ctx = multiprocessing.get_context("fork")
        self.counter = ctx.Value("i", 0)
        self.receive, send = ctx.Pipe(duplex=False)
        units, receive = self.units, self.receive

        def child() -> None:
            receive.close()
            drawn = {}
            while (i := self._take()) is not None:
                drawn[i] = _run(units[i])
            send.send(drawn)
            send.close()

        process = ctx.Process(target=child, daemon=True)
        try:
            process.start()
        except OSError:  # no process to be had (limits): everything is drawn here
            self.receive.close()
            send.close()
            return
        send.close()
        self.process = process

    def _take(self) -> int | None:
        with self.counter.get_lock():
            i = self.counter.value
            if i >= len(self.units):
                return None
            self.counter.value = i + 1
            return i

    def finish(self) -> list[tuple[list[Any], list[str]]]:
        results: dict[int, Drawn] = {}
        if self.process is not None:
            while (i := self._take()) is not None:
                results[i] = _run(self.units[i])
            try:
                results.update(self.receive.recv())
            except (EOFError, OSError):  # the child died: its figures are drawn again below
                pass
            finally:
                self.receive.close()
                self.process.join()
                self.process = None
        for i, unit in enumerate(self.units):  # serial, or what a dead child left undrawn
            if i not in results:
                results[i] = _run(unit)
        out = []
        for i in range(len(self.units)):
            files, notes, caught = results[i]
            for category, message in caught:  # warnings reach the caller's filters, whoever drew the unit
                warnings.warn(message, category, stacklevel=2)
            out.append((files, notes))
        return out

    def close(self) -> None:
        """Stop a child still drawing (the caller gave up: an error before :meth:`finish`)."""
        if self.process is not None:
            self.process.kill()
            self.process.join()
            self.receive.close()
            self.process = None


def _run(unit: Unit) -> Drawn:
    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        files = unit(notes)
    return files, notes, [(w.category, str(w.message)) for w in caught]


def default_jobs() -> int:
    """Two where there are two cores to use."""
    return 2 if (os.cpu_count() or 1) >= 2 else 1
