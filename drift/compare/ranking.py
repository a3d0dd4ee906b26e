"""STAGE rank: align, measure, calibrate and rank every word; the timeline; emerging/fading terms.

Reads the trained models (``models/<label>/seed-<k>.npy``), the control pair when there is one,
``counts.parquet`` and ``slices/summary.csv``; writes ``scores.parquet``, ``scores.csv``,
``timeline.parquet``, ``terms.parquet`` and ``neighbours.parquet`` (schemas in DEVELOPERS.md).

This module runs the stage (:func:`rank_run`: measure every seed, assemble and calibrate, write);
the parts live beside it: :mod:`~drift.compare.runinputs` (what a run folder holds),
:mod:`~drift.compare.seedmeasures` (one seed's alignment and measures),
:mod:`~drift.compare.significance` (both nulls for the pair or the steps) and
:mod:`~drift.compare.results` (reading the tables back, neighbours, export).

How a run is scored (per seed, then averaged over seeds with the spread kept in ``*_sd``):

1. Every slice's vectors are prepared (unit length, centred, unit length) and rotated onto the
   reference slice by orthogonal Procrustes over the anchors (the timeline); the "to" slice of
   the compared pair is also rotated directly onto the "from" slice (the pair's displacement).
2. Each slice's top-k neighbour lists are computed once, in blocks, and reused for the pair's
   turnover and local change and for the timeline's turnover. Neighbours are drawn from the
   *candidate words*: the words every slice's models know, so a neighbour never drops out of a
   list merely because it is missing from the other slice.
3. The control pair (control-a vs control-b, the compared slices pooled and split at random) is
   measured exactly like the compared pair; its measures, as a function of frequency, are the
   null for z, p and q (:mod:`drift.compare.calibration`).
4. The default measure, ``evidence``, calibrates displacement, local change and the context
   change counted from the text (:mod:`drift.compare.contexts`) separately against both nulls
   and combines each null's z, half the weight to the context change and a quarter to each
   trained measure, the sum standardised by their correlation matrix
   (:func:`drift.compare.calibration.combine_evidence`); its ``score`` column is the
   displacement. The older ``combined`` measure is the mean of displacement and
   turnover, per seed, calibrated as one measure.

``gained`` and ``lost`` come from consensus neighbour lists: the k best candidates by similarity
averaged over seeds, searched in the union of the seeds' own lists.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift import options, runfolder
from drift.compare.alignment import (
    AnchorSpec,
    SliceVectors,
    parse_anchors,
)
from drift.compare.changepoint import change_points
from drift.compare.contexts import ContextChange, context_change
from drift.compare.measures import (
    consensus_neighbours,
    mean_and_spread,
)
from drift.compare.results import (
    EXPORT_FORMATS,
    export_vectors,
    neighbours_by_slice,
    rank_record,
    read_scores,
    read_terms,
    read_timeline,
    rows_as_json,
    slice_labels,
    top_rows,
)
from drift.compare.runinputs import (
    CONTROL_NAMES,
    RunInputs,
    candidate_words,
    control_pairs,
    counts_for,
    load_slice_vectors,
    per_million,
    read_run_inputs,
    resolve_slices,
)
from drift.compare.seedmeasures import (
    DEFAULT_ANCHOR_TRIM,
    PairMeasures,
    SeedResult,
    displacement_rows,
    measure_control,
    measure_pair,
    measure_seed,
    slice_neighbours,
    usable_k,
)
from drift.compare.significance import (
    ALPHA_RECORD,
    CalibrationOptions,
    calibrate_pair,
    calibrate_steps,
    combine_noise,
    mean_instability,
    own_control_measure,
    pair_seed_noise,
)
from drift.errors import DriftError
from drift.options import RankOptions, default
from drift.progress import note, progress_bars

#: The names other modules and the public API import from here; they live in the modules the
#: rank stage is made of (runinputs, seedmeasures, significance, results).
__all__ = [
    "ALPHA_RECORD", "CONTROL_NAMES", "DEFAULT_ANCHOR_TRIM", "DEFAULT_K", "DEFAULT_MEASURE",
    "EXPORT_FORMATS", "MEASURES", "SCORE_COLUMNS", "TIMELINE_COLUMNS", "CalibrationOptions",
    "Measured", "PairMeasures", "RunInputs", "SeedResult", "assemble_scores", "candidate_words",
    "compute_scores", "displacement_rows", "emerging_and_fading", "export_vectors",
    "gained_and_lost", "load_slice_vectors", "measure_control", "measure_pair", "measure_run",
    "measure_seed", "neighbours_by_slice", "order_scores", "pair_seed_noise", "rank_record",
    "rank_run", "read_run_inputs", "read_scores", "read_terms", "read_timeline",
    "resolve_slices", "rows_as_json", "slice_labels", "slice_neighbours", "top_rows", "usable_k",
]

#: Neighbours per word for turnover and local change (why 50: see drift.options.RankOptions).
DEFAULT_K: int = default(RankOptions, "k")
#: The measure that ranks words by default (why: see drift.options.RankOptions).
DEFAULT_MEASURE: str = default(RankOptions, "measure")
MEASURES = options.MEASURES
#: At most this many neighbours gained and lost are listed per word (strongest first).
NEIGHBOURS_LISTED = 10

#: The columns of scores and timeline, declared in drift.runfolder (as lists, for indexing).
SCORE_COLUMNS = list(runfolder.SCORE_COLUMNS)
TIMELINE_COLUMNS = list(runfolder.TIMELINE_COLUMNS)
COMPARE_MODES = options.COMPARE_MODES


# ---------------------------------------------------------------------------- reading a run


# ---------------------------------------------------------------------------- options


def _check_options(measure: str, k: int, alpha: float, anchor_trim: float = 0.0,
                   compare: str = "pair") -> None:
    RankOptions(measure=measure, k=k, alpha=alpha, anchor_trim=anchor_trim, compare=compare)
    if compare == "steps" and measure not in ("displacement", "evidence"):
        raise DriftError(
            "--compare steps judges displacement between adjacent slices; leave --measure at "
            "its default or choose displacement."
        )


def _anchor_record(raw: Any, spec: AnchorSpec) -> Any:
    """How the anchors appear in run.json: a number, a file path, or the word list itself."""
    if spec is None or isinstance(spec, int):
        return spec
    if isinstance(raw, str | Path):
        return str(raw)
    return list(spec)


# ---------------------------------------------------------------------------- one seed


# ---------------------------------------------------------------------------- assembling


def _row_members(values: np.ndarray, within: np.ndarray) -> np.ndarray:
    """``out[i, j]`` is True when ``values[i, j]`` occurs in row ``within[i]``."""
    return (values[:, :, None] == within[:, None, :]).any(axis=2)


def gained_and_lost(
    results: Sequence[SeedResult], cand_words: Sequence[str], k: int
) -> tuple[list[str], list[str]]:
    """Neighbours gained (new in "to") and lost (gone from "from"), space separated, strongest
    first, from the seed-averaged consensus lists."""
    pairs = [r.pair for r in results]
    before = consensus_neighbours(
        [p.vectors_from for p in pairs], [p.candidates_from for p in pairs],
        [p.neighbours_from.indices for p in pairs], k,
    )
    after = consensus_neighbours(
        [p.vectors_to for p in pairs], [p.candidates_to for p in pairs],
        [p.neighbours_to.indices for p in pairs], k,
    )
    new = ~_row_members(after.indices, before.indices) & (after.indices >= 0)
    gone = ~_row_members(before.indices, after.indices) & (before.indices >= 0)
    vocab = np.asarray(cand_words, dtype=object)
    gained = [" ".join(vocab[row[keep]][:NEIGHBOURS_LISTED])
              for row, keep in zip(after.indices, new, strict=True)]
    lost = [" ".join(vocab[row[keep]][:NEIGHBOURS_LISTED])
            for row, keep in zip(before.indices, gone, strict=True)]
    return gained, lost


#: Emerging and fading terms: a word is *emerging* when it occurs at least TERM_MIN_COUNT times in
#: the later compared slice and its frequency per million tokens there is at least TERM_RATIO times
#: its frequency in the earlier one (fading: the same, the other way round). 20 is the training's
#: default --min-count (so the word has enough uses to be trained where it is common); a tenfold
#: change in relative frequency is our choice (common practice, no published threshold).
TERM_MIN_COUNT = default(RankOptions, "term_count")
TERM_RATIO = default(RankOptions, "term_ratio")


def check_term_rule(min_count: int, ratio: float) -> tuple[int, float]:
    """The emerging/fading rule's options, checked."""
    if isinstance(min_count, bool) or int(min_count) != min_count or min_count < 1:
        raise DriftError(f"--term-count must be a whole number of at least 1 (got {min_count}).")
    if not ratio > 1:
        raise DriftError(f"--term-ratio must be more than 1 (got {ratio}).")
    return int(min_count), float(ratio)


