"""Commands of the chart stage: ``drift chart RUN WORD`` and ``drift report RUN``."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import app, open_in_browser


@app.command("chart")
def chart_command(
    run: Path = typer.Argument(..., help="Run folder (ranked with 'drift rank')."),
    word: str = typer.Argument(..., help="The word to chart, as it appears in the scores."),
    k: int = typer.Option(10, "--k", help="Neighbours per slice in the neighbour chart."),
    examples: int = typer.Option(3, "--examples", help="Example sentences per slice."),
    seed: int = typer.Option(0, "--seed", help="Seed for drawing the example sentences."),
    open_page: bool = typer.Option(False, "--open", help="Open the page in the default browser."),
) -> None:
    """Write one HTML page for WORD (timeline, neighbours, frequency, examples); print its path."""
    from drift.report import chart_word

    path = chart_word(run, word, k=k, examples=examples, seed=seed)
    typer.echo(str(path))
    if open_page:
        open_in_browser(str(path))


@app.command("report")
def report_command(
    run: Path = typer.Argument(..., help="Run folder (ranked with 'drift rank')."),
    top: int = typer.Option(20, "--top", help="How many of the top-ranked words get a page."),
    k: int = typer.Option(10, "--k", help="Neighbours per slice in the word pages."),
    examples: int = typer.Option(3, "--examples", help="Example sentences per slice."),
    seed: int = typer.Option(0, "--seed", help="Seed for drawing the example sentences."),
    open_page: bool = typer.Option(False, "--open", help="Open the report in the default browser."),
) -> None:
    """Write the overview report RUN/charts/index.html and the top words' pages; print its path."""
    from drift.report import build_report

    path = build_report(run, top=top, k=k, examples=examples, seed=seed)
    typer.echo(str(path))
    if open_page:
        open_in_browser(str(path))
