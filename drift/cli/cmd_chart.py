"""Commands of the chart stage: ``drift chart RUN WORD`` and ``drift report RUN``."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import OPEN_HELP, open_in_browser
from drift.cli.options_cli import command
from drift.options import ChartOptions, ReportOptions


@command("chart")
def chart_command(
    run: Path = typer.Argument(..., help="Run folder (ranked with 'drift rank')."),
    word: str = typer.Argument(..., help="The word to chart, as it appears in the scores."),
    open_page: bool = typer.Option(False, "--open", help=OPEN_HELP),
    options: ChartOptions = ChartOptions(),
) -> None:
    """Write one HTML page for WORD (timeline, neighbours, frequency, examples); print its path."""
    from drift.publish.report import chart_word

    path = chart_word(run, word, **options.kwargs())
    typer.echo(str(path))
    if open_page:
        open_in_browser(str(path))


@command("report")
def report_command(
    run: Path = typer.Argument(..., help="Run folder (ranked with 'drift rank')."),
    open_page: bool = typer.Option(False, "--open", help=OPEN_HELP),
    options: ReportOptions = ReportOptions(),
) -> None:
    """Write the overview report RUN/charts/index.html and the top words' pages; print its path."""
    from drift.publish.report import build_report

    path = build_report(run, **options.kwargs())
    typer.echo(str(path))
    if open_page:
        open_in_browser(str(path))