def emerging_and_fading(
    inputs: RunInputs,
    pair: Sequence[str],
    measured: set[str] | None = None,
    min_count: int = TERM_MIN_COUNT,
    ratio: float = TERM_RATIO,
) -> pd.DataFrame:
    """Emerging and fading terms between the compared slices by the stated rule (see
    TERM_MIN_COUNT and TERM_RATIO), from counts.parquet; ``measured`` says which of them the
    rank stage could also score (known to both slices' models)."""
    slice_from, slice_to = pair
    counts = inputs.counts
    count_from = counts[slice_from].to_numpy(np.int64) if slice_from in counts else None
    count_to = counts[slice_to].to_numpy(np.int64) if slice_to in counts else None
    if count_from is None or count_to is None:
        count_from = count_to = np.zeros(len(counts), np.int64)
    fpm_from = per_million(count_from, inputs.tokens.get(slice_from))
    fpm_to = per_million(count_to, inputs.tokens.get(slice_to))
    emerging = (count_to >= min_count) & (fpm_to >= ratio * fpm_from)
    fading = (count_from >= min_count) & (fpm_from >= ratio * fpm_to)
    frames = []
    for kind, chosen, present in (("emerging", emerging, count_to), ("fading", fading, count_from)):
        rows = np.flatnonzero(chosen)
        words = counts.index.to_numpy()[rows]
        with np.errstate(divide="ignore", invalid="ignore"):
            change = (fpm_to[rows] / fpm_from[rows]) if kind == "emerging" else \
                (fpm_from[rows] / fpm_to[rows])
        frame = pd.DataFrame(
            {
                "word": pd.Series(words, dtype=object),
                "kind": kind,
                "count_from": count_from[rows],
                "count_to": count_to[rows],
                "fpm_from": fpm_from[rows],
                "fpm_to": fpm_to[rows],
                "ratio": change,
                "measured": [w in measured for w in words] if measured is not None else False,
            }
        )
        for label in inputs.labels:
            frame[f"fpm:{label}"] = per_million(
                counts_for(inputs, words, label, None), inputs.tokens.get(label)
            )
        frame["_present"] = present[rows]
        frames.append(frame.sort_values(["_present", "word"], ascending=[False, True],
                                        kind="stable").drop(columns="_present"))
    return pd.concat(frames, ignore_index=True)


