"""Progress of a run for a person: plain lines, or one live line per segment on a terminal.

A sink is called with a line of text (the plain form, as in logs and pipes). A live
sink also gets `segment(label, documents, unit)`, `advance(label, documents, units)`
and `finish(label)`: it then draws, for the segment running now, documents done of
all, units (the segment's first step's pages or chunks) per second and the time left, with rich (installed with
Prefect), and prints the other lines above it.
"""

from __future__ import annotations

import sys
import time
from typing import Callable


def plain(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


class LiveProgress:
    """One rich progress bar per segment, on standard error."""

    def __init__(self, console=None) -> None:  # noqa: ANN001 - a rich Console; stderr by default
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

        self._progress = Progress(
            TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TextColumn("documents"),
            TextColumn("{task.fields[rate]}"), TimeRemainingColumn(),
            console=console or Console(stderr=True), transient=False)
        self._tasks: dict[str, tuple[int, float, int]] = {}  # label -> (task id, start, units)
        self._unit: dict[str, str] = {}
        self._progress.start()

    def __call__(self, line: str) -> None:
        self._progress.console.print(line, highlight=False, markup=False)

    def segment(self, label: str, documents: int, unit: str = "pages") -> None:
        task = self._progress.add_task(label, total=documents, rate="")
        self._unit[label] = unit
        self._tasks[label] = (task, time.perf_counter(), 0)

    def advance(self, label: str, documents: int, units: int) -> None:
        task, start, done_units = self._tasks[label]
        done_units += units
        self._tasks[label] = (task, start, done_units)
        rate = done_units / max(time.perf_counter() - start, 1e-6)
        self._progress.update(task, advance=documents, rate=f"{rate:,.0f} {self._unit[label]}/s")

    def finish(self, label: str) -> None:
        if label in self._tasks:
            task = self._tasks[label][0]
            self._progress.update(task, completed=self._progress.tasks[task].total)

    def close(self) -> None:
        self._progress.stop()


def for_run(quiet: bool, live: bool) -> Callable[[str], None] | None:
    """No progress (quiet), a live line on a terminal, else plain lines."""
    if quiet:
        return None
    if live and sys.stderr.isatty():
        try:
            return LiveProgress()
        except Exception:  # noqa: BLE001 - a terminal rich cannot drive: plain lines still work
            return plain
    return plain
