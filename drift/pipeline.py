"""The whole job in one call: slice, train, rank and report (``drift run`` and ``drift demo``).

Each stage reuses what an earlier run of the same folder already finished (the stage fingerprints
in run.json decide), so rerunning after a change recomputes only what the change touches.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from drift.errors import DriftError


def _demo_dir() -> Path:
    """Where the bundled invented archive is: inside the installed package (a wheel carries it
    as drift/demo_data/), else beside the package in a source checkout (data_demo/)."""
    packaged = Path(__file__).resolve().parent / "demo_data"
    if (packaged / "archive.csv.gz").is_file():
        return packaged
    return Path(__file__).resolve().parent.parent / "data_demo"


DEMO_DIR = _demo_dir()
DEMO_ARCHIVE = DEMO_DIR / "archive.csv.gz"
DEMO_PLANTED = DEMO_DIR / "planted.csv"
#: The demo archive spans six decades; one slice per decade.
DEMO_SLICING = "decade"


@dataclass
class RunResult:
    """What :func:`run_all` produced: the tables of each stage and where the report is."""

    run: Path
    summary: pd.DataFrame
    models: pd.DataFrame
    scores: pd.DataFrame
    report: Path
    seconds: dict[str, float] = field(default_factory=dict)


def run_all(
    source: str | Path | Sequence[str | Path],
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

    Each stage reuses what an earlier run of the same folder finished with the same inputs and
    options, so a rerun after a change recomputes only what the change touches.

    Parameters
    ----------
    source : str, Path, or a sequence of them
        The dated archive: one path, or several paths, glob patterns and folders of table parts
        read as one archive (see :func:`drift.slice_archive`).
    out : str or Path
        The run folder.
    slice_options, train_options, rank_options, report_options : dict, optional
        Keyword arguments of :func:`drift.slice_archive`, :func:`drift.train_run`,
        :func:`drift.rank_run` and :func:`drift.build_report` (names, defaults and help texts:
        :mod:`drift.options`).
    report_top : int, optional
        Short for ``report_options={"top": N}``.
    quiet : bool
        No progress bars or notes.

    Returns
    -------
    RunResult
        ``run``, ``summary`` (slices), ``models``, ``scores``, ``report`` (the index page) and
        ``seconds`` per stage.

    Raises
    ------
    DriftError
        Whatever a stage refuses (see each stage's function).

    Examples
    --------
    >>> import drift
    >>> result = drift.run_all(
    ...     archive, workdir / "all",
    ...     slice_options={"by": "decade"},
    ...     train_options={"dim": 16, "epochs": 1, "seeds": 1, "min_count": 5},
    ...     report_options={"top": 1, "examples": 1},
    ...     quiet=True,
    ... )
    >>> result.report.name, sorted(result.seconds)
    ('index.html', ['rank', 'report', 'slice', 'train'])
    >>> result.scores["rank"].tolist()[:3]
    [1, 2, 3]
    """
    import time

    from drift.compare.ranking import rank_run
    from drift.embed.training import train_run
    from drift.ingest.slicing import slice_archive
    from drift.publish.report import build_report

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
            f"The demo archive {DEMO_ARCHIVE} is missing from this installation; reinstall "
            "lexical-drift, or in a source checkout regenerate it with "
            "'python data_demo/generate.py'."
        )
    return DEMO_ARCHIVE


def planted_words() -> pd.DataFrame:
    """The demo archive's gold list: word, kind (shift, frequency, emerging), onset, ..."""
    return pd.read_csv(DEMO_PLANTED)


def run_demo(out: str | Path = "demo-run", *, quiet: bool = False, **options: Any) -> RunResult:
    """The whole job on the bundled invented archive, one slice per decade.

    Parameters
    ----------
    out : str or Path
        The run folder.
    quiet : bool
        No progress bars or notes.
    **options
        ``train_options`` and ``rank_options`` dictionaries, as for :func:`run_all`.

    Returns
    -------
    RunResult
        As :func:`run_all` returns it.

    Raises
    ------
    DriftError
        The demo archive is missing (drift runs from a source checkout).

    Examples
    --------
    The demo trains 16 models, about half a minute (``tests/conftest.py`` runs it once):

    >>> import drift
    >>> result = drift.run_demo(workdir / "demo", quiet=True)  # doctest: +SKIP
    >>> result.scores[["word", "z", "q"]].head()  # doctest: +SKIP
    """
    return run_all(
        demo_archive(),
        out,
        slice_options={"by": DEMO_SLICING, "id_col": "id", "meta": ["source"]},
        train_options=options.get("train_options"),
        rank_options=options.get("rank_options"),
        quiet=quiet,
    )