@dataclass
class Measured:
    """Everything the rank stage measured, before calibration (:func:`measure_run`)."""

    words: list[str]
    pair: tuple[str, str]
    reference: str
    k: int
    results: list[SeedResult]
    cand_words: list[str]
    vocab_from: SliceVectors
    vocab_to: SliceVectors
    notes: list[str] = field(default_factory=list)
    #: context change counted from the two slices' text, with each word's permutation null
    #: (None: the slice files are gone; :mod:`drift.compare.contexts`)
    context: ContextChange | None = None


def measure_run(
    inputs: RunInputs,
    pair: tuple[str, str],
    reference: str,
    k: int,
    anchors: AnchorSpec,
    trim: float = DEFAULT_ANCHOR_TRIM,
    quiet: bool = False,
    contexts: bool = True,
) -> Measured:
    """Measure every seed of a run (the expensive part of ranking; no calibration yet) and,
    with ``contexts``, the context change between the pair's slice files."""
    slice_from, slice_to = pair
    notes: list[str] = []
    if inputs.control is None:
        notes.append(
            "this run has no control pair (trained with --no-control), so the noise null and the "
            "headline z, p, q are empty; retrain without --no-control to calibrate it."
        )
    elif list(inputs.control.get("between", pair)) != [slice_from, slice_to]:
        drawn = " and ".join(str(x) for x in inputs.control.get("between", []))
        notes.append(
            f"the control pair was drawn from slices {drawn}, not {slice_from} and {slice_to}; "
            "its null fits slices of those sizes."
        )
    first_seed = inputs.seeds[0]
    vocab_from = load_slice_vectors(inputs.paths, slice_from, first_seed)
    vocab_to = load_slice_vectors(inputs.paths, slice_to, first_seed)
    words = [w for w in vocab_from.words if w in vocab_to.index]
    if not words:
        raise DriftError(
            f"Slices {slice_from} and {slice_to} share no words; check the slicing and min count."
        )
    steps = len(inputs.seeds) * (len(inputs.labels) + 2 * len(control_pairs(inputs))) + 1
    results: list[SeedResult] = []
    cand_words: list[str] = []
    seed_zero: dict[str, SliceVectors] | None = None
    with progress_bars(quiet) as progress:
        task = progress.add_task("rank: neighbours", total=steps)

        def advance() -> None:
            progress.advance(task)

        for seed in inputs.seeds:
            result, seed_cands, models, k = measure_seed(
                inputs, seed, words, pair, reference, k, anchors, advance, seed_zero, trim,
                notes,
            )
            if cand_words and seed_cands != cand_words:
                raise DriftError(
                    "The seeds of this run have different vocabularies; retrain with "
                    f"'drift train {inputs.paths.root}' so every seed uses the same slices."
                )
            cand_words = seed_cands
            seed_zero = models if seed_zero is None else seed_zero
            results.append(result)
        context = (measure_contexts(inputs, pair, words, vocab_from, vocab_to, notes)
                   if contexts else None)
        progress.advance(task)
    return Measured(words, pair, reference, k, results, cand_words, vocab_from, vocab_to, notes,
                    context)


