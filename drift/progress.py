"""Progress bars on stderr (rich, as typer uses), silenced with ``quiet``."""

from __future__ import annotations

import contextlib
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
