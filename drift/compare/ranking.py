"""STAGE rank: align, measure, calibrate and rank every word; the timeline; emerging/fading terms.

Reads the trained models (``models/<label>/seed-<k>.npy``), the control pair when there is one,
``counts.parquet`` and ``slices/summary.csv``; writes ``scores.parquet``, ``scores.csv``,
``timeline.parquet``, ``terms.parquet`` and ``neighbours.parquet`` (schemas in DEVELOPERS.md).

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
4. The default measure, ``evidence``, calibrates displacement and local change separately
   against both nulls and combines each null's two z by Stouffer's method, corrected for the
   correlation between them (:func:`drift.compare.calibration.combine_evidence`); its ``score``
   column is the displacement. The older ``combined`` measure is the mean of displacement and
   turnover, per seed, calibrated as one measure.

``gained`` and ``lost`` come from consensus neighbour lists: the k best candidates by similarity
averaged over seeds, searched in the union of the seeds' own lists.
"""

from __future__ import annotations

import json
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift import options, runfolder
from drift.compare.alignment import (
    AnchorSpec,
    SliceVectors,
    align_onto,
    parse_anchors,
    prepare_vectors,
    seed_instability,
)
from drift.compare.changepoint import change_points
from drift.compare.measures import (
    Neighbours,
    consensus_neighbours,
    cosine_distance_rows,
    jaccard_distance_rows,
    local_change_rows,
    mean_and_spread,
    top_k_neighbours,
)
from drift.errors import DriftError
from drift.options import ChartOptions, RankOptions, ViewOptions, default
from drift.progress import note, progress_bars

#: Neighbours per word for turnover and local change (why 50: see drift.options.RankOptions).
DEFAULT_K: int = default(RankOptions, "k")
#: The measure that ranks words by default (why: see drift.options.RankOptions).
DEFAULT_MEASURE: str = default(RankOptions, "measure")
MEASURES = options.MEASURES
#: At most this many neighbours gained and lost are listed per word (strongest first).
NEIGHBOURS_LISTED = 10
CONTROL_NAMES = ("control-a", "control-b")

#: The columns of scores and timeline, declared in drift.runfolder (as lists, for indexing).
SCORE_COLUMNS = list(runfolder.SCORE_COLUMNS)
TIMELINE_COLUMNS = list(runfolder.TIMELINE_COLUMNS)
COMPARE_MODES = options.COMPARE_MODES
#: Default share of anchors left out of the refitted alignment (see alignment.align_onto).
DEFAULT_ANCHOR_TRIM: float = default(RankOptions, "anchor_trim")


# ---------------------------------------------------------------------------- reading a run


@dataclass(frozen=True)
class RunInputs:
    """What the rank stage reads from a run folder before touching any vectors."""

    paths: runfolder.RunPaths
    labels: list[str]
    seeds: list[int]
    control: dict[str, Any] | None
    counts: pd.DataFrame  # index word, one int64 column per slice label
    tokens: dict[str, int]
    manifest: dict[str, Any] = field(repr=False)


def _check_models_exist(
    paths: runfolder.RunPaths, labels: Sequence[str], seeds: Sequence[int], control: bool
) -> None:
    """Fail early, before any work, when a model file of the run is missing."""
    wanted = [(label, False) for label in labels]
    wanted += [(name, True) for name in CONTROL_NAMES] if control else []
    for label, is_control in wanted:
        for seed in seeds:
            locate = paths.control_model_file if is_control else paths.model_file
            path = locate(label, seed)
            if not path.is_file():
                what = "control model" if is_control else f"model of slice {label}"
                raise DriftError(
                    f"The {what} {path} is missing; retrain with 'drift train {paths.root}'."
                )


def read_run_inputs(run: str | Path) -> RunInputs:
    """Open a trained run folder and read its labels, seeds, control info, counts and sizes."""
    paths = runfolder.existing_run(Path(run), needs="models")
    runfolder.check_current(paths.root, "train")  # models made from the slices there now
    manifest = runfolder.read_manifest(paths.root)
    if not paths.slice_summary.exists():
        raise DriftError(f"{paths.root} has no slices/summary.csv; rerun 'drift slice'.")
    labels = runfolder.slice_labels(paths.root)
    if len(labels) < 2:
        raise DriftError(
            f"{paths.root} has {len(labels)} slice; ranking needs at least two, so slice the "
            "archive into more periods."
        )
    from drift.embed.training import control_info, trained_seeds

    seeds = trained_seeds(paths.root)
    control = control_info(paths.root)
    _check_models_exist(paths, labels, seeds, bool(control))
    summary = runfolder.read_table(paths.root, "summary")
    tokens = {str(r.label): int(r.tokens) for r in summary.itertuples()}
    counts = runfolder.read_table(paths.root, "counts").set_index("word")
    return RunInputs(paths, labels, seeds, control or None, counts, tokens, manifest)


