"""Command ``drift slice``: cut a dated archive into time slices (parses, calls the library)."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import app
from drift.errors import DriftError

_EXTRA_ARGS = {"allow_extra_args": True}


def balance_value(balance: bool, extra: list[str], source: str) -> tuple[str | int | None, str]:
    """Resolve ``--balance [N]`` (typer has no option with an optional value): the number after
    --balance arrives as an extra argument, or in place of SOURCE when --balance came first."""
    if not extra:
        return ("smallest" if balance else None), source
    if balance and len(extra) == 1:
        number, rest = (extra[0], source) if _is_count(extra[0]) else (source, extra[0])
        if _is_count(number):
            return number, rest
    raise DriftError(
        f"Unexpected argument {' '.join(extra)}; drift slice takes one SOURCE, and a number only "
        "right after --balance."
    )


def _is_count(text: str) -> bool:
    return text.replace("_", "").replace(",", "").isdigit()


@app.command("slice", context_settings=_EXTRA_ARGS)
def slice_command(
    ctx: typer.Context,
    source: str = typer.Argument(
        ...,
        help="CSV, TSV, JSON Lines, Parquet, or a folder of .txt files; may be .gz, .bz2 or .xz.",
    ),
    out: Path = typer.Option(..., "--out", "-o", help="Run folder to write (made if missing)."),
    fmt: str = typer.Option(
        None, "--format", help="csv, tsv, jsonl, parquet or txt (default: from the extension)."
    ),
    time_col: str = typer.Option(
        None, "--time-col", help="Column with the dates (default: date, time, year or timestamp)."
    ),
    text_col: str = typer.Option(
        None, "--text-col", help="Column with the text (default: text, body or content)."
    ),
    date_format: str = typer.Option(
        None, "--date-format", help="strptime layout of the dates, e.g. '%d/%m/%Y'."
    ),
    encoding: str = typer.Option(
        None,
        "--encoding",
        help="Text encoding, e.g. cp1252 or latin-1 (default: UTF-8; cp1252 when a file is not "
        "UTF-8).",
    ),
    delimiter: str = typer.Option(
        None, "--delimiter", help="Field separator of a CSV file, e.g. ';', '|' or tab."
    ),
    skip_bad_dates: bool = typer.Option(
        False, "--skip-bad-dates", help="Drop documents whose date does not parse."
    ),
    by: str = typer.Option(
        "year", "--by", help="year, decade, Ny (e.g. 5y), edges:1990,2000,2010 or even:K."
    ),
    balance: bool = typer.Option(
        False,
        "--balance",
        help="Down-sample every slice to the smallest slice's tokens; '--balance N' to N tokens.",
    ),
    keep_case: bool = typer.Option(
        False, "--keep-case", help="Keep upper case (default: lower-case every token)."
    ),
    pretokenized: bool = typer.Option(False, "--pretokenized", help="Split on white space only."),
    seed: int = typer.Option(0, "--seed", help="Seed of the random down-sampling of --balance."),
    quiet: bool = typer.Option(
        False, "--quiet", "-q", help="No progress bar or notes (warnings still print)."
    ),
) -> None:
    """Cut a dated archive into time slices of tokenized text, with word counts per slice.

    Writes RUN/slices/<label>.txt, RUN/slices/summary.csv, RUN/counts.parquet and RUN/run.json.
    """
    from rich.console import Console

    from drift.slicing import slice_archive, summary_table

    balance_option, source = balance_value(balance, list(ctx.args), source)
    summary = slice_archive(
        Path(source),
        out,
        fmt=fmt,
        time_col=time_col,
        text_col=text_col,
        date_format=date_format,
        skip_bad_dates=skip_bad_dates,
        by=by,
        balance=balance_option,
        keep_case=keep_case,
        pretokenized=pretokenized,
        seed=seed,
        quiet=quiet,
        encoding=encoding,
        delimiter=delimiter,
    )
    title = f"Slices in {out}" + (" (reused)" if summary.attrs.get("reused") else "")
    table = summary_table(summary, title=title)
    console = Console()
    needed = console.measure(table, options=console.options.update_width(1000)).maximum
    if needed > console.width:  # never crop the table (e.g. long date-range labels in a pipe)
        console = Console(width=needed)
    console.print(table)
