"""Terminal output: one rich console, and progress bars that appear only on a terminal.

Estimation modules never print; they accept an optional ``progress`` callback.  The CLI and ``demo`` build
their screens from result objects with the helpers here.  When stdout is not a terminal (piped, CI), the
progress bar is silent.  While the command line runs, :func:`quiet_stderr` collects warnings so that
they are printed once, after the error line; other libraries' warnings and logs appear only with
``--verbose``.
"""

from __future__ import annotations

import logging
import sys
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
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


# ----------------------------------------------------------------------------------------------------------
# a quiet stderr: warnings collected and printed once at the end; library noise only with --verbose
# ----------------------------------------------------------------------------------------------------------
_STATE = {"verbose": True}  # Python callers see every library message; the CLI turns this off


def library_noise_shown() -> bool:
    """False while the command line runs without ``--verbose``: library logs and warnings are held back."""
    return _STATE["verbose"]


@dataclass
class Collected:
    """The warnings a command raised: siteproof's own (always shown) and other libraries' (``--verbose``)."""

    verbose: bool
    own: list[str] = field(default_factory=list)
    library: list[str] = field(default_factory=list)

    def lines(self) -> list[str]:
        """Each distinct warning once, in the order raised: ``warning: …`` (and ``note: …`` with --verbose)."""
        own = [f"warning: {' '.join(text.split())}" for text in dict.fromkeys(self.own)]
        library = [f"note: {' '.join(text.split())}" for text in dict.fromkeys(self.library)] if self.verbose else []
        return own + library


class _LogCollector(logging.Handler):
    """A logging handler that keeps the formatted records (shown only with --verbose)."""

    def __init__(self, sink: list[str]) -> None:
        super().__init__(logging.WARNING)
        self.sink = sink

    def emit(self, record: logging.LogRecord) -> None:
        self.sink.append(f"{record.name}: {record.getMessage()}")


@contextmanager
def quiet_stderr(verbose: bool) -> Iterator[Collected]:
    """Collect warnings (siteproof's and other libraries') and root-logger records for printing at the end."""
    from .errors import SiteproofWarning

    collected = Collected(verbose)
    handler = _LogCollector(collected.library)
    root = logging.getLogger()
    previous = _STATE["verbose"]

    def show(message, category, filename, lineno, file=None, line=None) -> None:  # noqa: ANN001
        sink = collected.own if issubclass(category, SiteproofWarning) else collected.library
        sink.append(str(message) if sink is collected.own else f"{category.__name__}: {message}")

    with warnings.catch_warnings():
        warnings.simplefilter("always", SiteproofWarning)
        warnings.showwarning = show  # restored when the block ends
        root.addHandler(handler)
        _STATE["verbose"] = verbose
        try:
            yield collected
        finally:
            _STATE["verbose"] = previous
            root.removeHandler(handler)