def measure_contexts(
    inputs: RunInputs, pair: tuple[str, str], words: list[str], vocab_from: SliceVectors,
    vocab_to: SliceVectors, notes: list[str],
) -> ContextChange | None:
    """The context change of every word between the pair's slice files (None, with a note,
    when a slice file is gone)."""
    files = [inputs.paths.slice_file(label) for label in pair]
    missing = [str(f) for f in files if not f.is_file()]
    if missing:
        notes.append(f"the slice file {missing[0]} is gone, so the evidence lacks the context "
                     "change counted from the text; slice the archive again to restore it.")
        return None
    train = inputs.manifest.get("stages", {}).get("train", {}).get("params", {})
    try:
        return context_change(
            files[0], files[1], words,
            vocab_from.counts[vocab_from.rows(words)], vocab_to.counts[vocab_to.rows(words)],
            window=int(train.get("window", 5)),
        )
    except DriftError as exc:
        notes.append(f"the evidence lacks the context change counted from the text: {exc}.")
        return None


def _inputs_fingerprint(inputs: RunInputs, anchor_words_list: list[str] | None) -> str:
    stages = inputs.manifest.get("stages", {})
    parts = {
        "slice": stages.get("slice", {}).get("fingerprint"),
        "train": stages.get("train", {}).get("fingerprint"),
        "models": runfolder.content_print_tree(inputs.paths.models_dir),
        "counts": runfolder.content_print(inputs.paths.counts),
        "summary": runfolder.content_print(inputs.paths.slice_summary),
        "anchors": anchor_words_list,
        # scores depend on drift's own code too: a new version ranks again instead of reusing
        "drift": runfolder.package_version(),
    }
    if inputs.control and inputs.paths.control_dir.is_dir():
        parts["control"] = runfolder.content_print_tree(inputs.paths.control_dir)
    return runfolder.fingerprint_params(parts)


