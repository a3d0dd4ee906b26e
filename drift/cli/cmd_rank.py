"""Commands of the rank stage: ``drift rank``, ``drift neighbours`` and ``drift export``."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import QUIET_HELP
from drift.cli.options_cli import command, field_option
from drift.errors import DriftError
from drift.options import (
    VECTOR_FORMATS,
    ChartOptions,
    RankOptions,
    ViewOptions,
    check_choice,
)

_OUT_HELP = "Write the output to this file instead of the screen (as a pipe gets it)."


@command("rank")
def rank_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    out: Path = typer.Option(None, "--out", "-o", help=_OUT_HELP, show_default=False),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    options: RankOptions = RankOptions(),
    view: ViewOptions = ViewOptions(),
) -> None:
    """Rank the words of RUN by how much their meaning moved; write scores, timeline and terms."""
    from drift.cli.rank_views import print_rows, scores_table, table_params
    from drift.compare.ranking import rank_record, rank_run

    scores = rank_run(run, quiet=quiet, **options.kwargs())
    rows = shown_rows(run, scores, view)
    record = rank_record(run)
    calibrated = record.get("control_flagged") is not None
    params = table_params(record)
    print_rows(
        rows, view.output_format, lambda width: scores_table(rows, params, calibrated, width), out
    )


def shown_rows(run: Path, scores, view: ViewOptions):
    """The rows to print: the target words of --words (each one not measured gets a line on
    stderr saying why), else the top rows."""
    from drift.compare.ranking import top_rows

    if view.words is None:
        return top_rows(scores, top=view.top, all_rows=view.all_rows, min_count=view.min_count)
    from drift.compare.targets import read_word_list, target_scores

    rows, unmeasured = target_scores(run, read_word_list(view.words), scores)
    for row in unmeasured.itertuples():
        typer.echo(f"drift: not measured: {row.word}: {row.reason}", err=True)
    return rows


@command("neighbours")
def neighbours_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    word: str = typer.Argument(..., help="The word whose neighbours to list."),
    k: int = field_option(ChartOptions, "k"),
    output_format: str = field_option(ViewOptions, "output_format"),
    out: Path = typer.Option(None, "--out", "-o", help=_OUT_HELP, show_default=False),
) -> None:
    """List the nearest neighbours of WORD in every slice (similarity averaged over seeds)."""
    from drift.cli.rank_views import neighbours_table, print_rows
    from drift.compare.ranking import neighbours_by_slice, slice_labels

    view = ViewOptions(output_format=output_format)
    frame = neighbours_by_slice(run, word, k=k)
    labels = slice_labels(run)
    print_rows(
        frame, view.output_format, lambda width: neighbours_table(word, frame, labels, width), out
    )


@command("export")
def export_command(
    run: Path = typer.Argument(..., help="Run folder trained with 'drift train'."),
    vector_format: str = typer.Option(
        None,
        "--vector-format",
        metavar="FORMAT",
        help="word2vec (text format) or npz.",
        show_default=False,
    ),
    old_format: str = typer.Option(None, "--format", hidden=True),
    out: Path = typer.Option(..., "--out", "-o", help="Folder for one file per slice."),
    reference: str = field_option(RankOptions, "reference"),
    anchors: str = field_option(RankOptions, "anchors"),
) -> None:
    """Write every slice's aligned vectors (first seed) into OUT, one file per slice."""
    from drift.compare.ranking import export_vectors

    vector_format = vector_format or old_format
    if vector_format is None:
        raise DriftError("drift export needs --vector-format word2vec or --vector-format npz.")
    check_choice(vector_format, VECTOR_FORMATS, "--vector-format")
    for path in export_vectors(run, out, vector_format, reference=reference, anchors=anchors):
        typer.echo(str(path))
