"""Per-word change measures between two slices, and the blocked top-k neighbour search they share.

All functions take prepared vectors (unit length, see
:func:`drift.compare.alignment.prepare_vectors`), so cosine similarity is a dot product.

- Displacement (global): the cosine distance between a word's aligned vectors.
- Turnover: the Jaccard distance between the word's top-k neighbour sets in the two slices;
  rotation invariant, so it needs no alignment (after Gonen et al. 2020).
- Local neighbourhood change: the cosine distance between the word's second-order similarity
  vectors, its cosine similarity to each word of the union of both neighbour sets, measured in
  each slice (Hamilton, Leskovec and Jurafsky 2016, EMNLP).

Neighbours are found block by block: one block of query rows times all candidates with a matrix
product, then ``np.argpartition`` per row, so memory stays bounded by the block and never holds
a full vocabulary x vocabulary matrix.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

#: Upper bound on the similarity block held at once (float32 query rows x candidates).
BLOCK_BYTES = 64 * 2**20
#: Rows of words handled at once by the gather-based measures (local change, consensus).
GATHER_ROWS = 2048


@dataclass(frozen=True)
class Neighbours:
    """Top-k neighbours per query row: candidate row numbers and similarities, best first.

    A row of ``-1`` indices (and NaN similarities) marks a query that was not searched.
    """

    indices: np.ndarray  # int32, n_queries x k
    similarities: np.ndarray  # float32, n_queries x k

    @property
    def k(self) -> int:
        return int(self.indices.shape[1])

    @property
    def searched(self) -> np.ndarray:
        """True for rows that hold neighbours."""
        return self.indices[:, 0] >= 0


def block_rows_for(n_candidates: int, block_bytes: int = BLOCK_BYTES) -> int:
    """How many query rows fit in one similarity block of at most ``block_bytes``."""
    return max(1, int(block_bytes // (4 * max(n_candidates, 1))))


def top_k_neighbours(
    queries: np.ndarray,
    candidates: np.ndarray,
    k: int,
    exclude: np.ndarray | None = None,
    block_bytes: int = BLOCK_BYTES,
) -> Neighbours:
    """The ``k`` candidates most similar (dot product) to each query row, best first.

    ``exclude[i]`` is a candidate row that query ``i`` may not return (the word itself), or -1.
    """
    queries = np.ascontiguousarray(queries, dtype=np.float32)
    n_queries, n_candidates = len(queries), len(candidates)
    usable = n_candidates - (1 if exclude is not None and np.any(exclude >= 0) else 0)
    if not 0 < k <= usable:
        raise ValueError(f"k={k} needs 1..{usable} candidates")
    candidates_t = np.ascontiguousarray(np.asarray(candidates, dtype=np.float32).T)
    indices = np.empty((n_queries, k), dtype=np.int32)
    similarities = np.empty((n_queries, k), dtype=np.float32)
    step = block_rows_for(n_candidates, block_bytes)
    cut = n_candidates - k
    for start in range(0, n_queries, step):
        stop = min(start + step, n_queries)
        block = queries[start:stop] @ candidates_t
        if exclude is not None:
            own = exclude[start:stop]
            has_own = np.flatnonzero(own >= 0)
            block[has_own, own[has_own]] = -np.inf
        best = np.argpartition(block, cut, axis=1)[:, cut:]
        best_sims = np.take_along_axis(block, best, axis=1)
        order = np.argsort(-best_sims, axis=1, kind="stable")
        indices[start:stop] = np.take_along_axis(best, order, axis=1)
        similarities[start:stop] = np.take_along_axis(best_sims, order, axis=1)
    return Neighbours(indices, similarities)


def cosine_distance_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``1 - cos(a[i], b[i])`` for every row pair (float64; NaN where a row is all zero)."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    norms = np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 1.0 - np.einsum("ij,ij->i", a, b) / norms


def overlap_counts(a: np.ndarray, b: np.ndarray, rows: int = 4096) -> np.ndarray:
    """How many entries of row ``a[i]`` occur in row ``b[i]`` (rows hold distinct values)."""
    out = np.empty(len(a), dtype=np.int64)
    for start in range(0, len(a), rows):
        stop = start + rows
        out[start:stop] = (a[start:stop, :, None] == b[start:stop, None, :]).sum(axis=(1, 2))
    return out


def jaccard_distance_rows(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Jaccard distance ``1 - |A & B| / |A | B|`` between the sets in rows ``a[i]`` and ``b[i]``.

    Each row holds distinct non-negative ids; a row that starts with -1 (not searched) gives NaN.
    """
    shared = overlap_counts(a, b).astype(np.float64)
    union = a.shape[1] + b.shape[1] - shared
    out = 1.0 - shared / union
    out[(a[:, 0] < 0) | (b[:, 0] < 0)] = np.nan
    return out