def rank_run(
    run: str | Path,
    *,
    between: Sequence[str] | None = None,
    reference: str | None = None,
    measure: str = DEFAULT_MEASURE,
    k: int = DEFAULT_K,
    alpha: float = default(RankOptions, "alpha"),
    anchors: str | int | Sequence[str] | None = None,
    anchor_trim: float = DEFAULT_ANCHOR_TRIM,
    compare: str = "pair",
    quiet: bool = False,
    term_count: int = TERM_MIN_COUNT,
    term_ratio: float = TERM_RATIO,
) -> pd.DataFrame:
    """Score every word of the compared pair; write scores, timeline and terms; return scores.

    Aligns every slice onto the reference slice (orthogonal Procrustes), measures displacement,
    neighbour turnover and local neighbourhood change between the two compared slices, and
    calibrates them against frequency-matched nulls (z, p and Benjamini-Hochberg q; README.md,
    "How to read significance"). Reuses the files of an earlier run with the same inputs and
    parameters. Defaults and help texts of the options: :class:`drift.options.RankOptions`.

    Parameters
    ----------
    run : str or Path
        A run folder trained with :func:`drift.train_run`.
    between : pair of str, optional
        The two compared slices (default: the first and the last).
    reference : str, optional
        The slice the timeline is measured against (default: the first).
    measure : str
        The ranking measure: ``evidence`` (default: displacement and local change, each
        calibrated, their z combined), ``displacement``, ``turnover``, ``local`` or ``combined``.
    k : int
        Neighbours per word for turnover and local change.
    alpha : float
        False discovery rate for ``significant``.
    anchors : int, str or list of str, optional
        Align on the N most frequent shared words, on the words of a file, or on a list of
        words (default: every shared word).
    anchor_trim : float
        Share of the anchors that moved most left out of a refitted alignment (0: keep all).
    compare : str
        ``pair`` judges the change between the two compared slices; ``steps`` each word's
        largest calibrated step between adjacent slices over the whole timeline
        (``change_point`` then names the slice after that step).
    quiet : bool
        No progress bars or notes.
    term_count, term_ratio : int, float
        The emerging and fading rule: at least ``term_count`` uses where the word is common, and
        a frequency per million at least ``term_ratio`` times that in the other slice.

    Returns
    -------
    pandas.DataFrame
        The scores (as :func:`read_scores` returns them): ordered by the headline ``z`` (both
        nulls) when the run has a control pair, else by the drift null's ``drift_z``.

    Raises
    ------
    DriftError
        A value out of range (named as on the command line), an unknown slice (with close
        matches), a run without models, a folder in use.

    Examples
    --------
    >>> import drift
    >>> scores = drift.rank_run(run, measure="turnover", k=10, quiet=True)
    >>> bool((scores["score"] == scores["turnover"]).all())
    True
    >>> drift.rank_run(run, alpha=2)
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --alpha must lie strictly between 0 and 1 (got 2); use e.g. 0.05.
    """
    started = time.perf_counter()
    _check_options(measure, k, alpha, anchor_trim, compare)
    inputs = read_run_inputs(run)
    root = inputs.paths.root
    slice_from, slice_to, ref = resolve_slices(inputs.labels, between, reference)
    anchor_spec = parse_anchors(anchors)
    params = {
        "between": [slice_from, slice_to],
        "reference": ref,
        "measure": measure,
        "k": int(k),
        "alpha": float(alpha),
        "anchors": _anchor_record(anchors, anchor_spec),
        "term_count": check_term_rule(term_count, term_ratio)[0],
        "term_ratio": float(term_ratio),
        "anchor_trim": float(anchor_trim),
        "compare": compare,
        # how the nulls are fitted: a drift whose defaults changed ranks an old run again
        "calibration": asdict(CalibrationOptions()),
    }
    fingerprint = _inputs_fingerprint(
        inputs, list(anchor_spec) if isinstance(anchor_spec, list) else None
    )
    paths = inputs.paths
    outputs = (paths.scores_parquet, paths.timeline_parquet, paths.terms_parquet,
               paths.neighbours_parquet, paths.terms_csv, paths.timeline_csv)
    if runfolder.stage_is_current(root, "rank", params, fingerprint) and all(
        p.exists() for p in outputs
    ) and runfolder.stale_reason(root, "rank") is None:
        note(f"scores in {root} are current; reusing them.", quiet)
        return read_scores(root)

    with runfolder.run_lock(root):
        # --compare steps calibrates displacement between adjacent slices: the context change
        # of the first and last slice would be counted for nothing
        measured = measure_run(inputs, (slice_from, slice_to), ref, int(k), anchor_spec,
                               float(anchor_trim), quiet, contexts=compare != "steps")
        scores, timeline, terms, extra = assemble_scores(
            inputs, measured, measure, float(alpha), compare=compare,
            term_rule=check_term_rule(term_count, term_ratio),
        )
        for message in measured.notes:
            note(message, quiet)
        if scores["significance_note"].iloc[:1].any():
            note(str(scores["significance_note"].iloc[0]) + ".", quiet)
        for name, table in (("scores", scores), ("timeline", timeline), ("terms", terms)):
            runfolder.write_table(root, name, table)
        _write_neighbours(root, list(scores["word"]), measured)
        runfolder.record_stage(
            root, "rank", params, fingerprint, time.perf_counter() - started, extra=extra,
            outputs=[*outputs, paths.scores_csv],
        )
    return read_scores(root)  # the same types as a reused result


