"""Commands ``drift run`` (every stage in one go) and ``drift demo`` (the bundled archive)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import typer

from drift.cli.app import OPEN_HELP, QUIET_HELP, open_in_browser
from drift.cli.cmd_slice import SOURCES_HELP, balance_and_sources
from drift.cli.options_cli import command
from drift.options import RankOptions, ReportOptions, SliceOptions, TrainOptions, ViewOptions


def _show_result(result, view: ViewOptions, out: Path | None = None) -> None:
    """Print the top words (as ``drift rank`` prints them), then where the report is."""
    from drift.cli.rank_views import print_rows, scores_table, table_params
    from drift.compare.ranking import rank_record

    record = rank_record(result.run)
    from drift.cli.cmd_rank import shown_rows

    rows = shown_rows(result.run, result.scores, view)
    params = table_params(record)
    calibrated = record.get("control_flagged") is not None
    print_rows(
        rows, view.output_format, lambda width: scores_table(rows, params, calibrated, width), out
    )
    if view.output_format == "table":
        typer.echo(f"Report: {result.report}")


@command("run")
def run_command(
    source: list[str] = typer.Argument(..., help=SOURCES_HELP, show_default=False),
    out: Path = typer.Option(..., "--out", "-o", help="Run folder (finished stages are reused)."),
    open_report: bool = typer.Option(False, "--open", help=OPEN_HELP),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    slicing: SliceOptions = SliceOptions(),
    training: TrainOptions = TrainOptions(),
    ranking: RankOptions = RankOptions(),
    report: ReportOptions = ReportOptions(),
    view: ViewOptions = ViewOptions(),
) -> None:
    """Slice, train, rank and report in one go, with every option of every stage; a rerun
    reuses every finished stage. --between, --seed and --top each feed every stage that has them.
    """
    from drift.pipeline import run_all

    balance, sources = balance_and_sources(bool(slicing.balance), list(source))
    slicing = replace(slicing, balance=balance)
    result = run_all(
        sources,
        out,
        slice_options=slicing.kwargs(),
        train_options=training.kwargs(),
        rank_options=ranking.kwargs(),
        report_options=report.kwargs(),
        quiet=quiet,
    )
    _show_result(result, view)
    if open_report:
        open_in_browser(str(result.report))


@command("demo")
def demo_command(
    out: Path = typer.Option(Path("demo-run"), "--out", "-o", help="Run folder for the demo."),
    open_report: bool = typer.Option(False, "--open", help=OPEN_HELP),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    view: ViewOptions = ViewOptions(),
) -> None:
    """The whole job on the bundled invented archive (Pellmarrow, 1950-2009, one slice a decade)."""
    from drift.pipeline import run_demo

    result = run_demo(out, quiet=quiet)
    _show_result(result, view)
    if open_report:
        open_in_browser(str(result.report))
