"""Context change counted from the slices' own text, with a permutation null for each word.

The embedding measures (displacement, local change) compare two separately trained models, so
every word carries the optimisation noise of two trainings and of an alignment. This measure
counts instead: a word's contexts in a slice are its row of positive pointwise mutual
information (PPMI, with the context distribution raised to 0.75; Levy, Goldberg and Dagan 2015)
over the measured words, counted in the training window with word2vec's distance weights. Both
slices' rows are projected onto one basis, the top right singular vectors of the pooled pair's
PPMI matrix (truncated SVD of PPMI, as in Levy et al. 2015 and Hamilton, Leskovec and Jurafsky
2016), so they share their axes and need no alignment; the change is the cosine distance of
the two projected rows.

Its null is the word's own (a permutation test): the word's occurrences in the pooled lines of
the two slices are dealt at random into two halves in the proportion the slices hold them
(whole lines at a time: a line's occurrences of the word stay together), ``splits`` times, and
the word's log distance between the halves gives its own mean and spread. So a word seen 100
times in one slice and 800 in the other is compared with random halves of 100 and 800 of its own
occurrences, and the noise of its rarer side is measured, not modelled. The context
distribution of each half (the PPMI's column weights) comes from a random split of the pooled
lines at the slices' sizes. The pooled basis is the same for every split, so the null differs
from the real pair only in which occurrences fall where. The splits are drawn with a fixed
seed: the measure does not depend on training, and the same two slices give the same null
whatever seeds the models were trained with.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.optimize import brentq
from scipy.sparse.linalg import svds
from scipy.special import digamma, polygamma

from drift.errors import DriftError

#: Context distribution smoothing of PPMI (Levy, Goldberg and Dagan 2015).
CONTEXT_SMOOTHING = 0.75
#: Axes of the shared basis.
BASIS_DIM = 100
#: Random splits of the pooled lines for each word's own null.
DEFAULT_SPLITS = 20
#: At most this many tokens of each slice are counted (whole lines, drawn at random).
MAX_TOKENS = 3_000_000
#: Distance floor before logs.
FLOOR = 1e-6
#: Fewest lines per slice for random halves to say anything about a word's own noise.
MIN_LINES = 20


@dataclass(frozen=True)
class ContextChange:
    """Per measured word: the change, its permutation null and its noise z (NaN: unmeasured)."""

    distance: np.ndarray
    null_mean: np.ndarray  # mean log distance between random halves
    null_spread: np.ndarray  # standard deviation of that log distance, moderated
    splits: int

    @property
    def z(self) -> np.ndarray:
        """The word's log distance against its own permutation null, in null spreads."""
        with np.errstate(invalid="ignore", divide="ignore"):
            excess = np.log(np.maximum(self.distance, FLOOR)) - self.null_mean
            return excess / (np.maximum(self.null_spread, FLOOR) * np.sqrt(1 + 1 / self.splits))


def moderated_spread(spread: np.ndarray, splits: int, covariate: np.ndarray) -> np.ndarray:
    """Each word's permutation spread shrunk towards the spread of words like it (empirical
    Bayes moderation of variances, Smyth 2004, Statistical Applications in Genetics and
    Molecular Biology 3(1)): with ``d = splits - 1`` degrees of freedom each, the prior's
    variance follows a quadratic trend of ``log(variance)`` in ``covariate`` and its degrees
    of freedom ``d0`` come from the variance of the log variances beyond what sampling gives
    (``trigamma(d/2)``). Twenty splits estimate a spread only to about 16%; between distant
    periods, where a word's excess is many spreads, that error alone would reorder the words.
    """
    d = splits - 1
    log_var = np.log(np.maximum(spread, FLOOR) ** 2)
    ok = np.isfinite(log_var) & np.isfinite(covariate)
    if ok.sum() < 10 or d < 1:
        return spread
    design = np.column_stack([np.ones(ok.sum()), covariate[ok], covariate[ok] ** 2])
    coef, *_ = np.linalg.lstsq(design, log_var[ok], rcond=None)
    full = np.column_stack([np.ones(len(spread)), covariate, covariate**2])
    trend = full @ coef
    excess = float(np.var(log_var[ok] - trend[ok], ddof=3)) - float(polygamma(1, d / 2))
    prior_var = np.exp(trend - digamma(d / 2) + np.log(d / 2))
    if excess <= 0:
        return np.sqrt(prior_var)  # no variation beyond sampling: every word at the trend
    d0 = 2 * brentq(lambda y: float(polygamma(1, y)) - excess, 1e-8, 1e8)
    return np.sqrt((d0 * prior_var + d * spread**2) / (d0 + d))


