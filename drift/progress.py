"""Progress bars on stderr (rich, as typer uses), silenced with ``quiet``; notes and warnings.

The library never prints a note or a warning itself: it logs them on the ``drift`` logger of
Python's :mod:`logging` (notes at INFO, warnings at WARNING), and the command line shows them on
stderr (:func:`show_notes`). A Python user sees warnings by Python's default (its last-resort
handler) and notes after ``logging.basicConfig(level=logging.INFO)``.
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Iterator

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

stderr_console = Console(stderr=True)


@contextlib.contextmanager
def progress_bars(quiet: bool = False) -> Iterator[Progress]:
    """A rich Progress on stderr; with ``quiet`` it is disabled and prints nothing."""
    progress = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        TimeRemainingColumn(),
        console=stderr_console,
        disable=quiet,
        transient=False,
    )
    with progress:
        yield progress


#: The logger every stage's notes and warnings go to.
log = logging.getLogger("drift")


def note(message: str, quiet: bool = False) -> None:
    """A note for the user (logged at INFO on :data:`log`), unless ``quiet``."""
    if not quiet:
        log.info(message)


def warn(message: str) -> None:
    """A warning for the user (logged at WARNING on :data:`log`); ``quiet`` does not hide it."""
    log.warning(message)


class _StderrNotes(logging.Handler):
    """Shows the drift logger's records on stderr: ``drift: note`` / ``drift: warning: ...``."""

    def emit(self, record: logging.LogRecord) -> None:
        prefix = "drift: warning: " if record.levelno >= logging.WARNING else "drift: "
        stderr_console.print(prefix + record.getMessage(), markup=False, highlight=False,
                             soft_wrap=True)


def show_notes() -> None:
    """Show notes and warnings of the library on stderr (once; the command line calls this)."""
    if not any(isinstance(h, _StderrNotes) for h in log.handlers):
        log.addHandler(_StderrNotes())
    log.setLevel(logging.INFO)