def load_slice_vectors(
    paths: runfolder.RunPaths, label: str, seed: int, control: bool = False
) -> SliceVectors:
    """A slice's (or control model's) words, prepared vectors and counts for one seed."""
    from drift.embed.training import load_vectors

    kv = load_vectors(paths.root, label, seed, control=control)
    words = list(kv.index_to_key)
    if "count" in kv.expandos:
        counts = np.asarray(kv.expandos["count"], dtype=np.int64)
    else:
        counts = np.zeros(len(words), dtype=np.int64)
    return SliceVectors(label, words, prepare_vectors(kv.vectors), counts)


def candidate_words(slices: Sequence[SliceVectors]) -> list[str]:
    """Words every given model knows, in the first model's order (the neighbour candidates)."""
    first, rest = slices[0], slices[1:]
    return [w for w in first.words if all(w in s.index for s in rest)]


# ---------------------------------------------------------------------------- options


def resolve_slices(
    labels: Sequence[str], between: Sequence[str] | None, reference: str | None
) -> tuple[str, str, str]:
    """The compared pair (first and last slice by default) and the reference (first slice)."""

    slice_from, slice_to = options.check_between(labels, between)
    ref = labels[0] if reference is None else options.check_label(reference, labels, "--reference")
    return slice_from, slice_to, ref


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


def slice_neighbours(
    vectors: SliceVectors,
    words: Sequence[str],
    candidates: np.ndarray,
    candidate_index: dict[str, int],
    k: int,
) -> Neighbours:
    """Top-k candidate neighbours of ``words`` in one slice; -1 rows for words it lacks."""
    present = np.fromiter((w in vectors.index for w in words), dtype=bool, count=len(words))
    present_words = [w for w, p in zip(words, present, strict=True) if p]
    exclude = np.array([candidate_index.get(w, -1) for w in present_words], dtype=np.int64)
    found = top_k_neighbours(vectors.vectors[vectors.rows(present_words)], candidates, k, exclude)
    indices = np.full((len(words), k), -1, dtype=np.int32)
    similarities = np.full((len(words), k), np.nan, dtype=np.float32)
    indices[present] = found.indices
    similarities[present] = found.similarities
    return Neighbours(indices, similarities)