def union_rows(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row's union of ``a[i]`` and ``b[i]`` as sorted ids, with a mask of the valid entries.

    Duplicates (ids in both rows) appear once; the mask is False on the repeated copies.
    """
    joined = np.sort(np.concatenate([a, b], axis=1), axis=1)
    valid = np.ones(joined.shape, dtype=bool)
    valid[:, 1:] = joined[:, 1:] != joined[:, :-1]
    return joined, valid


def gathered_similarities(
    word_vectors: np.ndarray, candidates: np.ndarray, ids: np.ndarray
) -> np.ndarray:
    """``word_vectors[i] . candidates[ids[i, j]]`` for every i, j (computed in the vectors'
    float32, returned as float64)."""
    out = np.empty(ids.shape, dtype=np.float64)
    for start in range(0, len(ids), GATHER_ROWS):
        stop = start + GATHER_ROWS
        near = candidates[ids[start:stop]]
        out[start:stop] = np.einsum("id,ijd->ij", word_vectors[start:stop], near)
    return out


def local_change_rows(
    vectors_a: np.ndarray,
    candidates_a: np.ndarray,
    neighbours_a: np.ndarray,
    vectors_b: np.ndarray,
    candidates_b: np.ndarray,
    neighbours_b: np.ndarray,
) -> np.ndarray:
    """Local neighbourhood change per word (Hamilton, Leskovec and Jurafsky 2016, EMNLP).

    Row ``i``: the word's vectors in slices a and b, its top-k neighbour ids (rows of the
    candidate matrices, which hold the same words in the same order in both slices). The
    second-order vector in each slice holds the word's similarity to every word of the union of
    both neighbour sets; the result is the cosine distance between the two second-order vectors.
    """
    ids, valid = union_rows(neighbours_a, neighbours_b)
    first = gathered_similarities(vectors_a, candidates_a, ids) * valid
    second = gathered_similarities(vectors_b, candidates_b, ids) * valid
    out = cosine_distance_rows(first, second)
    out[(neighbours_a[:, 0] < 0) | (neighbours_b[:, 0] < 0)] = np.nan
    return out


def consensus_neighbours(
    word_vectors: list[np.ndarray],
    candidates: list[np.ndarray],
    neighbours: list[np.ndarray],
    k: int,
) -> Neighbours:
    """Top-k neighbours by similarity averaged over seeds, from the union of each seed's lists.

    Lists ``[seed]`` hold one seed's word vectors (rows = words), candidate matrix and top-k ids.
    Each candidate in any seed's list gets its exact similarity in every seed, averaged; the k
    best of the union are returned. With one seed this is that seed's own list.
    """
    if len(neighbours) == 1:
        ids = neighbours[0][:, :k]
        sims = gathered_similarities(word_vectors[0], candidates[0], np.maximum(ids, 0))
        sims[ids < 0] = np.nan
        return Neighbours(ids.astype(np.int32), sims.astype(np.float32))
    joined = np.sort(np.concatenate(neighbours, axis=1), axis=1)
    valid = np.ones(joined.shape, dtype=bool)
    valid[:, 1:] = joined[:, 1:] != joined[:, :-1]
    valid &= joined >= 0
    safe = np.maximum(joined, 0)
    mean = sum(
        gathered_similarities(v, c, safe) for v, c in zip(word_vectors, candidates, strict=True)
    ) / len(neighbours)
    mean[~valid] = -np.inf
    order = np.argsort(-mean, axis=1, kind="stable")[:, :k]
    ids = np.take_along_axis(joined, order, axis=1)
    sims = np.take_along_axis(mean, order, axis=1)
    missing = ~np.isfinite(sims)
    ids[missing] = -1
    sims[missing] = np.nan
    return Neighbours(ids.astype(np.int32), sims.astype(np.float32))


def mean_and_spread(per_seed: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Mean over seeds and the standard deviation between seeds (ddof 1; NaN with one seed).

    NaN entries (a word absent from a slice) are left out; all-NaN positions stay NaN.
    """
    stacked = np.stack([np.asarray(v, dtype=np.float64) for v in per_seed])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        mean = np.nanmean(stacked, axis=0)
        if len(per_seed) < 2:
            return mean, np.full(mean.shape, np.nan)
        spread = np.nanstd(stacked, axis=0, ddof=1)
    return mean, spread
