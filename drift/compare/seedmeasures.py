"""One training seed's measurements: align, measure the compared pair, the timeline, the control.

Every slice's vectors are rotated onto the reference slice by orthogonal Procrustes (the
timeline); the "to" slice of the compared pair is also rotated directly onto the "from" slice (the
pair's displacement). Top-k neighbour lists are computed once per slice, in blocks, and reused for
turnover, local change and the timeline. The control pair is measured exactly like the real pair.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from drift.compare.alignment import (
    AnchorSpec,
    SliceVectors,
    align_onto,
    seed_instability,
)
from drift.compare.measures import (
    Neighbours,
    cosine_distance_rows,
    jaccard_distance_rows,
    local_change_rows,
    top_k_neighbours,
)
from drift.compare.neighbours import PAGE_K
from drift.compare.runinputs import (
    CONTROL_NAMES,
    RunInputs,
    candidate_words,
    control_pairs,
    load_slice_vectors,
)
from drift.errors import DriftError
from drift.options import RankOptions, default

#: Default share of anchors left out of the refitted alignment (see alignment.align_onto).
DEFAULT_ANCHOR_TRIM: float = default(RankOptions, "anchor_trim")
#: Neighbours per word and slice kept from the rank's search for the neighbours table: twice
#: the word pages' k, so that the seed-averaged top k is found among them (see
#: :func:`drift.compare.neighbours.table_from_lists`).
KEPT_NEIGHBOURS: int = 2 * PAGE_K


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
    #: the control pair of every further control split (train --control-splits), in order
    more_controls: list[PairMeasures] = field(default_factory=list)
    #: per slice, each measured word's best neighbours among the candidates (best first, cut
    #: to :data:`KEPT_NEIGHBOURS`): the neighbours table is assembled from them
    near: dict[str, Neighbours] = field(default_factory=dict)


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
    kept = min(k, KEPT_NEIGHBOURS)
    near = {label: Neighbours(found.indices[:, :kept].copy(), found.similarities[:, :kept].copy())
            for label, found in neighbours.items()}
    del candidates, neighbours

    control, control_instability, more_controls = None, None, []
    if inputs.control:
        control, models = measure_control(inputs, seed, cand_words, k, anchors, advance, trim)
        more_controls = [
            measure_control(inputs, seed, cand_words, k, anchors, advance, trim, names)[0]
            for names in control_pairs(inputs)[1:]
        ]
        if first_seed is not None:
            control_instability = np.column_stack(
                [_instability_of(first_seed[name], models[name], control.words)
                 for name in CONTROL_NAMES]
            )
        slices.update(models)
    result = SeedResult(pair_result, distance, turnover, control, instability,
                        control_instability, steps, more_controls, near)
    return result, cand_words, slices, k


def measure_control(
    inputs: RunInputs,
    seed: int,
    cand_words: Sequence[str],
    k: int,
    anchors: AnchorSpec,
    advance: Any = None,
    trim: float = DEFAULT_ANCHOR_TRIM,
    names: Sequence[str] = CONTROL_NAMES,
) -> tuple[PairMeasures, dict[str, SliceVectors]]:
    """The control pair (control-a vs control-b, or another split's ``names``) measured
    exactly like the compared pair; also returns the two control models (by the first split's
    names)."""
    first, second = (
        load_slice_vectors(inputs.paths, name, seed, control=True) for name in names
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
