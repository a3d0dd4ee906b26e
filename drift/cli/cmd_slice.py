"""Command ``drift slice``: cut a dated archive into time slices (parses, calls the library)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import typer

from drift.cli.app import QUIET_HELP
from drift.cli.options_cli import command
from drift.errors import DriftError
from drift.options import SliceOptions


def balance_and_sources(balance: bool, items: list[str]) -> tuple[str | int | None, list[str]]:
    """Resolve ``--balance [N]`` (typer has no option with an optional value): with --balance,
    a whole number among the SOURCE arguments that names no file is the token budget."""
    numbers = [item for item in items if _is_count(item) and not Path(item).exists()]
    if not balance or not numbers:
        if numbers:
            raise DriftError(
                f"There is no file or folder at {numbers[0]}; a number is taken only right "
                "after --balance."
            )
        return ("smallest" if balance else None), list(items)
    if len(numbers) > 1:
        raise DriftError(
            f"Unexpected numbers {' '.join(numbers)}; --balance takes one token budget."
        )
    sources = [item for item in items if item != numbers[0]]
    if not sources:
        raise DriftError("No SOURCE given; name the archive to slice before or after --balance N.")
    return numbers[0], sources


def _is_count(text: str) -> bool:
    return text.replace("_", "").replace(",", "").isdigit()


SOURCES_HELP = (
    "CSV, TSV, JSON Lines, Parquet, or a folder of .txt files; may be .gz, .bz2 or .xz. Several "
    "paths, glob patterns ('news/*.csv.gz') and folders of table parts are read as one archive."
)


@command("slice")
def slice_command(
    source: list[str] = typer.Argument(..., help=SOURCES_HELP, show_default=False),
    out: Path = typer.Option(..., "--out", "-o", help="Run folder to write (made if missing)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    options: SliceOptions = SliceOptions(),
) -> None:
    """Cut a dated archive into time slices of tokenized text, with word counts per slice.

    Writes RUN/slices/<label>.txt, RUN/slices/summary.csv, RUN/counts.parquet and RUN/run.json.
    """
    from drift.cli.rank_views import print_table, summary_view
    from drift.ingest.slicing import slice_archive

    balance, sources = balance_and_sources(bool(options.balance), list(source))
    options = replace(options, balance=balance)
    summary = slice_archive(sources, out, quiet=quiet, **options.kwargs())
    title = f"Slices in {out}" + (" (reused)" if summary.attrs.get("reused") else "")
    added = summary.attrs.get("added")
    if added and (added["new"] or added["redone"]):
        parts = [f"new: {', '.join(added['new'])}"] if added["new"] else []
        parts += [f"redone: {', '.join(added['redone'])}"] if added["redone"] else []
        title += f" (appended {summary.attrs['appended']}; {'; '.join(parts)})"
    print_table(lambda width: summary_view(summary, title, width))
