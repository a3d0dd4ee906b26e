"""Commands of the train stage: ``drift train RUN``."""

from __future__ import annotations

from pathlib import Path

import typer

from drift.cli.app import app


@app.command("train")
def train(
    run: Path = typer.Argument(..., help="Run folder made by 'drift slice'."),
    architecture: str = typer.Option(
        "skipgram", "--architecture", help="skipgram (skip-gram, negative sampling) or cbow."
    ),
    dim: int = typer.Option(100, "--dim", help="Vector dimension (50 to 300 is usual)."),
    window: int = typer.Option(5, "--window", help="Context words on each side."),
    negative: int = typer.Option(5, "--negative", help="Noise words per positive example."),
    sample: float = typer.Option(1e-3, "--sample", help="Sub-sampling threshold (0 turns it off)."),
    epochs: int = typer.Option(5, "--epochs", help="Passes over each slice."),
    min_count: int = typer.Option(
        20, "--min-count", help="Ignore words rarer than this in each slice."
    ),
    seeds: int = typer.Option(2, "--seeds", help="Models per slice, each with its own seed."),
    base_seed: int = typer.Option(1, "--base-seed", help="Seed of the first model; k adds k."),
    workers: int = typer.Option(
        None,
        "--workers",
        help="Cores to use (default: all). With --scheduler: gensim threads per model (default 1).",
        show_default=False,
    ),
    between: tuple[str, str] | None = typer.Option(
        None,
        "--between",
        help="The two slices the control pair stands for (default: first and last).",
        show_default=False,
    ),
    no_control: bool = typer.Option(
        False, "--no-control", help="Skip the shuffled control pair (then no p or q values)."
    ),
    engine: str = typer.Option("local", "--engine", help="local or dask."),
    scheduler: str = typer.Option(
        None, "--scheduler", help="Dask scheduler address (default: a LocalCluster).",
        show_default=False,
    ),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars."),
) -> None:
    """Train one Word2Vec model per slice and seed, plus the time-shuffled control pair."""
    from drift.training import train_run

    chosen_pair = list(between) if between else None
    table = train_run(
        run,
        architecture=architecture,
        dim=dim,
        window=window,
        negative=negative,
        sample=sample,
        epochs=epochs,
        min_count=min_count,
        seeds=seeds,
        workers=workers,
        between=chosen_pair,
        control=not no_control,
        engine=engine,
        scheduler=scheduler,
        base_seed=base_seed,
        quiet=quiet,
    )
    reused = int(table["reused"].sum())
    trained = len(table) - reused
    slices = table[table["group"] == "slice"]
    typer.echo(
        f"{len(table)} models in {run}: {trained} trained, {reused} reused "
        f"({slices['label'].nunique()} slices x {seeds} seeds"
        f"{', plus the control pair' if not no_control else ''})."
    )
    for label, models in slices.groupby("label", sort=False):
        typer.echo(f"  {label}: {int(models['vocabulary'].median())} words")
    if no_control:
        typer.echo(
            "No control pair (--no-control): 'drift rank' will give no p or q values for this run."
        )
