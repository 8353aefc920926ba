"""Terminal output: one rich console, and progress bars that appear only on a terminal.

Estimation modules never print; they accept an optional ``progress`` callback.  The CLI and ``demo`` build
their screens from result objects with the helpers here.  When stdout is not a terminal (piped, CI), the
progress bar is silent.
"""

from __future__ import annotations

import sys
from contextlib import contextmanager
from typing import Iterator, Protocol

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

console = Console(highlight=False, soft_wrap=False)
err_console = Console(stderr=True, highlight=False)


class Tick(Protocol):
    """A progress callback: ``tick(label)`` says one unit of work finished."""

    def __call__(self, label: str = "") -> None: ...


def _noop(label: str = "") -> None:
    return None


def is_interactive() -> bool:
    """True when standard output is a terminal (progress bars are shown only then)."""
    return sys.stdout.isatty() and console.is_terminal


@contextmanager
def progress_bar(description: str, total: int, enabled: bool | None = None) -> Iterator[Tick]:
    """Yield a ``tick`` callback that advances a rich progress bar with ETA (a no-op when piped)."""
    show = is_interactive() if enabled is None else enabled
    if not show or total <= 0:
        yield _noop
        return
    columns = (
        TextColumn("[bold]{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TextColumn("{task.fields[label]}"),
        TimeElapsedColumn(),
        TimeRemainingColumn(),
    )
    with Progress(*columns, console=console, transient=True) as bar:
        task = bar.add_task(description, total=total, label="")

        def tick(label: str = "") -> None:
            bar.update(task, advance=1, label=label)

        yield tick
