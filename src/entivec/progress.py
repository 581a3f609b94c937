"""Progress a person can follow: one line per finished stage with its time and rows per second, bars for loops.

Every long step reports through this module, so commands look alike and one switch quiets them all:

- ``stage(name)`` is a context manager; count rows with ``.add(n)`` and, when the block ends, one line goes to
  standard error: ``  ingest         12.3 s   1,234,567 rows   100,234 rows/s  (note)``;
- ``bar(label, total)`` is a context manager giving a rich progress bar (per epoch, per fold, per chunk) when
  standard error is a terminal, and nothing otherwise; ``advance(n)`` moves it;
- ``begin(name)`` ... ``.end(rows)`` is the same as ``stage`` for a flow body that reads as a list of steps;
- ``note(text)`` prints one line as it is.

The level comes from ``ENTIVEC_PROGRESS``: ``normal`` (default: stage lines and bars), ``quiet`` (nothing) or
``verbose`` (stage lines also when a stage starts). The CLI sets it from its options; a library caller may set
the variable or call :func:`set_level`. Output goes to standard error, so standard output stays clean for
tables, CSV and JSON that scripts read.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

LEVEL_VARIABLE = "ENTIVEC_PROGRESS"
LEVELS = ("quiet", "normal", "verbose")
_NAME_WIDTH = 22


def level() -> str:
    value = os.environ.get(LEVEL_VARIABLE, "normal").strip().lower()
    return value if value in LEVELS else "normal"


def set_level(value: str) -> None:
    if value not in LEVELS:
        raise ValueError(f"progress level must be one of {LEVELS}, got {value!r}")
    os.environ[LEVEL_VARIABLE] = value


def _write(line: str) -> None:
    if level() == "quiet":
        return
    print(line, file=sys.stderr, flush=True)


def note(text: str) -> None:
    """One line as it is (unless quiet)."""
    _write(text)


def _number(value: float) -> str:
    return f"{value:,.0f}" if value >= 100 else f"{value:,.3g}"


@dataclass
class Stage:
    """A running stage: count its rows with :meth:`add`; :attr:`notes` are appended to its closing line."""

    name: str
    unit: str = "rows"
    rows: int = 0
    notes: list[str] = field(default_factory=list)
    started: float = field(default_factory=time.perf_counter)

    def add(self, rows: int) -> None:
        self.rows += int(rows)

    def end(self, rows: int | None = None, note: str | None = None) -> None:
        """Close a stage opened with :func:`begin`: count ``rows``, add ``note``, print its line."""
        if rows is not None:
            self.add(rows)
        if note:
            self.note(note)
        _write(self.line())

    def note(self, text: str) -> None:
        self.notes.append(text)

    @property
    def seconds(self) -> float:
        return time.perf_counter() - self.started

    def line(self) -> str:
        seconds = self.seconds
        parts = [f"  {self.name:<{_NAME_WIDTH}} {seconds:8.1f} s"]
        if self.rows:
            parts.append(f"{self.rows:>13,} {self.unit}")
            if seconds > 0:
                parts.append(f"{_number(self.rows / seconds):>11} {self.unit}/s")
        if self.notes:
            parts.append(f"({'; '.join(self.notes)})")
        return "  ".join(parts)


@contextmanager
def stage(name: str, *, unit: str = "rows") -> Iterator[Stage]:
    """Time a stage and print its closing line; a stage that raises prints nothing (the error speaks)."""
    current = Stage(name, unit)
    if level() == "verbose":
        _write(f"  {name} ...")
    yield current
    _write(current.line())


def begin(name: str, *, unit: str = "rows") -> Stage:
    """Open a stage that :meth:`Stage.end` closes: for a flow body that reads top-down, with no block to indent.

    A stage never ended (its step raised) prints nothing: the error speaks."""
    if level() == "verbose":
        _write(f"  {name} ...")
    return Stage(name, unit)


class _NoBar:
    def advance(self, steps: float = 1) -> None:
        pass

    def update(self, *, completed: float | None = None, status: str | None = None) -> None:
        pass


class _RichBar:
    def __init__(self, progress, task_id) -> None:
        self._progress, self._task = progress, task_id

    def advance(self, steps: float = 1) -> None:
        self._progress.advance(self._task, steps)

    def update(self, *, completed: float | None = None, status: str | None = None) -> None:
        fields = {} if status is None else {"status": status}
        self._progress.update(self._task, completed=completed, **fields)


@contextmanager
def bar(label: str, total: float | None, *, enabled: bool = True) -> Iterator[_NoBar | _RichBar]:
    """A progress bar on a terminal (standard error), nothing elsewhere or when quiet or ``enabled`` is False."""
    if not enabled or level() == "quiet" or not sys.stderr.isatty():
        yield _NoBar()
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    columns = [TextColumn("  [bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
               TextColumn("{task.fields[status]}"), TimeRemainingColumn()]
    with Progress(*columns, console=Console(stderr=True), transient=True) as progress:
        yield _RichBar(progress, progress.add_task(label, total=total, status=""))
