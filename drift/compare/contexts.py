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

Its null is the word's own (a permutation test): the pooled lines of the two slices are split
at random into two halves of the slices' sizes, ``splits`` times, and the word's log distance
between the halves gives its own mean and spread. The pooled basis is the same for every split,
so the null differs from the real pair only in which lines fall where. The splits are drawn
with a fixed seed: the measure does not depend on training, and the same two slices give the
same null whatever seeds the models were trained with. A word whose count
differs between the slices is expected to move further than between random halves, where its
occurrences fall in proportion to the halves' sizes (sampling variances add as one over the
count): its null mean is raised by the log of ``(1/n_from + 1/n_to) / (1/(N s) + 1/(N (1 -
s)))``, with ``N = n_from + n_to`` and ``s`` the first slice's share of the counted tokens (for
halves of equal size, ``N^2 / (4 n_from n_to)``).
"""

from __future__ import annotations

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
    imbalance: np.ndarray  # log of the count-imbalance factor
    splits: int

    @property
    def z(self) -> np.ndarray:
        """The word's log distance against its own permutation null, in null spreads."""
        with np.errstate(invalid="ignore", divide="ignore"):
            excess = np.log(np.maximum(self.distance, FLOOR)) - self.null_mean - self.imbalance
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

    Each pair of positions is one entry of ``keys`` (which distinct word pair it is: an entry of
    the CSR structure ``indptr``/``cols``, sorted by row then column), ``weights`` and ``lines``
    (the pooled line it came from, the first slice's lines first); a split's matrix is then one
    weighted ``bincount`` over the positions, with no sorting.
    """

    keys: np.ndarray  # int32 per position pair
    weights: np.ndarray  # float32 per position pair
    lines: np.ndarray  # int32 per position pair
    indptr: np.ndarray  # CSR row pointers of the distinct word pairs
    cols: np.ndarray  # int32 per distinct word pair
    n_words: int

    def matrix(self, keep_lines: np.ndarray | None = None) -> sp.csr_matrix:
        """The symmetric co-occurrence matrix of the lines marked in ``keep_lines`` (all)."""
        weights = self.weights if keep_lines is None else self.weights * keep_lines[self.lines]
        data = np.bincount(self.keys, weights=weights, minlength=len(self.cols))
        counted = sp.csr_matrix((data, self.cols, self.indptr),
                                shape=(self.n_words, self.n_words))
        symmetric = (counted + counted.T).tocsr()
        symmetric.eliminate_zeros()  # pairs seen only in lines left out
        return symmetric


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
    codes, weights, owners = [], [], []
    for gap in range(1, window + 1):
        a, b = ids[:-gap], ids[gap:]
        keep = (a >= 0) & (b >= 0) & (line_of[:-gap] == line_of[gap:])
        codes.append(a[keep].astype(np.int64) * n_words + b[keep])
        owners.append(line_of[:-gap][keep])
        weights.append(np.full(int(keep.sum()), (window - gap + 1) / window, dtype=np.float32))
    distinct, keys = np.unique(np.concatenate(codes), return_inverse=True)
    per_row = np.bincount(distinct // n_words, minlength=n_words)
    return CountedPairs(keys.astype(np.int32).ravel(), np.concatenate(weights),
                        np.concatenate(owners), np.concatenate([[0], np.cumsum(per_row)]),
                        (distinct % n_words).astype(np.int32), n_words)


def ppmi(counts: sp.csr_matrix, smoothing: float = CONTEXT_SMOOTHING) -> sp.csr_matrix:
    """Positive PMI of a co-occurrence matrix, the context distribution raised to
    ``smoothing``."""
    total = float(counts.sum())
    if total <= 0:
        return sp.csr_matrix(counts.shape)
    row = np.asarray(counts.sum(axis=1)).ravel() / total
    col = np.asarray(counts.sum(axis=0)).ravel() ** smoothing
    col = col / col.sum()
    coo = counts.tocoo()
    pmi = np.log(coo.data / total) - np.log(row[coo.row]) - np.log(col[coo.col])
    keep = pmi > 0
    return sp.csr_matrix((pmi[keep], (coo.row[keep], coo.col[keep])), shape=counts.shape)


def shared_basis(pooled: sp.csr_matrix, dim: int = BASIS_DIM) -> np.ndarray:
    """The top ``dim`` right singular vectors of the pooled PPMI matrix (words x dim)."""
    dim = max(1, min(dim, min(pooled.shape) - 1))
    _, _, vt = svds(pooled.astype(np.float64), k=dim, random_state=0)
    return np.ascontiguousarray(vt.T)


def projected_rows(counts: sp.csr_matrix, basis: np.ndarray) -> np.ndarray:
    """Each word's PPMI row in ``basis`` coordinates, unit length (zero rows stay zero)."""
    rows = ppmi(counts) @ basis
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
    distance = row_distance(projected_rows(counted.matrix(in_from), basis),
                            projected_rows(counted.matrix(~in_from), basis))
    rng = np.random.default_rng(seed)
    logs = np.empty((splits, len(index)))
    for split in range(splits):
        half = np.zeros_like(in_from)
        half[rng.permutation(len(in_from))[: len(lengths_from)]] = True
        between = row_distance(projected_rows(counted.matrix(half), basis),
                               projected_rows(counted.matrix(~half), basis))
        logs[split] = np.log(np.maximum(between, FLOOR))
    tokens_from, tokens_to = int(lengths_from.sum()), int(lengths_to.sum())
    share = tokens_from / max(tokens_from + tokens_to, 1)
    pooled = np.log(np.maximum(np.asarray(count_from, float) + np.asarray(count_to, float), 1))
    spread = moderated_spread(logs.std(axis=0, ddof=1), splits, pooled)
    return ContextChange(distance, logs.mean(axis=0), spread,
                         count_imbalance(count_from, count_to, share), splits)


def count_imbalance(count_from: np.ndarray, count_to: np.ndarray, share: float) -> np.ndarray:
    """Log of how much more sampling noise the word's counts in the two slices carry than
    random halves of shares ``share`` and ``1 - share`` of the pooled lines would give it.

    >>> float(count_imbalance(np.array([100.0]), np.array([100.0]), 0.5)[0])
    0.0
    >>> round(float(count_imbalance(np.array([200.0]), np.array([100.0]), 0.5)[0]), 4)
    0.1178
    """
    a = np.maximum(np.asarray(count_from, dtype=float), 1.0)
    b = np.maximum(np.asarray(count_to, dtype=float), 1.0)
    pooled = a + b
    share = min(max(share, 1e-6), 1 - 1e-6)
    halves = 1 / (pooled * share) + 1 / (pooled * (1 - share))
    return np.log((1 / a + 1 / b) / halves)