def _write_neighbours(root: Path, words: list[str], measured: Measured) -> None:
    """neighbours.parquet: each measured word's neighbours per slice at the word pages' k,
    assembled from the neighbour lists the measures were computed from."""
    from drift.compare.neighbours import load_run_models, write_neighbours_table

    models = load_run_models(root)
    listed = None
    if models.candidates == measured.cand_words:
        listed = (measured.words, [result.near for result in measured.results])
    write_neighbours_table(root, words, models=models, listed=listed)


def compute_scores(
    inputs: RunInputs,
    pair: tuple[str, str],
    reference: str,
    measure: str,
    k: int,
    alpha: float,
    anchors: AnchorSpec,
    quiet: bool = False,
    term_rule: tuple[int, float] = (TERM_MIN_COUNT, TERM_RATIO),
    trim: float = DEFAULT_ANCHOR_TRIM,
    options: CalibrationOptions | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, dict[str, Any]]:
    """The rank stage's tables (scores, timeline, terms) and the extra run.json entries."""
    measured = measure_run(inputs, pair, reference, k, anchors, trim, quiet)
    return assemble_scores(inputs, measured, measure, alpha, options, term_rule=term_rule)


def assemble_scores(
    inputs: RunInputs,
    measured: Measured,
    measure: str,
    alpha: float,
    options: CalibrationOptions | None = None,
    compare: str = "pair",
    term_rule: tuple[int, float] = (TERM_MIN_COUNT, TERM_RATIO),
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, dict[str, Any]]:
    """Calibrate what :func:`measure_run` measured: scores, timeline, terms, run.json entries.

    ``compare``: 'pair' judges the compared pair; 'steps' judges each word's largest step
    between adjacent slices (see :func:`calibrate_steps`).
    """
    options = options or CalibrationOptions()
    words, results = measured.words, measured.results
    scores = _scores_frame(inputs, results, words, measured.pair, measure,
                           measured.vocab_from, measured.vocab_to)
    distance, distance_sd = mean_and_spread([r.distance for r in results])
    turnover, _ = mean_and_spread([r.turnover for r in results])
    if compare == "steps":
        calibration, displacement_null, record = calibrate_steps(
            inputs, measured, alpha, options
        )
        for column in calibration.columns:
            scores[column] = calibration[column].to_numpy()
    else:
        calibration, displacement_null, record = calibrate_pair(
            measured, scores, measure, alpha, inputs.labels, options
        )
        for column in calibration.columns:
            scores[column] = calibration[column].to_numpy()
    scores["own_control"] = own_control_measure(measured, "displacement", words)
    context = getattr(measured, "context", None)  # measurements cached by an older drift
    scores["context"] = context.distance if context is not None else np.nan
    scores["context_z"] = context.z if context is not None else np.nan
    if compare == "steps":
        pass  # change_point and change_step are the word's largest calibrated step
    elif len(inputs.labels) > 2:
        position, step = change_points(distance)
        labels = np.asarray(inputs.labels, dtype=object)
        scores["change_point"] = pd.Series(
            np.where(position >= 0, labels[np.maximum(position, 0)], None), dtype=object
        )
        scores["change_step"] = step
    else:
        scores["change_point"] = pd.Series([None] * len(words), dtype=object)
        scores["change_step"] = np.nan
    scores["gained"], scores["lost"] = gained_and_lost(results, measured.cand_words, measured.k)

    timeline_noise = None
    per_slice = mean_instability([r.instability for r in results[1:]])
    if per_slice is not None and options.use_seed_noise:
        at_ref = inputs.labels.index(measured.reference)
        timeline_noise = np.column_stack(
            [combine_noise(per_slice[:, [j, at_ref]], options.noise)
             for j in range(per_slice.shape[1])]
        )
    timeline = _timeline_frame(inputs, words, distance, distance_sd, turnover,
                               measured.reference, displacement_null, timeline_noise)
    scores = order_scores(scores)
    scores["rank"] = np.arange(1, len(scores) + 1, dtype=np.int64)
    scores = scores[SCORE_COLUMNS]
    terms = emerging_and_fading(inputs, measured.pair, set(words), *term_rule)
    extra = {
        **record,
        "seeds": list(inputs.seeds),
        "words": len(words),
        "candidates": len(measured.cand_words),
        "k_used": int(measured.k),
        "notes": list(measured.notes),
    }
    return scores, timeline, terms, extra


