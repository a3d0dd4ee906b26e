"""What a word page shows beyond the tables: its path, its self-similarity, its change point range.

- **Path in two dimensions.** Each slice is rotated onto the reference slice (orthogonal
  Procrustes over the rank stage's anchors and anchor trim, as in the rank stage). The word's
  aligned vector in every slice and each of its neighbours' aligned vectors (in the slice where
  that neighbour ranked best) are projected onto their first two principal components (PCA
  fitted on these points only). Seed 0's models are used, since the seeds' spaces are not
  aligned to each other.
- **Self-similarity.** The cosine similarity of the word's aligned vectors between every two
  slices, averaged over seeds: a block of high values before and another after shows a change.
- **Change point range.** The rank stage's change point is the mean-shift boundary (after Kulkarni
  et al. 2015, on timelines standardised per slice across all words). Its range comes from a
  parametric bootstrap over the timeline: each redraw puts every slice's distance back around the
  before/after fit with noise of the slice's seed spread and of the timeline's own scatter around
  that fit, and the boundary is chosen again; the range covers the middle 90% of the boundaries.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from drift.compare.alignment import AnchorSpec, align_onto
from drift.compare.changepoint import (
    best_boundary,
    boundary_statistic,
    slice_centre_and_spread,
)
from drift.compare.neighbours import RunModels

#: Redraws of the timeline for the change point range, and the share of them the range covers.
REDRAWS = 1000
COVERAGE = 0.9


# ---------------------------------------------------------------------------- geometry


@dataclass
class WordGeometry:
    """A word's 2-D path among its neighbours and its slice-by-slice self-similarity."""

    word: str
    path: pd.DataFrame  # slice, x, y (slices that know the word, time order)
    neighbours: pd.DataFrame  # neighbour, slice, rank (its best), x, y
    explained: tuple[float, float]  # share of variance of the two components
    self_similarity: pd.DataFrame  # slices x slices, NaN where the word is missing
    seeds: int


def _rotations(models: RunModels, reference: str, anchors: AnchorSpec, trim: float) -> dict:
    rotations = {}
    for seed in models.seeds:
        ref = models.slices[(reference, seed)]
        for label in models.labels:
            if label == reference:
                rotations[(label, seed)] = np.eye(ref.vectors.shape[1], dtype=np.float32)
            else:
                rotations[(label, seed)] = align_onto(models.slices[(label, seed)], ref, anchors,
                                                      trim)
    return rotations


def _aligned(models: RunModels, rotations: dict, label: str, seed: int, word: str):
    vectors = models.slices[(label, seed)]
    row = vectors.index.get(word)
    if row is None:
        return None
    return vectors.vectors[row].astype(np.float64) @ rotations[(label, seed)]


def _pca_2d(points: np.ndarray) -> tuple[np.ndarray, tuple[float, float]]:
    """The first two principal component scores of ``points`` and their shares of variance.

    Signs are fixed so the result does not depend on the SVD routine: each component's largest
    loading is positive.
    """
    centred = points - points.mean(axis=0)
    _, singular, vt = np.linalg.svd(centred, full_matrices=False)
    vt = vt[:2]
    signs = np.sign(vt[np.arange(len(vt)), np.argmax(np.abs(vt), axis=1)])
    vt = vt * np.where(signs == 0, 1.0, signs)[:, None]
    scores = centred @ vt.T
    if scores.shape[1] < 2:
        scores = np.column_stack([scores, np.zeros(len(scores))])
    total = float((singular**2).sum()) or 1.0
    shares = (singular[:2] ** 2) / total
    shares = np.pad(shares, (0, 2 - len(shares)))
    return scores, (float(shares[0]), float(shares[1]))


def word_geometry(
    models: RunModels,
    words: Sequence[str],
    neighbours: pd.DataFrame,
    reference: str,
    anchors: AnchorSpec = None,
    trim: float = 0.0,
) -> dict[str, WordGeometry]:
    """The path and self-similarity of each of ``words`` (rotations fitted once for all, with
    the rank stage's anchors and anchor trim)."""
    rotations = _rotations(models, reference, anchors, trim)
    labels = models.labels
    out = {}
    for word in words:
        seed0 = models.seeds[0]
        path_labels, path_points = [], []
        for label in labels:
            vector = _aligned(models, rotations, label, seed0, word)
            if vector is not None:
                path_labels.append(label)
                path_points.append(vector)
        rows = neighbours[neighbours["word"] == word] if "word" in neighbours else neighbours
        best = (
            rows.sort_values(["rank", "slice"], key=lambda s: s.map(labels.index)
                             if s.name == "slice" else s, kind="stable")
            .drop_duplicates("neighbour")
        )
        near_names, near_labels, near_ranks, near_points = [], [], [], []
        for item in best.itertuples(index=False):
            vector = _aligned(models, rotations, str(item.slice), seed0, str(item.neighbour))
            if vector is not None:
                near_names.append(str(item.neighbour))
                near_labels.append(str(item.slice))
                near_ranks.append(int(item.rank))
                near_points.append(vector)
        if len(path_points) + len(near_points) >= 2:
            scores, explained = _pca_2d(np.vstack(path_points + near_points))
        else:
            scores, explained = np.zeros((len(path_points) + len(near_points), 2)), (0.0, 0.0)
        n_path = len(path_points)
        path = pd.DataFrame({"slice": path_labels, "x": scores[:n_path, 0],
                             "y": scores[:n_path, 1]})
        near = pd.DataFrame({"neighbour": near_names, "slice": near_labels,
                             "rank": np.asarray(near_ranks, dtype=np.int64),
                             "x": scores[n_path:, 0], "y": scores[n_path:, 1]})
        out[word] = WordGeometry(word, path, near, explained,
                                 _self_similarity(models, rotations, word), len(models.seeds))
    return out


