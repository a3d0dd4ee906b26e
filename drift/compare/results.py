"""Reading a ranked run: scores, timeline, terms, the top rows, neighbours per slice, export.

Every table is read through :func:`drift.runfolder.read_table` and only when the rank stage's
record is current (never a table made from older models).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift import options, runfolder
from drift.compare.alignment import (
    SliceVectors,
    align_onto,
    parse_anchors,
)
from drift.compare.runinputs import (
    load_slice_vectors,
    read_run_inputs,
    resolve_slices,
)
from drift.errors import DriftError
from drift.options import ChartOptions, ViewOptions, default


def _read_table(run: str | Path, name: str, what: str) -> pd.DataFrame:
    paths = runfolder.existing_run(Path(run), needs="scores")
    if not runfolder.TABLES[name].path(paths.root).exists():
        raise DriftError(
            f"{paths.root} has no {what} yet; compute it with 'drift rank {paths.root}'."
        )
    runfolder.check_current(paths.root, "rank")  # never a table made from older models
    return runfolder.read_table(paths.root, name)


def read_scores(run: str | Path) -> pd.DataFrame:
    """The scores table of a ranked run (``scores.parquet``), best first.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`rank_run`.

    Returns
    -------
    pandas.DataFrame
        One row per word measured in both compared slices; the columns are listed in README.md
        ("The run folder").

    Raises
    ------
    DriftError
        The folder does not exist or was not ranked.

    Examples
    --------
    >>> import drift
    >>> scores = drift.read_scores(run)
    >>> scores["rank"].tolist()[:3]
    [1, 2, 3]
    >>> {"word", "displacement", "turnover", "z", "q", "gained", "lost"} <= set(scores.columns)
    True
    """
    return _read_table(run, "scores", "scores")


def read_timeline(run: str | Path) -> pd.DataFrame:
    """One row per word and slice: distance and turnover against the reference slice.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`rank_run`.

    Returns
    -------
    pandas.DataFrame
        ``word, slice, distance, distance_sd, turnover, count, fpm, null_p95`` (``null_p95``:
        the control's 95th percentile displacement at that word's frequency).

    Raises
    ------
    DriftError
        The folder does not exist or was not ranked.

    Examples
    --------
    >>> import drift
    >>> timeline = drift.read_timeline(run)
    >>> timeline[timeline["word"] == "tablet"]["slice"].tolist() == drift.slice_labels(run)
    True
    """
    return _read_table(run, "timeline", "timeline")


def read_terms(run: str | Path) -> pd.DataFrame:
    """Emerging and fading terms: words one compared slice has and the other lacks.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`rank_run`.

    Returns
    -------
    pandas.DataFrame
        ``word, kind`` (``emerging`` or ``fading``), ``count_from, count_to, fpm_from, fpm_to``
        and one ``fpm:<label>`` column per slice (occurrences per million tokens).

    Raises
    ------
    DriftError
        The folder does not exist or was not ranked.

    Examples
    --------
    >>> import drift
    >>> terms = drift.read_terms(run)
    >>> set(terms["kind"]) <= {"emerging", "fading"}
    True
    """
    return _read_table(run, "terms", "emerging and fading terms")


def rank_record(run: str | Path) -> dict[str, Any]:
    """The rank stage's entry in run.json: params, control_flagged, seeds, words, ..."""
    paths = runfolder.existing_run(Path(run), needs="scores")
    return dict(runfolder.read_manifest(paths.root).get("stages", {}).get("rank", {}))


def slice_labels(run: str | Path) -> list[str]:
    """The run's slice labels in time order."""
    paths = runfolder.existing_run(Path(run), needs="slices")
    return runfolder.slice_labels(paths.root)


def top_rows(
    scores: pd.DataFrame,
    top: int = default(ViewOptions, "top"),
    all_rows: bool = False,
    min_count: int = 0,
) -> pd.DataFrame:
    """The rows to show: best first, words seen at least ``min_count`` times in both slices."""
    if top < 1 and not all_rows:
        raise DriftError(f"--top must be at least 1 (got {top}); use --all to show every word.")
    if min_count < 0:
        raise DriftError(f"--min-count-shown must be 0 or more (got {min_count}).")
    shown = scores[(scores["count_from"] >= min_count) & (scores["count_to"] >= min_count)]
    shown = shown.sort_values("rank", kind="stable")
    return shown if all_rows else shown.head(top)


def rows_as_json(rows: pd.DataFrame) -> str:
    """A JSON array of row objects ending with a newline; NaN and missing values become null
    (``significant`` too, when there is no control to decide it)."""
    records = json.loads(rows.to_json(orient="records", force_ascii=False, double_precision=15))
    return json.dumps(records, ensure_ascii=False, indent=1) + "\n"  # a text file ends a line


