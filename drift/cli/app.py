"""The typer application object shared by every command module, and small CLI helpers."""

from __future__ import annotations

import typer

app = typer.Typer(
    name="drift",
    help="Find which words changed meaning across a dated text archive, when, and how.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def open_in_browser(path: str) -> None:
    """Open a local HTML file in the default browser (used by --open)."""
    import webbrowser
    from pathlib import Path

    webbrowser.open(Path(path).resolve().as_uri())