def order_scores(scores: pd.DataFrame) -> pd.DataFrame:
    """Order words by the headline z (both nulls), then by score.

    With a control, z is the ranking: the synthetic change injection benchmark
    (benchmarks/injection_eval.py) found injected changes about three times more precisely by z
    than by the raw measure, which puts noisy rare words first. Without a control, by the drift
    null's z when it exists, else by score.
    """
    for first in ("z", "drift_z"):
        if first in scores and scores[first].notna().any():
            keys = [first, "score", "word"]
            break
    else:
        keys = ["score", "word"]
    ascending = [False] * (len(keys) - 1) + [True]
    return scores.sort_values(keys, ascending=ascending, na_position="last",
                              kind="stable").reset_index(drop=True)


def _scores_frame(
    inputs: RunInputs,
    results: Sequence[SeedResult],
    words: list[str],
    pair: tuple[str, str],
    measure: str,
    vocab_from: SliceVectors,
    vocab_to: SliceVectors,
) -> pd.DataFrame:
    """The measure columns of the scores table (calibration and change point come later)."""
    slice_from, slice_to = pair
    pairs = [r.pair for r in results]
    columns: dict[str, Any] = {"word": pd.Series(words, dtype=object), "rank": 0}
    columns["score"], _ = mean_and_spread([p.value(measure) for p in pairs])
    for name in ("displacement", "turnover", "local"):
        columns[name], columns[f"{name}_sd"] = mean_and_spread([getattr(p, name) for p in pairs])
    count_from = counts_for(inputs, words, slice_from, vocab_from.counts[vocab_from.rows(words)])
    count_to = counts_for(inputs, words, slice_to, vocab_to.counts[vocab_to.rows(words)])
    fpm_from = per_million(count_from, inputs.tokens.get(slice_from))
    fpm_to = per_million(count_to, inputs.tokens.get(slice_to))
    columns.update(count_from=count_from, count_to=count_to, fpm_from=fpm_from, fpm_to=fpm_to)
    with np.errstate(divide="ignore", invalid="ignore"):
        columns["log_freq_ratio"] = np.log2(fpm_to / fpm_from)
    return pd.DataFrame(columns)


def _timeline_frame(
    inputs: RunInputs,
    words: list[str],
    distance: np.ndarray,
    distance_sd: np.ndarray,
    turnover: np.ndarray,
    reference: str,
    displacement_null: Any,
    noise: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per word and slice (word-major order).

    ``null_p95``: the noise null's 95th percentile at the word's rarer count and seed noise;
    ``typical``: the drift null's centre for that slice against the reference (how far words of
    that frequency and noise generally moved), fitted on that slice's own words.
    """
    from drift.compare.calibration import fit_null

    labels = inputs.labels
    counts = np.column_stack([counts_for(inputs, words, label, None) for label in labels])
    fpm = np.column_stack(
        [per_million(counts[:, i], inputs.tokens.get(label)) for i, label in enumerate(labels)]
    )
    ref_counts = counts[:, labels.index(reference)][:, None]
    rarer = np.minimum(ref_counts, counts)
    null_p95 = np.full(distance.shape, np.nan)
    typical = np.full(distance.shape, np.nan)
    for j, label in enumerate(labels):
        measured = np.isfinite(distance[:, j])
        column_noise = None if noise is None else noise[measured, j]
        if displacement_null is not None:
            wanted = column_noise if displacement_null.uses_noise else None
            if not displacement_null.uses_noise or wanted is not None:
                null_p95[measured, j] = displacement_null.quantile(
                    0.95, rarer[measured, j], wanted
                )
        if label == reference:
            typical[measured, j] = 0.0
            continue
        try:
            drift_null = fit_null(distance[measured, j], rarer[measured, j], rarer[measured, j],
                                  column_noise, what=f"slice {label}")
        except DriftError:
            continue
        typical[measured, j] = drift_null.centre(rarer[measured, j], column_noise)
    n_words, n_slices = distance.shape
    return pd.DataFrame(
        {
            "word": pd.Series(np.repeat(np.asarray(words, dtype=object), n_slices), dtype=object),
            "slice": pd.Series(np.tile(np.asarray(labels, dtype=object), n_words), dtype=object),
            "distance": distance.ravel(),
            "distance_sd": distance_sd.ravel(),
            "turnover": turnover.ravel(),
            "count": counts.ravel(),
            "fpm": fpm.ravel(),
            "null_p95": null_p95.ravel(),
            "typical": typical.ravel(),
        }
    )[TIMELINE_COLUMNS]


# ---------------------------------------------------------------------------- reading results


# ---------------------------------------------------------------------------- neighbours, export