def _rows_or_missing(vectors: SliceVectors, words: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    """Row numbers of ``words`` in a slice (0 where missing) and the mask of present words."""
    rows = np.fromiter((vectors.index.get(w, -1) for w in words), dtype=np.int64, count=len(words))
    return np.maximum(rows, 0), rows >= 0


def displacement_rows(
    moved: SliceVectors, fixed: SliceVectors, rotation: np.ndarray, words: Sequence[str]
) -> np.ndarray:
    """Cosine distance of each word between ``moved`` (rotated) and ``fixed``; NaN if missing."""
    rows_m, in_m = _rows_or_missing(moved, words)
    rows_f, in_f = _rows_or_missing(fixed, words)
    out = cosine_distance_rows(moved.vectors[rows_m] @ rotation, fixed.vectors[rows_f])
    out[~(in_m & in_f)] = np.nan
    return out


@dataclass
class PairMeasures:
    """One seed's measures of the words of a compared pair, plus what gained/lost needs."""

    words: list[str]
    displacement: np.ndarray
    turnover: np.ndarray
    local: np.ndarray
    counts_from: np.ndarray
    counts_to: np.ndarray
    vectors_from: np.ndarray
    vectors_to: np.ndarray
    candidates_from: np.ndarray
    candidates_to: np.ndarray
    neighbours_from: Neighbours
    neighbours_to: Neighbours

    def value(self, measure: str) -> np.ndarray:
        if measure == "combined":
            return (self.displacement + self.turnover) / 2.0
        if measure == "evidence":  # its score is the displacement; z combines it with local
            return self.displacement
        return getattr(self, measure)


def measure_pair(
    slice_from: SliceVectors,
    slice_to: SliceVectors,
    words: Sequence[str],
    candidates_from: np.ndarray,
    candidates_to: np.ndarray,
    neighbours_from: Neighbours,
    neighbours_to: Neighbours,
    rotation_to_onto_from: np.ndarray,
) -> PairMeasures:
    """Displacement, turnover and local change of ``words`` (known to both slices)."""
    rows_from, rows_to = slice_from.rows(words), slice_to.rows(words)
    vectors_from = slice_from.vectors[rows_from]
    vectors_to = slice_to.vectors[rows_to]
    displacement = cosine_distance_rows(vectors_to @ rotation_to_onto_from, vectors_from)
    turnover = jaccard_distance_rows(neighbours_from.indices, neighbours_to.indices)
    local = local_change_rows(
        vectors_from, candidates_from, neighbours_from.indices,
        vectors_to, candidates_to, neighbours_to.indices,
    )
    return PairMeasures(
        list(words), displacement, turnover, local,
        slice_from.counts[rows_from], slice_to.counts[rows_to],
        vectors_from, vectors_to, candidates_from, candidates_to, neighbours_from, neighbours_to,
    )


def usable_k(k: int, n_candidates: int, what: str, notes: list[str] | None = None) -> int:
    """``k``, or fewer neighbours (with a note) when ``what`` knows too few candidate words."""
    if n_candidates < 2:
        raise DriftError(
            f"Only {n_candidates} word is known to {what}, too few for any neighbours; use more "
            "text per slice or a lower --min-count."
        )
    if n_candidates > k:
        return k
    lowered = max(1, (n_candidates - 1) // 2)
    if notes is not None:
        notes.append(
            f"only {n_candidates} words are known to {what}, too few for --k {k}; neighbour "
            f"measures use k = {lowered} instead."
        )
    return lowered


@dataclass
class SeedResult:
    """Everything measured with one seed."""

    pair: PairMeasures
    distance: np.ndarray  # words x slices, against the reference
    turnover: np.ndarray  # words x slices, against the reference
    control: PairMeasures | None
    #: words x slices: each word's distance between this seed and the first seed of the same
    #: slice (None for the first seed itself)
    instability: np.ndarray | None = None
    #: control words x 2: the same for the two control models
    control_instability: np.ndarray | None = None
    #: words x (slices - 1): displacement between each slice and the next (for --compare steps)
    steps: np.ndarray | None = None


def _instability_of(first: SliceVectors, other: SliceVectors, words: Sequence[str]) -> np.ndarray:
    per_word = seed_instability(first, other)
    rows = np.fromiter((first.index.get(w, -1) for w in words), dtype=np.int64, count=len(words))
    out = np.where(rows >= 0, per_word[np.maximum(rows, 0)], np.nan)
    return out


def measure_seed(
    inputs: RunInputs,
    seed: int,
    words: list[str],
    pair: tuple[str, str],
    reference: str,
    k: int,
    anchors: AnchorSpec,
    advance: Any = None,
    first_seed: dict[str, SliceVectors] | None = None,
    trim: float = DEFAULT_ANCHOR_TRIM,
    notes: list[str] | None = None,
) -> tuple[SeedResult, list[str], dict[str, SliceVectors], int]:
    """Load one seed's models, align, measure the pair, the timeline and the control pair.

    ``first_seed`` holds the first seed's models (slices and control); with it, each word's
    distance to its own vector of the first seed (its optimisation noise) is measured too.
    Returns the result, the candidate words, this seed's models (for ``first_seed``) and the k
    used (lowered, with a line in ``notes``, when the slices share too few candidate words).
    """
    labels = inputs.labels
    slices = {label: load_slice_vectors(inputs.paths, label, seed) for label in labels}
    for label in pair:
        if not all(w in slices[label].index for w in words):
            raise DriftError(
                f"Seed {seed} of slice {label} has another vocabulary than the first seed; "
                f"retrain with 'drift train {inputs.paths.root}' so every seed uses the same "
                "slices."
            )
    cand_words = candidate_words([slices[label] for label in labels])
    k = usable_k(k, len(cand_words), "every slice", notes)
    cand_index = {w: i for i, w in enumerate(cand_words)}
    candidates = {label: s.vectors[s.rows(cand_words)] for label, s in slices.items()}
    neighbours = {}
    for label in labels:
        neighbours[label] = slice_neighbours(slices[label], words, candidates[label], cand_index, k)
        if advance:
            advance()

    ref = slices[reference]
    rotations = {
        label: align_onto(slices[label], ref, anchors, trim)
        for label in labels if label != reference
    }
    rotations[reference] = np.eye(ref.vectors.shape[1])
    distance = np.column_stack(
        [displacement_rows(slices[label], ref, rotations[label], words) for label in labels]
    )
    at_reference = labels.index(reference)
    distance[:, at_reference] = np.where(np.isfinite(distance[:, at_reference]), 0.0, np.nan)
    turnover = np.column_stack(
        [
            jaccard_distance_rows(neighbours[label].indices, neighbours[reference].indices)
            for label in labels
        ]
    )
    slice_from, slice_to = pair
    if slice_from == reference:
        rotation = rotations[slice_to]
    else:
        rotation = align_onto(slices[slice_to], slices[slice_from], anchors, trim)
    pair_result = measure_pair(
        slices[slice_from], slices[slice_to], words,
        candidates[slice_from], candidates[slice_to],
        neighbours[slice_from], neighbours[slice_to], rotation,
    )
    steps = np.column_stack(
        [
            displacement_rows(slices[b], slices[a], align_onto(slices[b], slices[a], anchors, trim),
                              words)
            for a, b in zip(labels[:-1], labels[1:], strict=True)
        ]
    )
    instability = None
    if first_seed is not None:
        instability = np.column_stack(
            [_instability_of(first_seed[label], slices[label], words) for label in labels]
        )
    del candidates, neighbours

    control, control_instability = None, None
    if inputs.control:
        control, models = measure_control(inputs, seed, cand_words, k, anchors, advance, trim)
        if first_seed is not None:
            control_instability = np.column_stack(
                [_instability_of(first_seed[name], models[name], control.words)
                 for name in CONTROL_NAMES]
            )
        slices.update(models)
    result = SeedResult(pair_result, distance, turnover, control, instability,
                        control_instability, steps)
    return result, cand_words, slices, k


def measure_control(
    inputs: RunInputs,
    seed: int,
    cand_words: Sequence[str],
    k: int,
    anchors: AnchorSpec,
    advance: Any = None,
    trim: float = DEFAULT_ANCHOR_TRIM,
) -> tuple[PairMeasures, dict[str, SliceVectors]]:
    """The control pair (control-a vs control-b) measured exactly like the compared pair; also
    returns the two control models."""
    first, second = (
        load_slice_vectors(inputs.paths, name, seed, control=True) for name in CONTROL_NAMES
    )
    words = [w for w in first.words if w in second.index]
    ctrl_cands = [w for w in cand_words if w in first.index and w in second.index]
    k = usable_k(k, len(ctrl_cands), "both control models and every slice")
    cand_index = {w: i for i, w in enumerate(ctrl_cands)}
    cands_first = first.vectors[first.rows(ctrl_cands)]
    cands_second = second.vectors[second.rows(ctrl_cands)]
    near_first = slice_neighbours(first, words, cands_first, cand_index, k)
    if advance:
        advance()
    near_second = slice_neighbours(second, words, cands_second, cand_index, k)
    if advance:
        advance()
    rotation = align_onto(second, first, anchors, trim)
    measured = measure_pair(
        first, second, words, cands_first, cands_second,
        near_first, near_second, rotation,
    )
    return measured, dict(zip(CONTROL_NAMES, (first, second), strict=True))


# ---------------------------------------------------------------------------- assembling


def _counts_for(inputs: RunInputs, words: Sequence[str], label: str, fallback: np.ndarray | None):
    """Counts of ``words`` in slice ``label`` from counts.parquet (``fallback`` where absent)."""
    if label in inputs.counts.columns:
        found = inputs.counts[label].reindex(list(words)).to_numpy(dtype=np.float64)
    else:
        found = np.full(len(words), np.nan)
    missing = ~np.isfinite(found)
    if fallback is not None:
        found[missing] = fallback[missing]
    else:
        found[missing] = 0
    return found.astype(np.int64)


def _per_million(counts: np.ndarray, tokens: int | None) -> np.ndarray:
    if not tokens:
        return np.full(len(counts), np.nan)
    return counts.astype(np.float64) * 1e6 / tokens


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
    fpm_from = _per_million(count_from, inputs.tokens.get(slice_from))
    fpm_to = _per_million(count_to, inputs.tokens.get(slice_to))
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
            frame[f"fpm:{label}"] = _per_million(
                _counts_for(inputs, words, label, None), inputs.tokens.get(label)
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


def measure_run(
    inputs: RunInputs,
    pair: tuple[str, str],
    reference: str,
    k: int,
    anchors: AnchorSpec,
    trim: float = DEFAULT_ANCHOR_TRIM,
    quiet: bool = False,
) -> Measured:
    """Measure every seed of a run (the expensive part of ranking; no calibration yet)."""
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
    steps = len(inputs.seeds) * (len(inputs.labels) + (2 if inputs.control else 0))
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
    return Measured(words, pair, reference, k, results, cand_words, vocab_from, vocab_to, notes)


def _nanmean(stacked: np.ndarray, axis: int) -> np.ndarray:
    """``np.nanmean`` without the warning for all-NaN slices (they stay NaN)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(stacked, axis=axis)


def _mean_instability(blocks: Sequence[np.ndarray | None]) -> np.ndarray | None:
    """Seed noise per word and column, averaged over the seeds after the first."""
    present = [b for b in blocks if b is not None]
    return _nanmean(np.stack(present), 0) if present else None


@dataclass(frozen=True)
class CalibrationOptions:
    """How the nulls are fitted (the defaults are the benchmark's winners; see the README)."""

    use_seed_noise: bool = True
    #: how a word's seed distances in the two compared models are combined: 'max' (as the
    #: rarer count: a word is as noisy as its noisier side) or 'mean'
    noise: str = "max"
    #: fit the nulls to log(measure): the benchmark found its standardised control residuals
    #: close to normal (skew and excess kurtosis near 0), unlike the raw measure's (skewed)
    log_scale: bool = True
    tail: str = "normal"
    #: the drift null borrows the noise null's shape (else: a normal tail)
    shared_shape: bool = True


def _combine_noise(columns: np.ndarray, how: str) -> np.ndarray:
    if how == "max":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmax(columns, axis=1)
    return _nanmean(columns, 1)


def pair_seed_noise(
    measured: Measured, labels: Sequence[str], how: str = "max"
) -> np.ndarray | None:
    """Each word's seed noise for the compared pair, from its seed distances in the two slices
    (``how``: see :class:`CalibrationOptions`); None with one seed only."""
    per_slice = _mean_instability([r.instability for r in measured.results[1:]])
    if per_slice is None:
        return None
    a, b = (labels.index(x) for x in measured.pair)
    return _combine_noise(per_slice[:, [a, b]], how)


def _noise_nulls(
    measured: Measured, measure: str, options: CalibrationOptions, with_noise: bool,
    reasons: list[str], record: dict[str, Any], control_p: list[np.ndarray] | None = None,
) -> tuple[Any, Any]:
    """The control pair's nulls: for ``measure`` and for displacement (the timeline's band).

    (None, None) when there is no control or it is too small; ``reasons`` then says why. The
    control words' noise p values are appended to ``control_p`` when it is given.
    """
    from drift.compare.calibration import WEAK_NULL_WORDS, calibrate, fit_null

    controls = [r.control for r in measured.results if r.control is not None]
    if not controls:
        reasons.append("no control pair was trained (--no-control)")
        return None, None
    first = controls[0]
    if any(c.words != first.words for c in controls[1:]):
        raise DriftError(
            "The control models of different seeds have different vocabularies; retrain the "
            "run with 'drift train' so every seed uses the same control slices."
        )
    control_noise = _mean_instability([r.control_instability for r in measured.results[1:]])
    c_noise = None
    if with_noise and control_noise is not None:
        c_noise = _combine_noise(control_noise, options.noise)
    try:
        control_values, _ = mean_and_spread([c.value(measure) for c in controls])
        noise_null = fit_null(control_values, first.counts_from, first.counts_to, c_noise,
                              tail=options.tail, what="control pair",
                              log_scale=options.log_scale)
        displacement_null = noise_null
        if measure != "displacement":
            control_disp, _ = mean_and_spread([c.displacement for c in controls])
            displacement_null = fit_null(control_disp, first.counts_from, first.counts_to,
                                         c_noise, tail=options.tail, what="control pair",
                                         log_scale=options.log_scale)
    except DriftError as exc:
        reasons.append(f"no noise null: {exc}")
        return None, None
    control_table = calibrate(control_values, first.counts_from, first.counts_to,
                              seed_noise=c_noise, noise_null=noise_null, drift_null=noise_null)
    flagged = control_table["noise_q"] <= ALPHA_RECORD
    if control_p is not None:
        control_p.append(control_table["noise_p"].to_numpy(dtype=float))
    record["control_flagged"] = int(flagged.sum())
    record["noise_null"] = noise_null.describe()
    if noise_null.words < WEAK_NULL_WORDS:
        reasons.append(f"the control pair gave only {noise_null.words} words (weak below "
                       f"{WEAK_NULL_WORDS})")
    return noise_null, displacement_null


#: The level at which run.json's control_flagged counts the control words the null flags.
ALPHA_RECORD = 0.05


def _significance(noise_null: Any, drift_null: Any, reasons: list[str]) -> tuple[str, str]:
    """(status, note): 'full', 'weak' or 'unavailable', and a sentence for the table."""
    if noise_null is None or drift_null is None:
        status = "unavailable"
    else:
        status = "weak" if reasons else "full"
    note = "" if status == "full" else f"significance {status}: " + "; ".join(
        reason.rstrip(".") for reason in reasons
    )
    return status, note


def _calibration(
    measured: Measured,
    scores: pd.DataFrame,
    measure: str,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """(calibration columns, the displacement noise null or None, run.json entries).

    Without a control, or with one too small to fit a null, the noise null's columns (and the
    headline) are empty and ``significance`` in run.json says why.
    """
    if measure == "evidence":
        return _evidence_calibration(measured, scores, alpha, labels, options)
    return _one_measure_calibration(measured, scores, measure, alpha, labels, options)


def _evidence_calibration(
    measured: Measured,
    scores: pd.DataFrame,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """The ``evidence`` measure: each of :data:`EVIDENCE_MEASURES` calibrated on its own, their
    z combined per null (:func:`drift.compare.calibration.combine_evidence`)."""
    from drift.compare.calibration import bh_qvalues, combine_evidence
    from drift.options import EVIDENCE_MEASURES

    tables, records, control_p = {}, {}, []
    displacement_null = None
    for name in EVIDENCE_MEASURES:
        columns, null, records[name] = _one_measure_calibration(
            measured, scores.assign(score=scores[name]), name, alpha, labels, options, control_p
        )
        tables[name] = columns
        displacement_null = null if name == "displacement" else displacement_null
    combined, correlation = combine_evidence(tables, alpha)
    reasons = list(dict.fromkeys(
        reason for record in records.values() for reason in record["significance"]["reasons"]
    ))
    statuses = [record["significance"]["status"] for record in records.values()]
    status = next(s for s in ("unavailable", "weak", "full") if s in statuses)
    note = "" if status == "full" else f"significance {status}: " + "; ".join(
        reason.rstrip(".") for reason in reasons
    )
    combined["significance_note"] = note
    record: dict[str, Any] = {"control_flagged": None}
    if len(control_p) == len(EVIDENCE_MEASURES):
        control_z, _ = combine_evidence(
            {name: pd.DataFrame({"noise_p": p, "drift_p": p})
             for name, p in zip(EVIDENCE_MEASURES, control_p, strict=True)}, alpha
        )
        record["control_flagged"] = int((bh_qvalues(control_z["noise_p"]) <= ALPHA_RECORD).sum())
    first = records[EVIDENCE_MEASURES[0]]
    for key in ("noise_null", "drift_null"):
        if key in first:
            record[key] = first[key]
    record["significance"] = {"status": status, "reasons": reasons}
    record["evidence"] = {
        "measures": list(EVIDENCE_MEASURES),
        "correlation": correlation,
        "nulls": {name: {key: rec[key] for key in ("noise_null", "drift_null") if key in rec}
                  for name, rec in records.items()},
    }
    return combined, displacement_null, record


def _one_measure_calibration(
    measured: Measured,
    scores: pd.DataFrame,
    measure: str,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
    control_p: list[np.ndarray] | None = None,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """:func:`_calibration` for one measure, whose values are ``scores['score']``."""
    from drift.compare.calibration import calibrate, fit_null

    values = scores["score"].to_numpy(dtype=float)
    count_from = scores["count_from"].to_numpy(dtype=float)
    count_to = scores["count_to"].to_numpy(dtype=float)
    noise = pair_seed_noise(measured, labels, options.noise) if options.use_seed_noise else None
    reasons: list[str] = []
    if noise is None:
        reasons.append("one training seed only, so each word's own noise is unknown "
                       "(train with --seeds 2 or more)")
    record: dict[str, Any] = {"control_flagged": None}
    noise_null, displacement_null = _noise_nulls(
        measured, measure, options, noise is not None, reasons, record, control_p
    )
    drift_null = None
    try:
        drift_null = fit_null(values, count_from, count_to, noise, tail="normal",
                              what=f"pair {measured.pair[0]}-{measured.pair[1]}",
                              shape_from=noise_null if options.shared_shape else None,
                              log_scale=options.log_scale)
        record["drift_null"] = drift_null.describe()
    except DriftError as exc:
        reasons.append(f"no drift null: {exc}")
    columns = calibrate(values, count_from, count_to, seed_noise=noise, noise_null=noise_null,
                        drift_null=drift_null, alpha=alpha)
    columns.insert(0, "seed_noise", noise if noise is not None else np.nan)
    status, note = _significance(noise_null, drift_null, reasons)
    columns["significance_note"] = note
    record["significance"] = {"status": status, "reasons": reasons}
    return columns, displacement_null, record


def _steps_calibration(
    inputs: RunInputs,
    measured: Measured,
    alpha: float,
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """Whole-timeline calibration (``--compare steps``): each word's largest calibrated step.

    Every adjacent pair of slices is a step; a word's displacement over each step is judged by
    the control pair's noise null (at that step's counts and seed noise) and by a drift null
    fitted on that step's own words. The word's step is the one with the smallest headline p;
    its p values are multiplied by the number of steps measured (Bonferroni, capped at 1), then
    Benjamini-Hochberg runs over the words.
    """
    from drift.compare.calibration import bh_qvalues, calibrate, fit_null

    labels, words = inputs.labels, measured.words
    step_values, _ = mean_and_spread([r.steps for r in measured.results])
    per_slice = _mean_instability([r.instability for r in measured.results[1:]])
    use_noise = per_slice is not None and options.use_seed_noise
    counts = np.column_stack([_counts_for(inputs, words, label, None) for label in labels])
    reasons: list[str] = []
    if not use_noise:
        reasons.append("one training seed only, so each word's own noise is unknown "
                       "(train with --seeds 2 or more)")
    record: dict[str, Any] = {"control_flagged": None}
    noise_null, displacement_null = _noise_nulls(
        measured, "displacement", options, use_noise, reasons, record
    )
    n_steps = len(labels) - 1
    tables = []
    for j in range(n_steps):
        values = step_values[:, j]
        noise = _combine_noise(per_slice[:, [j, j + 1]], options.noise) if use_noise else None
        drift_null = None
        try:
            drift_null = fit_null(values, counts[:, j], counts[:, j + 1], noise,
                                  what=f"step {labels[j]}-{labels[j + 1]}",
                                  shape_from=noise_null if options.shared_shape else None,
                                  log_scale=options.log_scale)
        except DriftError as exc:
            reasons.append(f"no drift null for step {labels[j]}-{labels[j + 1]}: {exc}")
        table = calibrate(values, counts[:, j], counts[:, j + 1], seed_noise=noise,
                          noise_null=noise_null, drift_null=drift_null, alpha=alpha)
        table.insert(0, "seed_noise", noise if noise is not None else np.nan)
        tables.append(table)
    headline = np.column_stack([t["p"].to_numpy(dtype=float) for t in tables])
    fallback = np.column_stack([t["drift_p"].to_numpy(dtype=float) for t in tables])
    chooser = np.where(np.isfinite(headline), headline, np.inf)
    if not np.isfinite(chooser).any():
        chooser = np.where(np.isfinite(fallback), fallback, np.inf)
    best = np.argmin(chooser, axis=1)
    measured_steps = np.isfinite(step_values).sum(axis=1).clip(min=1)
    rows = np.arange(len(words))
    columns = pd.DataFrame(
        {name: np.column_stack([t[name].to_numpy(dtype=float) for t in tables])[rows, best]
         for name in ("seed_noise", "null_centre", "null_spread", "noise_z", "noise_p",
                      "typical", "typical_spread", "drift_z", "drift_p", "z", "p")}
    )
    for name in ("noise_p", "drift_p", "p"):
        columns[name] = np.minimum(1.0, columns[name] * measured_steps)
    columns["noise_q"] = bh_qvalues(columns["noise_p"])
    columns["drift_q"] = bh_qvalues(columns["drift_p"])
    columns["q"] = bh_qvalues(columns["p"])
    significant = pd.array(np.where(np.isfinite(columns["q"]), columns["q"] <= alpha, False),
                           dtype="boolean")
    if noise_null is None:
        significant[:] = pd.NA
    columns["significant"] = significant
    status, note = _significance(noise_null, True, reasons)
    columns["significance_note"] = note
    record["significance"] = {"status": status, "reasons": reasons}
    best_values = step_values[rows, best]
    columns["score"] = best_values
    columns["change_point"] = pd.Series(
        np.where(np.isfinite(best_values), np.asarray(labels, dtype=object)[best + 1], None),
        dtype=object,
    )
    columns["change_step"] = best_values
    return columns, displacement_null, record


def _inputs_fingerprint(inputs: RunInputs, anchor_words_list: list[str] | None) -> str:
    stages = inputs.manifest.get("stages", {})
    parts = {
        "slice": stages.get("slice", {}).get("fingerprint"),
        "train": stages.get("train", {}).get("fingerprint"),
        "models": runfolder.fingerprint_path(inputs.paths.models_dir),
        "counts": runfolder.fingerprint_file(inputs.paths.counts),
        "summary": runfolder.fingerprint_file(inputs.paths.slice_summary),
        "anchors": anchor_words_list,
    }
    if inputs.control and inputs.paths.control_dir.is_dir():
        parts["control"] = runfolder.fingerprint_path(inputs.paths.control_dir)
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
        measured = measure_run(inputs, (slice_from, slice_to), ref, int(k), anchor_spec,
                               float(anchor_trim), quiet)
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
        _write_neighbours(root, list(scores["word"]))
        runfolder.record_stage(
            root, "rank", params, fingerprint, time.perf_counter() - started, extra=extra,
            outputs=[*outputs, paths.scores_csv],
        )
    return read_scores(root)  # the same types as a reused result


def _write_neighbours(root: Path, words: list[str]) -> None:
    """neighbours.parquet: each measured word's neighbours per slice at the word pages' k."""
    from drift.compare.neighbours import write_neighbours_table

    write_neighbours_table(root, words)


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
    between adjacent slices (see :func:`_steps_calibration`).
    """
    options = options or CalibrationOptions()
    words, results = measured.words, measured.results
    scores = _scores_frame(inputs, results, words, measured.pair, measure,
                           measured.vocab_from, measured.vocab_to)
    distance, distance_sd = mean_and_spread([r.distance for r in results])
    turnover, _ = mean_and_spread([r.turnover for r in results])
    if compare == "steps":
        calibration, displacement_null, record = _steps_calibration(
            inputs, measured, alpha, options
        )
        for column in calibration.columns:
            scores[column] = calibration[column].to_numpy()
    else:
        calibration, displacement_null, record = _calibration(
            measured, scores, measure, alpha, inputs.labels, options
        )
        for column in calibration.columns:
            scores[column] = calibration[column].to_numpy()
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
    per_slice = _mean_instability([r.instability for r in results[1:]])
    if per_slice is not None and options.use_seed_noise:
        at_ref = inputs.labels.index(measured.reference)
        timeline_noise = np.column_stack(
            [_combine_noise(per_slice[:, [j, at_ref]], options.noise)
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
    count_from = _counts_for(inputs, words, slice_from, vocab_from.counts[vocab_from.rows(words)])
    count_to = _counts_for(inputs, words, slice_to, vocab_to.counts[vocab_to.rows(words)])
    fpm_from = _per_million(count_from, inputs.tokens.get(slice_from))
    fpm_to = _per_million(count_to, inputs.tokens.get(slice_to))
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
    counts = np.column_stack([_counts_for(inputs, words, label, None) for label in labels])
    fpm = np.column_stack(
        [_per_million(counts[:, i], inputs.tokens.get(label)) for i, label in enumerate(labels)]
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


# ---------------------------------------------------------------------------- neighbours, export


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
    out = runfolder.prepare_export_folder(Path(out))
    seed = inputs.seeds[0]
    target = load_slice_vectors(inputs.paths, ref, seed)
    written = []
    for label in inputs.labels:
        vectors = target if label == ref else load_slice_vectors(inputs.paths, label, seed)
        aligned = vectors.vectors
        if label != ref:
            rotation = align_onto(vectors, target, anchor_spec)
            aligned = (vectors.vectors @ rotation).astype(np.float32)
        written.append(_write_vectors(out, label, vectors, aligned, fmt))
    runfolder.record_export(out, inputs.paths.root, written, {"format": fmt, "reference": ref,
                                                              "anchors": anchors, "seed": seed})
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
