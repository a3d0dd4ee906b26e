"""Commands of the rank stage: ``drift rank``, ``drift neighbours`` and ``drift export``."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import typer

from drift.cli.app import app
from drift.errors import DriftError
from drift.ranking import DEFAULT_K, DEFAULT_MEASURE

OUTPUT_FORMATS = ("table", "csv", "json")


def _check_format(fmt: str) -> None:
    if fmt not in OUTPUT_FORMATS:
        raise DriftError(f"--format {fmt} is unknown; choose table, csv or json.")


def _print_rows(rows, fmt: str, table_factory: Callable[[int], Any]) -> None:
    """Print a DataFrame as csv, json (array of row objects) or a rich table on stdout."""
    from rich.console import Console

    from drift.ranking import rows_as_json

    if fmt == "csv":
        typer.echo(rows.to_csv(index=False), nl=False)
    elif fmt == "json":
        typer.echo(rows_as_json(rows))
    else:
        console = Console()
        if not console.is_terminal:  # piped into a file or a pager: room for every column
            console = Console(width=160)
        console.print(table_factory(console.width))


@app.command("rank")
def rank_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    between: tuple[str, str] | None = typer.Option(
        None, "--between", help="The two slices to compare (default: first and last).",
        show_default=False,
    ),
    reference: str = typer.Option(
        None, "--reference", help="Slice the timeline is measured against (default: the first).",
        show_default=False,
    ),
    measure: str = typer.Option(
        DEFAULT_MEASURE, "--measure",
        help="Ranking column: displacement, turnover, local or combined.",
    ),
    k: int = typer.Option(
        DEFAULT_K, "--k", help="Neighbours per word for turnover and local change."
    ),
    alpha: float = typer.Option(0.05, "--alpha", help="False discovery rate for 'significant'."),
    anchors: str = typer.Option(
        None, "--anchors",
        help="Align on the N most frequent shared words, or on the words of a file (default: all).",
        show_default=False,
    ),
    top: int = typer.Option(30, "--top", help="How many of the top words to show."),
    all_rows: bool = typer.Option(False, "--all", help="Show every word."),
    min_count: int = typer.Option(
        0, "--min-count", help="Show only words seen at least this often in both slices."
    ),
    fmt: str = typer.Option("table", "--format", help="table, csv or json."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars or notes."),
) -> None:
    """Rank the words of RUN by how much their meaning moved; write scores, timeline and terms."""
    from drift.cli.rank_views import scores_table
    from drift.ranking import rank_record, rank_run, top_rows

    _check_format(fmt)
    scores = rank_run(
        run, between=list(between) if between else None, reference=reference, measure=measure,
        k=k, alpha=alpha, anchors=anchors, quiet=quiet,
    )
    rows = top_rows(scores, top=top, all_rows=all_rows, min_count=min_count)
    record = rank_record(run)
    calibrated = record.get("control_flagged") is not None
    params = record.get("params", {})
    _print_rows(rows, fmt, lambda width: scores_table(rows, params, calibrated, width))


@app.command("neighbours")
def neighbours_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    word: str = typer.Argument(..., help="The word whose neighbours to list."),
    k: int = typer.Option(10, "--k", help="Neighbours per slice."),
    fmt: str = typer.Option("table", "--format", help="table, csv or json."),
) -> None:
    """List the nearest neighbours of WORD in every slice (similarity averaged over seeds)."""
    from drift.cli.rank_views import neighbours_table
    from drift.ranking import neighbours_by_slice, slice_labels

    _check_format(fmt)
    frame = neighbours_by_slice(run, word, k=k)
    _print_rows(frame, fmt, lambda width: neighbours_table(word, frame, slice_labels(run)))


@app.command("export")
def export_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    fmt: str = typer.Option(..., "--format", help="word2vec (text format) or npz."),
    out: Path = typer.Option(..., "--out", help="Folder for one file per slice."),
    reference: str = typer.Option(
        None, "--reference",
        help="Slice the others are aligned onto (default: as in 'drift rank').",
        show_default=False,
    ),
) -> None:
    """Write every slice's aligned vectors (first seed) into OUT, one file per slice."""
    from drift.ranking import export_vectors

    for path in export_vectors(run, out, fmt, reference=reference):
        typer.echo(str(path))