def neighbours_by_slice(
    run: str | Path, word: str, k: int = default(ChartOptions, "k")
) -> pd.DataFrame:
    """The ``k`` nearest candidate words of ``word`` in every slice that knows it.

    The similarity is the cosine of the prepared vectors averaged over seeds (every seed's
    similarity to every candidate, then the k best of the average); the candidates are the words
    every slice knows, as in the rank stage. Read from neighbours.parquet when it holds the word
    at this k (see :mod:`drift.compare.neighbours`).

    Parameters
    ----------
    run : str or Path
        A run folder trained with :func:`drift.train_run`.
    word : str
        The word whose neighbours to list.
    k : int
        Neighbours per slice (``--neighbours`` on the command line).

    Returns
    -------
    pandas.DataFrame
        ``slice, rank, neighbour, similarity``, best first within each slice.

    Raises
    ------
    DriftError
        A word no slice knows (with close matches), a bad ``k``, a run without models.

    Examples
    --------
    >>> import drift
    >>> table = drift.neighbours_by_slice(run, "tablet", k=3)
    >>> list(table.columns)
    ['slice', 'rank', 'neighbour', 'similarity']
    >>> table.groupby("slice").size().tolist()
    [3, 3, 3, 3, 3, 3]
    """
    k = options.check_k(k, "--neighbours")
    from drift.compare.neighbours import word_neighbours

    return word_neighbours(run, word, k)


EXPORT_FORMATS = options.VECTOR_FORMATS


def export_vectors(
    run: str | Path,
    out: str | Path,
    fmt: str = "word2vec",
    *,
    reference: str | None = None,
    anchors: str | int | Sequence[str] | None = None,
) -> list[Path]:
    """Write every slice's aligned vectors into ``out``, one file per slice.

    The vectors are the prepared ones (unit length, centred) of the first trained seed, rotated
    onto the reference slice by orthogonal Procrustes.

    Parameters
    ----------
    run : str or Path
        A run folder trained with :func:`drift.train_run`.
    out : str or Path
        The folder to write (made if missing).
    fmt : str
        ``word2vec``: ``<label>.txt`` in word2vec text format (gensim's
        ``save_word2vec_format``); ``npz``: ``<label>.npz`` with arrays ``words``, ``vectors``,
        ``counts`` (``--vector-format`` on the command line).
    reference : str, optional
        The slice the others are aligned onto; by default that of the last :func:`rank_run`.
    anchors : int, str or list of str, optional
        The words the alignment is fitted on, as for :func:`rank_run`.

    Returns
    -------
    list of Path
        The files written, in time order.

    Raises
    ------
    DriftError
        An unknown format or reference slice, a run without models.

    Examples
    --------
    >>> import drift
    >>> files = drift.export_vectors(run, workdir / "vectors", "word2vec")
    >>> [path.name for path in files][:2]
    ['1950s.txt', '1960s.txt']
    """
    options.check_choice(fmt, EXPORT_FORMATS, "--vector-format")
    inputs = read_run_inputs(run)
    recorded = inputs.manifest.get("stages", {}).get("rank", {}).get("params", {})
    reference = reference if reference is not None else recorded.get("reference")
    anchors = anchors if anchors is not None else recorded.get("anchors")
    _, _, ref = resolve_slices(inputs.labels, None, reference)
    anchor_spec = parse_anchors(anchors)
    trim = float(recorded.get("anchor_trim", 0.0))  # as the last rank aligned the slices
    out = runfolder.prepare_export_folder(Path(out))
    seed = inputs.seeds[0]
    target = load_slice_vectors(inputs.paths, ref, seed)
    written = []
    for label in inputs.labels:
        vectors = target if label == ref else load_slice_vectors(inputs.paths, label, seed)
        aligned = vectors.vectors
        if label != ref:
            rotation = align_onto(vectors, target, anchor_spec, trim)
            aligned = (vectors.vectors @ rotation).astype(np.float32)
        written.append(_write_vectors(out, label, vectors, aligned, fmt))
    runfolder.record_export(out, inputs.paths.root, written, {"format": fmt, "reference": ref,
                                                              "anchors": anchors, "seed": seed,
                                                              "anchor_trim": trim})
    return written


def _write_vectors(
    out: Path, label: str, vectors: SliceVectors, aligned: np.ndarray, fmt: str
) -> Path:
    if fmt == "npz":
        path = out / f"{label}.npz"
        with runfolder.atomic_path(path) as tmp, tmp.open("wb") as handle:
            np.savez(
                handle,
                words=np.asarray(vectors.words, dtype=str),
                vectors=aligned,
                counts=vectors.counts,
            )
        return path
    from gensim.models import KeyedVectors

    keyed = KeyedVectors(vector_size=aligned.shape[1])
    keyed.add_vectors(vectors.words, aligned)
    path = out / f"{label}.txt"
    with runfolder.atomic_path(path) as tmp:
        keyed.save_word2vec_format(str(tmp), binary=False)
    return path