@dataclass(frozen=True)
class CountedPairs:
    """Co-occurrences of the measured words in a pooled pair of slices.

    Each pair of positions is kept twice, once from each end (``words``: whose context it is),
    as one entry of ``keys`` (which distinct word pair it is: an entry of the CSR structure
    ``indptr``/``cols``, sorted by row then column), ``weights`` and ``lines`` (the pooled line
    it came from, the first slice's lines first); a half's symmetric matrix is then one weighted
    ``bincount`` over the positions, with no sorting. ``by_line`` holds each line's weight of
    every word's contexts (lines x words), from which a half's context distribution is summed.
    """

    keys: np.ndarray  # int32 per position pair and end
    weights: np.ndarray  # float64 per position pair and end
    lines: np.ndarray  # int32 per position pair and end
    words: np.ndarray  # int32 per position pair and end: the row it counts in
    indptr: np.ndarray  # CSR row pointers of the distinct word pairs
    cols: np.ndarray  # int32 per distinct word pair
    totals: np.ndarray  # float64 per distinct word pair: its weight over all lines
    by_line: sp.csr_matrix

    @property
    def n_words(self) -> int:
        return len(self.indptr) - 1

    def matrix(self, kept: np.ndarray | None = None) -> sp.csr_matrix:
        """The symmetric co-occurrence matrix of the position pairs marked in ``kept`` (all)."""
        if kept is None:
            return self._csr(self.totals.copy())
        return self._csr(np.bincount(self.keys, weights=self.weights * kept,
                                     minlength=len(self.cols)))

    def split(self, kept: np.ndarray) -> tuple[sp.csr_matrix, sp.csr_matrix]:
        """The matrices of the position pairs marked in ``kept`` and of the others."""
        data = np.bincount(self.keys, weights=self.weights * kept, minlength=len(self.cols))
        return self._csr(data), self._csr(np.maximum(self.totals - data, 0.0))

    def _csr(self, data: np.ndarray) -> sp.csr_matrix:
        # Pairs seen only in positions left out stay as stored zeros (``ppmi`` drops them):
        # eliminating them here would rewrite the shared ``cols`` and ``indptr`` in place.
        return sp.csr_matrix((data, self.cols, self.indptr), shape=(self.n_words, self.n_words))

    def in_lines(self, keep_lines: np.ndarray) -> sp.csr_matrix:
        """The co-occurrence matrix of the lines marked in ``keep_lines``."""
        return self.matrix(keep_lines[self.lines])

    def context_totals(self, keep_lines: np.ndarray) -> np.ndarray:
        """Each word's total weight as a context in the lines marked in ``keep_lines``."""
        return np.asarray(self.by_line.T @ keep_lines.astype(np.float64)).ravel()


