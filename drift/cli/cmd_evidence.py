"""Commands for evidence: ``drift examples`` (passages from the original documents), ``drift
evaluate`` (a ranking against gold values) and ``drift tables`` (every table as CSV)."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import app
from drift.errors import DriftError

OUTPUT_FORMATS = ("table", "csv", "json")


def _warn(message: str) -> None:
    typer.echo(f"drift: note: {message}", err=True)


@app.command("examples")
def examples_command(
    run: Path = typer.Argument(..., help="Run folder sliced with 'drift slice'."),
    word: str = typer.Argument(..., help="The word whose passages to show."),
    per_slice: int = typer.Option(3, "--per-slice", help="Passages per slice (one per document)."),
    seed: int = typer.Option(0, "--seed", help="Seed of the random draw (same seed, same passages)."),
    fmt: str = typer.Option("table", "--format", help="table, csv or json (on stdout)."),
    csv: Path = typer.Option(
        None, "--csv", help="Also write the passages to this CSV file.", show_default=False
    ),
) -> None:
    """Show passages that use WORD in each slice, from the original documents as written, with
    document id, date and metadata."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from drift.evidence import examples_for_words
    from drift.ranking import rows_as_json

    if fmt not in OUTPUT_FORMATS:
        raise DriftError(f"--format {fmt} is unknown; choose table, csv or json.")
    table = examples_for_words(run, [word], per_slice=per_slice, seed=seed)
    for note in table.attrs.get("notes", []):
        _warn(note)
    if table.empty:
        raise DriftError(
            f"'{word}' occurs in no slice of {run}; check the spelling (words are lower-cased "
            "unless the run kept case)."
        )
    if csv is not None:
        table.to_csv(csv, index=False)
        _warn(f"wrote {len(table):,} passages to {csv}")
    if fmt == "csv":
        typer.echo(table.to_csv(index=False), nl=False)
        return
    if fmt == "json":
        typer.echo(rows_as_json(table))
        return
    meta = [c for c in table.columns if c not in (
        "word", "slice", "document", "date", "left", "match", "right", "sentence",
        "source_row", "source_file", "line", "original")]
    view = Table(title=f"Passages with '{word}' in {run}")
    for column in ["slice", "document", "date", *meta]:
        view.add_column(column, no_wrap=True)
    view.add_column("passage", ratio=1)
    for row in table.itertuples(index=False):
        passage = Text(str(row.left))
        passage.append(str(row.match), style="bold reverse")
        passage.append(str(row.right))
        view.add_row(str(row.slice), str(row.document), str(row.date),
                     *(str(getattr(row, m)) for m in meta), passage)
    Console().print(view)
