"""Commands for evidence: ``drift examples`` (passages from the original documents) and
``drift evaluate`` (a ranking judged against gold values)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import typer

from drift.cli.options_cli import command, field_option
from drift.errors import DriftError
from drift.options import ExamplesOptions, ViewOptions

_OUT_HELP = "Write the output to this file instead of the screen (as a pipe gets it)."
_PASSAGE_COLUMNS = ("word", "slice", "document", "date", "left", "match", "right", "sentence",
                    "source_row", "source_file", "line", "original")


def _examples_table(table, word: str, width: int | None):
    from rich.table import Table
    from rich.text import Text

    meta = [c for c in table.columns if c not in _PASSAGE_COLUMNS]
    view = Table(title=f"Passages with '{word}'", width=width)
    for column in ["slice", "document", "date", *meta]:
        view.add_column(column, no_wrap=True)
    view.add_column("passage", ratio=1)
    for row in table.itertuples(index=False):
        passage = Text(str(row.left))
        passage.append(str(row.match), style="bold reverse")
        passage.append(str(row.right))
        view.add_row(str(row.slice), str(row.document), str(row.date),
                     *(str(getattr(row, m)) for m in meta), passage)
    return view


@command("examples")
def examples_command(
    run: Path = typer.Argument(..., help="Run folder sliced with 'drift slice'."),
    word: str = typer.Argument(..., help="The word whose passages to show."),
    output_format: str = field_option(ViewOptions, "output_format"),
    out: Path = typer.Option(None, "--out", "-o", help=_OUT_HELP, show_default=False),
    options: ExamplesOptions = ExamplesOptions(),
) -> None:
    """Passages that use WORD in each slice, quoted from the original documents as written, with
    document id, date and metadata (one per document, spread over sources)."""
    from drift.cli.rank_views import print_rows
    from drift.compare.targets import normalise_words, run_keeps_case
    from drift.publish.evidence import examples_for_words

    view = ViewOptions(output_format=output_format)
    word = normalise_words([word], run_keeps_case(run))[0]
    table = examples_for_words(run, [word], per_slice=options.examples, seed=options.seed)
    for note in table.attrs.get("notes", []):
        typer.echo(f"drift: note: {note}", err=True)
    if table.empty:
        raise DriftError(
            f"'{word}' occurs in no slice of {run}; check the spelling, or ask for more with "
            "--examples."
        )
    print_rows(table, view.output_format, lambda width: _examples_table(table, word, width), out)


def _number(value, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    return f"{value:.{digits}f}" if isinstance(value, float) else str(value)


@command("evaluate")
def evaluate_command(
    run: Path = typer.Argument(..., help="Run folder ranked with 'drift rank'."),
    gold: Path = typer.Option(
        ..., "--gold", show_default=False,
        help="CSV of gold values: word,score (graded change) or word,changed (0/1).",
    ),
    column: str = typer.Option(
        None, "--column", show_default=False,
        help="Scores column to correlate (default: z with a control, else score).",
    ),
    old_by: str = typer.Option(None, "--by", hidden=True),
    output_format: str = field_option(ViewOptions, "output_format"),
) -> None:
    """Judge the ranking of RUN against gold values: Spearman's rho with its p-value and 95%
    confidence interval (Fisher z); accuracy and F1 of 'significant' for 0/1 gold."""
    from drift.validate.evaluation import evaluate_run

    view = ViewOptions(output_format=output_format)
    result = evaluate_run(run, gold, by=column or old_by)
    for row in result.unmeasured.itertuples():
        typer.echo(f"drift: not measured: {row.word}: {row.reason}", err=True)
    for note in result.notes:
        typer.echo(f"drift: note: {note}", err=True)
    if view.output_format == "json":
        typer.echo(json.dumps(result.as_dict(), indent=1, default=str, allow_nan=True))
        return
    if view.output_format == "csv":
        typer.echo(result.pairs.to_csv(index=False), nl=False)
        return
    typer.echo(
        f"gold: {gold} ({result.kind}), {result.n} words measured; system value: {result.by}"
    )
    typer.echo(
        f"Spearman's rho = {_number(result.rho)} (p = {result.p:.3g}; 95% CI "
        f"{_number(result.ci_low)} to {_number(result.ci_high)}, Fisher z)"
    )
    if result.accuracy is not None:
        c = result.confusion or {}
        typer.echo(
            f"at the significance threshold: accuracy {_number(result.accuracy)}, precision "
            f"{_number(result.precision)}, recall {_number(result.recall)}, F1 "
            f"{_number(result.f1)} (changed and flagged {c.get('tp')}, flagged only "
            f"{c.get('fp')}, missed {c.get('fn')}, neither {c.get('tn')})"
        )