def slice_token_ids(
    path: Path, index: pd.Index, max_tokens: int, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """A slice file's tokens as row numbers of ``index`` (-1: not measured) and its lines'
    lengths; at most about ``max_tokens`` tokens, whole lines drawn at random beyond that."""
    lines = [" ".join(line.split()) for line in path.read_text(encoding="utf-8").splitlines()]
    lines = [line for line in lines if line]
    lengths = np.fromiter((line.count(" ") + 1 for line in lines), dtype=np.int64,
                          count=len(lines))
    if lengths.sum() > max_tokens:
        order = np.random.default_rng(seed).permutation(len(lines))
        keep = np.sort(order[: int(np.searchsorted(np.cumsum(lengths[order]), max_tokens)) + 1])
        lines = [lines[i] for i in keep]
        lengths = lengths[keep]
    ids = index.get_indexer(" ".join(lines).split(" ")) if lines else np.empty(0)
    return np.asarray(ids, dtype=np.int32), lengths


def count_pairs(ids: np.ndarray, lengths: np.ndarray, n_words: int, window: int) -> CountedPairs:
    """Every pair of measured words at most ``window`` apart within a line, weighted as
    word2vec's shrinking window weighs it ((window - gap + 1) / window)."""
    line_of = np.repeat(np.arange(len(lengths), dtype=np.int32), lengths)
    firsts, seconds, weights, owners = [], [], [], []
    for gap in range(1, window + 1):
        a, b = ids[:-gap], ids[gap:]
        keep = (a >= 0) & (b >= 0) & (line_of[:-gap] == line_of[gap:])
        firsts.append(a[keep])
        seconds.append(b[keep])
        owners.append(line_of[:-gap][keep])
        weights.append(np.full(int(keep.sum()), (window - gap + 1) / window))
    # Sort the pairs once, in one direction; the distinct pairs (far fewer) give both.
    firsts, seconds = np.concatenate(firsts), np.concatenate(seconds)
    distinct, which = np.unique(firsts.astype(np.int64) * n_words + seconds, return_inverse=True)
    reverse = (distinct % n_words) * n_words + distinct // n_words
    both = np.union1d(distinct, reverse)  # the symmetric structure's pairs, sorted
    which = which.ravel()
    keys = np.concatenate([np.searchsorted(both, distinct)[which],
                           np.searchsorted(both, reverse)[which]]).astype(np.int32)
    rows = np.concatenate([firsts, seconds]).astype(np.int32)  # both ends of every pair
    weights = np.concatenate(weights + weights)
    lines = np.concatenate(owners + owners)
    per_row = np.bincount(both // n_words, minlength=n_words)
    by_line = sp.csr_matrix((weights, (lines, rows)),
                            shape=(len(lengths), n_words))  # duplicates are summed
    totals = np.bincount(keys, weights=weights, minlength=len(both))
    return CountedPairs(keys, weights, lines, rows, np.concatenate([[0], np.cumsum(per_row)]),
                        (both % n_words).astype(np.int32), totals, by_line)


def ppmi(
    counts: sp.csr_matrix,
    context_totals: np.ndarray | None = None,
    smoothing: float = CONTEXT_SMOOTHING,
) -> sp.csr_matrix:
    """Positive PMI of a co-occurrence matrix, the context distribution (the matrix's column
    sums unless ``context_totals`` are given) raised to ``smoothing``. PMI is
    ``log(count / (row total * P(context)))``: the grand total cancels."""
    if float(counts.sum()) <= 0:
        return sp.csr_matrix(counts.shape)
    if context_totals is None:
        context_totals = np.asarray(counts.sum(axis=0)).ravel()
    col = np.asarray(context_totals, dtype=float) ** smoothing
    col = col / col.sum()
    row = np.asarray(counts.sum(axis=1)).ravel()
    coo = counts.tocoo()
    with np.errstate(divide="ignore", invalid="ignore"):  # stored zeros: dropped below
        pmi = np.log(coo.data) - np.log(row[coo.row]) - np.log(col[coo.col])
    keep = np.isfinite(pmi) & (pmi > 0)  # a context absent from the given totals: no PMI
    return sp.csr_matrix((pmi[keep], (coo.row[keep], coo.col[keep])), shape=counts.shape)


def shared_basis(pooled: sp.csr_matrix, dim: int = BASIS_DIM) -> np.ndarray:
    """The top ``dim`` right singular vectors of the pooled PPMI matrix (words x dim)."""
    dim = max(1, min(dim, min(pooled.shape) - 1))
    _, _, vt = svds(pooled.astype(np.float64), k=dim, random_state=0)
    return np.ascontiguousarray(vt.T)


def projected_rows(
    counts: sp.csr_matrix, basis: np.ndarray, context_totals: np.ndarray | None = None
) -> np.ndarray:
    """Each word's PPMI row in ``basis`` coordinates, unit length (zero rows stay zero)."""
    rows = ppmi(counts, context_totals) @ basis
    norms = np.linalg.norm(rows, axis=1, keepdims=True)
    return rows / np.where(norms > 0, norms, 1.0)


def row_distance(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cosine distance row by row (NaN where either row is empty)."""
    similarity = np.sum(a * b, axis=1)
    empty = ~(np.any(a != 0, axis=1) & np.any(b != 0, axis=1))
    return np.where(empty, np.nan, 1.0 - similarity)


def context_change(
    slice_from: Path,
    slice_to: Path,
    words: Sequence[str],
    count_from: np.ndarray,
    count_to: np.ndarray,
    *,
    window: int = 5,
    splits: int = DEFAULT_SPLITS,
    seed: int = 0,
    max_tokens: int = MAX_TOKENS,
) -> ContextChange:
    """Each word's context change between two slice files and its own permutation null."""
    index = pd.Index(list(words))
    ids_from, lengths_from = slice_token_ids(slice_from, index, max_tokens, seed)
    ids_to, lengths_to = slice_token_ids(slice_to, index, max_tokens, seed + 1)
    if min(len(lengths_from), len(lengths_to)) < MIN_LINES:
        raise DriftError(
            f"a slice of {min(len(lengths_from), len(lengths_to))} lines is too few to split at "
            f"random (at least {MIN_LINES} are needed)"
        )
    counted = count_pairs(np.concatenate([ids_from, ids_to]),
                          np.concatenate([lengths_from, lengths_to]), len(index), window)
    in_from = np.zeros(len(lengths_from) + len(lengths_to), dtype=bool)
    in_from[: len(lengths_from)] = True
    basis = shared_basis(ppmi(counted.matrix()))
    distance = row_distance(projected_rows(counted.in_lines(in_from), basis),
                            projected_rows(counted.in_lines(~in_from), basis))
    occurrences_from = np.bincount(ids_from[ids_from >= 0], minlength=len(index))
    occurrences_to = np.bincount(ids_to[ids_to >= 0], minlength=len(index))
    share = occurrences_from / np.maximum(occurrences_from + occurrences_to, 1)
    rng = np.random.default_rng(seed)
    logs = np.empty((splits, len(index)))
    for split in range(splits):
        between = own_share_distance(counted, basis, share, in_from, rng)
        with np.errstate(invalid="ignore"):
            logs[split] = np.log(np.maximum(between, FLOOR))
    pooled = np.log(np.maximum(np.asarray(count_from, float) + np.asarray(count_to, float), 1))
    # A word found in only a few lines can have all of them dealt to one half: that split says
    # nothing about it, and a word left without most of its splits has no null (NaN).
    usable = np.isfinite(logs).sum(axis=0) >= splits / 2
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns of unusable words
        mean = np.where(usable, np.nanmean(logs, axis=0), np.nan)
        raw_spread = np.where(usable, np.nanstd(logs, axis=0, ddof=1), np.nan)
    spread = moderated_spread(raw_spread, splits, pooled)
    return ContextChange(distance, mean, spread, splits)


def own_share_distance(
    counted: CountedPairs,
    basis: np.ndarray,
    share: np.ndarray,
    in_from: np.ndarray,
    rng: np.random.Generator,
) -> np.ndarray:
    """One random split for every word's own null: each word's row takes each line with
    probability ``share`` (its share of occurrences in the first slice), the context
    distributions come from the lines split at random at the slices' sizes (``in_from``)."""
    n_lines = len(in_from)
    half = np.zeros(n_lines, dtype=bool)
    half[rng.permutation(n_lines)[: int(in_from.sum())]] = True
    # A uniform draw per (line, word): line draws plus word offsets, wrapping at 2**32, are
    # independent between the lines of any one word.
    line_draw = rng.integers(0, 2**32, size=n_lines, dtype=np.uint32)
    word_offset = rng.integers(0, 2**32, size=counted.n_words, dtype=np.uint32)
    bar = np.minimum(np.floor(share * 2.0**32), 2**32 - 1).astype(np.uint32)
    first = (line_draw[counted.lines] + word_offset[counted.words]) < bar[counted.words]
    counts_first, counts_second = counted.split(first)
    return row_distance(projected_rows(counts_first, basis, counted.context_totals(half)),
                        projected_rows(counts_second, basis, counted.context_totals(~half)))
