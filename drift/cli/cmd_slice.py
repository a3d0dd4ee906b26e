"""Command ``drift slice``: cut a dated archive into time slices (parses, calls the library)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import typer

from drift.cli.app import QUIET_HELP
from drift.cli.options_cli import command
from drift.errors import DriftError
from drift.options import SliceOptions

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


@command("slice", context_settings=_EXTRA_ARGS)
def slice_command(
    ctx: typer.Context,
    source: str = typer.Argument(
        ...,
        help="CSV, TSV, JSON Lines, Parquet, or a folder of .txt files; may be .gz, .bz2 or .xz.",
    ),
    out: Path = typer.Option(..., "--out", "-o", help="Run folder to write (made if missing)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    options: SliceOptions = SliceOptions(),
) -> None:
    """Cut a dated archive into time slices of tokenized text, with word counts per slice.

    Writes RUN/slices/<label>.txt, RUN/slices/summary.csv, RUN/counts.parquet and RUN/run.json.
    """
    from drift.cli.rank_views import print_table, summary_view
    from drift.ingest.slicing import slice_archive

    balance, source = balance_value(bool(options.balance), list(ctx.args), source)
    options = replace(options, balance=balance)
    summary = slice_archive(Path(source), out, quiet=quiet, **options.kwargs())
    title = f"Slices in {out}" + (" (reused)" if summary.attrs.get("reused") else "")
    added = summary.attrs.get("added")
    if added and (added["new"] or added["redone"]):
        parts = [f"new: {', '.join(added['new'])}"] if added["new"] else []
        parts += [f"redone: {', '.join(added['redone'])}"] if added["redone"] else []
        title += f" (appended {Path(source).name}; {'; '.join(parts)})"
    print_table(lambda width: summary_view(summary, title, width))
