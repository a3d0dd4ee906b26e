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


#: Help texts of the options every command spells the same way.
QUIET_HELP = "No progress bars or notes (warnings still print)."
OPEN_HELP = "Open the page in the default browser."


def _show_version(value: bool) -> None:
    if value:
        from drift import __version__

        typer.echo(f"drift {__version__}")
        raise typer.Exit()


@app.callback()
def _main(
    version: bool = typer.Option(
        False, "--version", help="Print drift's version and exit.", callback=_show_version,
        is_eager=True,
    ),
) -> None:
    """Find which words changed meaning across a dated text archive, when, and how."""
    from drift.progress import show_notes

    show_notes()


def open_in_browser(path: str) -> None:
    """Open a local HTML file in the default browser (used by --open)."""
    import webbrowser
    from pathlib import Path

    webbrowser.open(Path(path).resolve().as_uri())
