"""Commands ``drift run`` (every stage in one go) and ``drift demo`` (the bundled archive)."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import app, open_in_browser
from drift.ranking import DEFAULT_K, DEFAULT_MEASURE


def _show_result(result, top: int) -> None:
    """Print the top words as a table, then where the report is."""
    from rich.console import Console

    from drift.cli.rank_views import scores_table
    from drift.ranking import rank_record, top_rows

    record = rank_record(result.run)
    rows = top_rows(result.scores, top=top, all_rows=False, min_count=0)
    console = Console()
    console.print(
        scores_table(rows, record.get("params", {}), record.get("control_flagged") is not None,
                     console.width)
    )
    typer.echo(f"Report: {result.report}")


@app.command("run", context_settings={"allow_extra_args": True})
def run_command(
    ctx: typer.Context,
    source: str = typer.Argument(..., help="Dated archive: CSV, TSV, JSON Lines, Parquet, or a "
                                 "folder of .txt files; may be .gz, .bz2 or .xz."),
    out: Path = typer.Option(..., "--out", "-o", help="Run folder (finished stages are reused)."),
    fmt: str = typer.Option(None, "--format", help="Input format (default: from the extension)."),
    time_col: str = typer.Option(None, "--time-col", help="Column with the dates."),
    text_col: str = typer.Option(None, "--text-col", help="Column with the text."),
    date_format: str = typer.Option(None, "--date-format", help="strptime layout of the dates."),
    encoding: str = typer.Option(None, "--encoding", help="Text encoding, e.g. cp1252 "
                                 "(default: UTF-8; cp1252 when a file is not UTF-8)."),
    delimiter: str = typer.Option(None, "--delimiter",
                                  help="Field separator of a CSV file, e.g. ';', '|' or tab."),
    skip_bad_dates: bool = typer.Option(False, "--skip-bad-dates",
                                        help="Drop documents whose date does not parse."),
    by: str = typer.Option("year", "--by",
                           help="year, decade, Ny (e.g. 5y), edges:1990,2000,2010 or even:K."),
    balance: bool = typer.Option(False, "--balance", help="Down-sample every slice to the "
                                 "smallest slice's tokens; '--balance N' to N tokens."),
    keep_case: bool = typer.Option(False, "--keep-case", help="Keep upper case."),
    pretokenized: bool = typer.Option(False, "--pretokenized", help="Split on white space only."),
    architecture: str = typer.Option("skipgram", "--architecture", help="skipgram or cbow."),
    dim: int = typer.Option(100, "--dim", help="Vector dimension."),
    window: int = typer.Option(5, "--window", help="Context words on each side."),
    epochs: int = typer.Option(5, "--epochs", help="Passes over each slice."),
    min_count: int = typer.Option(20, "--min-count", help="Minimum count of a word per slice."),
    seeds: int = typer.Option(2, "--seeds", help="Models per slice, each with its own seed."),
    workers: int = typer.Option(None, "--workers", help="Cores to use (default: all).",
                                show_default=False),
    engine: str = typer.Option("local", "--engine", help="local or dask."),
    scheduler: str = typer.Option(None, "--scheduler", help="Dask scheduler address.",
                                  show_default=False),
    no_control: bool = typer.Option(False, "--no-control",
                                    help="Skip the control pair (no p and q values)."),
    between: tuple[str, str] | None = typer.Option(
        None, "--between", help="The two slices to compare (default: first and last).",
        show_default=False),
    measure: str = typer.Option(DEFAULT_MEASURE, "--measure",
                                help="displacement, turnover, local or combined."),
    k: int = typer.Option(DEFAULT_K, "--k", help="Neighbours per word for turnover."),
    alpha: float = typer.Option(0.05, "--alpha", help="False discovery rate for 'significant'."),
    top: int = typer.Option(20, "--top", help="Words shown, and charted in the report."),
    open_report: bool = typer.Option(False, "--open", help="Open the report in the browser."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars or notes."),
) -> None:
    """Slice, train, rank and report in one go; a rerun reuses every finished stage."""
    from drift.cli.cmd_slice import balance_value
    from drift.pipeline import run_all

    balance_option, source = balance_value(balance, list(ctx.args), source)
    pair = list(between) if between else None
    result = run_all(
        source,
        out,
        slice_options={
            "fmt": fmt, "time_col": time_col, "text_col": text_col, "date_format": date_format,
            "skip_bad_dates": skip_bad_dates, "by": by, "keep_case": keep_case,
            "pretokenized": pretokenized,
            "balance": balance_option, "encoding": encoding, "delimiter": delimiter,
        },
        train_options={
            "architecture": architecture, "dim": dim, "window": window, "epochs": epochs,
            "min_count": min_count, "seeds": seeds, "workers": workers, "engine": engine,
            "scheduler": scheduler, "control": not no_control, "between": pair,
        },
        rank_options={"between": pair, "measure": measure, "k": k, "alpha": alpha},
        report_top=top,
        quiet=quiet,
    )
    _show_result(result, top)
    if open_report:
        open_in_browser(str(result.report))


@app.command("demo")
def demo_command(
    out: Path = typer.Option(Path("demo-run"), "--out", "-o", help="Run folder for the demo."),
    top: int = typer.Option(15, "--top", help="Words shown."),
    open_report: bool = typer.Option(False, "--open", help="Open the report in the browser."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars or notes."),
) -> None:
    """The whole job on the bundled invented archive (Pellmarrow, 1950-2009, one slice a decade)."""
    from drift.pipeline import run_demo

    result = run_demo(out, quiet=quiet)
    _show_result(result, top)
    if open_report:
        open_in_browser(str(result.report))
