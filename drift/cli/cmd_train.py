"""Commands of the train stage: ``drift train RUN``."""

from __future__ import annotations

import statistics
from pathlib import Path

import typer

from drift.cli.app import QUIET_HELP
from drift.cli.options_cli import command
from drift.options import TrainOptions


@command("train")
def train(
    run: Path = typer.Argument(..., help="Run folder made by 'drift slice'."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help=QUIET_HELP),
    options: TrainOptions = TrainOptions(),
) -> None:
    """Train one Word2Vec model per slice and seed, plus the time-shuffled control pair."""
    from drift.embed.training import train_models

    rows = train_models(run, quiet=quiet, **options.kwargs())
    reused = sum(bool(row["reused"]) for row in rows)
    vocabularies: dict[str, list[int]] = {}
    for row in rows:
        if row["group"] == "slice":
            vocabularies.setdefault(row["label"], []).append(int(row["vocabulary"]))
    typer.echo(
        f"{len(rows)} models in {run}: {len(rows) - reused} trained, {reused} reused "
        f"({len(vocabularies)} slices x {options.seeds} seeds{_control_words(options)})."
    )
    for label, sizes in vocabularies.items():
        typer.echo(f"  {label}: {int(statistics.median(sizes))} words")
    if not options.control:
        typer.echo(
            "No control pair (--no-control): 'drift rank' will give no p or q values for this run."
        )


def _control_words(options: TrainOptions) -> str:
    if not options.control:
        return ""
    if options.control_splits == 1:
        return ", plus the control pair"
    return f", plus {options.control_splits} control pairs"