def _self_similarity(models: RunModels, rotations: dict, word: str) -> pd.DataFrame:
    labels = models.labels
    per_seed = []
    for seed in models.seeds:
        matrix = np.full((len(labels), len(labels)), np.nan)
        vectors = [_aligned(models, rotations, label, seed, word) for label in labels]
        for i, a in enumerate(vectors):
            for j, b in enumerate(vectors):
                if a is not None and b is not None:
                    matrix[i, j] = float(a @ b / (np.linalg.norm(a) * np.linalg.norm(b)))
        per_seed.append(matrix)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        mean = np.nanmean(np.stack(per_seed), axis=0)
    return pd.DataFrame(mean, index=labels, columns=labels)


# ---------------------------------------------------------------------------- change point


@dataclass(frozen=True)
class ChangeRange:
    """A change point (first slice after the boundary) and the range of boundaries it could be."""

    point: str
    step: float
    low: str  # earliest plausible first-slice-after
    high: str  # latest plausible first-slice-after
    share: float  # share of redraws that chose the point itself
    redraws: int

    def boundary(self, labels: Sequence[str], after: str) -> tuple[str, str]:
        """The two slices either side of the boundary before ``after``."""
        at = list(labels).index(after)
        return labels[at - 1], labels[at]


def slice_standardiser(timeline: pd.DataFrame, labels: Sequence[str]):
    """Each slice's centre and spread of distance across all words, as the rank stage uses them
    to choose boundaries (:func:`drift.compare.changepoint.slice_centre_and_spread`)."""
    wide = timeline.pivot_table(index="word", columns="slice", values="distance")
    wide = wide.reindex(columns=list(labels))
    return slice_centre_and_spread(wide.to_numpy(dtype=float))


def change_range(
    distance: np.ndarray,
    distance_sd: np.ndarray,
    labels: Sequence[str],
    point: str,
    step: float,
    standardiser: tuple[np.ndarray, np.ndarray],
    *,
    reference: str | None = None,
    redraws: int = REDRAWS,
    seed: int = 0,
    coverage: float = COVERAGE,
) -> ChangeRange | None:
    """The range of the change point ``point`` by a parametric bootstrap over the timeline."""
    labels = list(labels)
    if point not in labels or labels.index(point) == 0:
        return None
    y = np.asarray(distance, dtype=float)
    sd = np.nan_to_num(np.asarray(distance_sd, dtype=float))
    observed = np.isfinite(y)
    at = labels.index(point)
    before, after = observed.copy(), observed.copy()
    before[at:] = False
    after[:at] = False
    if not before.any() or not after.any():
        return None
    fit = np.where(np.arange(len(y)) < at, y[before].mean(), y[after].mean())
    fixed = np.zeros(len(y), dtype=bool)
    if reference in labels:
        fixed[labels.index(reference)] = True
    free = observed & ~fixed
    residuals = (y - fit)[free]
    scatter = float(residuals.var(ddof=min(2, len(residuals) - 1))) if len(residuals) > 2 else 0.0
    noise_sd = np.sqrt(sd**2 + scatter)
    rng = np.random.default_rng(seed)
    draws = np.tile(np.where(observed, fit, np.nan), (redraws, 1))
    draws[:, free] += rng.normal(size=(redraws, int(free.sum()))) * noise_sd[free]
    draws[:, fixed & observed] = y[fixed & observed]
    centre, spread = standardiser
    best, usable = best_boundary(boundary_statistic((draws - centre) / spread))
    if not usable.any():
        return None
    chosen = best[usable] + 1
    tail = (1.0 - coverage) / 2.0
    low = int(min(np.quantile(chosen, tail, method="lower"), at))
    high = int(max(np.quantile(chosen, 1.0 - tail, method="higher"), at))
    return ChangeRange(point, float(step), labels[low], labels[high],
                       float((chosen == at).mean()), int(usable.sum()))
