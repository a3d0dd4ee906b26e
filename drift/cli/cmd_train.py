"""Commands of the train stage: ``drift train RUN``."""

from __future__ import annotations

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
    from drift.embed.training import train_run

    table = train_run(run, quiet=quiet, **options.kwargs())
    reused = int(table["reused"].sum())
    trained = len(table) - reused
    slices = table[table["group"] == "slice"]
    typer.echo(
        f"{len(table)} models in {run}: {trained} trained, {reused} reused "
        f"({slices['label'].nunique()} slices x {options.seeds} seeds"
        f"{_control_words(options)})."
    )
    for label, models in slices.groupby("label", sort=False):
        typer.echo(f"  {label}: {int(models['vocabulary'].median())} words")
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
