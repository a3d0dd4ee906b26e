"""The whole job in one call: slice, train, rank and report (``drift run`` and ``drift demo``).

Each stage reuses what an earlier run of the same folder already finished (the stage fingerprints
in run.json decide), so rerunning after a change recomputes only what the change touches.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from drift.errors import DriftError

#: The bundled invented archive lives beside the package in a source checkout.
DEMO_DIR = Path(__file__).resolve().parent.parent / "data_demo"
DEMO_ARCHIVE = DEMO_DIR / "archive.csv.gz"
DEMO_PLANTED = DEMO_DIR / "planted.csv"
#: The demo archive spans six decades; one slice per decade.
DEMO_SLICING = "decade"


@dataclass
class RunResult:
    """What ``run_all`` produced: the tables of each stage and where the report is."""

    run: Path
    summary: pd.DataFrame
    models: pd.DataFrame
    scores: pd.DataFrame
    report: Path
    seconds: dict[str, float] = field(default_factory=dict)


def run_all(
    source: str | Path,
    out: str | Path,
    *,
    slice_options: dict[str, Any] | None = None,
    train_options: dict[str, Any] | None = None,
    rank_options: dict[str, Any] | None = None,
    report_options: dict[str, Any] | None = None,
    report_top: int | None = None,
    quiet: bool = False,
) -> RunResult:
    """Slice ``source`` into ``out``, train, rank and write the HTML report.

    The option dictionaries are passed as keyword arguments to
    :func:`drift.slicing.slice_archive`, :func:`drift.training.train_run`,
    :func:`drift.ranking.rank_run` and :func:`drift.report.build_report` (their names and
    defaults: :mod:`drift.options`); ``report_top`` is short for ``report_options={"top": N}``.
    """
    import time

    from drift.ranking import rank_run
    from drift.report import build_report
    from drift.slicing import slice_archive
    from drift.training import train_run

    seconds: dict[str, float] = {}
    started = time.perf_counter()
    summary = slice_archive(source, out, quiet=quiet, **(slice_options or {}))
    seconds["slice"] = time.perf_counter() - started

    started = time.perf_counter()
    models = train_run(out, quiet=quiet, **(train_options or {}))
    seconds["train"] = time.perf_counter() - started

    started = time.perf_counter()
    scores = rank_run(out, quiet=quiet, **(rank_options or {}))
    seconds["rank"] = time.perf_counter() - started

    started = time.perf_counter()
    report_options = dict(report_options or {})
    if report_top is not None:
        report_options["top"] = report_top
    report = build_report(out, **report_options)
    seconds["report"] = time.perf_counter() - started
    return RunResult(Path(out), summary, models, scores, Path(report), seconds)


def demo_archive() -> Path:
    """The bundled demo archive, or a DriftError saying how to get it."""
    if not DEMO_ARCHIVE.exists():
        raise DriftError(
            f"The demo archive {DEMO_ARCHIVE} is missing; run drift from a source checkout "
            "(pip install -e .) or regenerate it with 'python data_demo/generate.py'."
        )
    return DEMO_ARCHIVE


def planted_words() -> pd.DataFrame:
    """The demo archive's gold list: word, kind (shift, frequency, emerging), onset, ..."""
    return pd.read_csv(DEMO_PLANTED)


def run_demo(out: str | Path = "demo-run", *, quiet: bool = False, **options: Any) -> RunResult:
    """The whole job on the bundled invented archive, one slice per decade."""
    return run_all(
        demo_archive(),
        out,
        slice_options={"by": DEMO_SLICING},
        train_options=options.get("train_options"),
        rank_options=options.get("rank_options"),
        quiet=quiet,
    )
