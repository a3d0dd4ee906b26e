"""The context change counted from the text (drift.compare.contexts).

References outside the project: PPMI as Levy, Goldberg and Dagan (2015, TACL) define it, with
the context distribution raised to 0.75; numpy's dense SVD for the shared basis; word2vec's
shrinking window, which weighs a context ``gap`` tokens away by ``(window - gap + 1) / window``
(Mikolov et al. 2013; Levy et al. 2015 describe the weights); Smyth's (2004) moderated
variances, checked by simulation from his model; and gensim's bundled real English text for the
null's calibration and for an injected change (Shoemark et al. 2019 protocol).
"""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from drift.compare.contexts import (
    context_change,
    count_pairs,
    moderated_spread,
    own_share_distance,
    ppmi,
    shared_basis,
)
from drift.errors import DriftError


def test_pairs_are_counted_as_word2vecs_shrinking_window_weighs_them():
    lines = [["a", "b", "x", "a"], ["b", "a"]]
    words = ["a", "b"]
    window = 3
    expected = np.zeros((2, 2))
    for line in lines:  # brute force over every pair of positions in a line
        for i, left in enumerate(line):
            for j in range(i + 1, min(len(line), i + window + 1)):
                right = line[j]
                if left in words and right in words:
                    weight = (window - (j - i) + 1) / window
                    expected[words.index(left), words.index(right)] += weight
                    expected[words.index(right), words.index(left)] += weight
    ids = np.array([0, 1, -1, 0, 1, 0], dtype=np.int32)  # the two lines as rows of `words`
    counted = count_pairs(ids, np.array([4, 2]), len(words), window)
    assert np.allclose(counted.matrix().toarray(), expected)
    only_first = np.array([True, False])
    # a-b at gap 1 (weight 1) and b-a at gap 2 (weight 2/3) in the first line only
    assert counted.in_lines(only_first).toarray()[0, 1] == pytest.approx(1.0 + 2 / 3)
    # each word's weight as a context, summed over the kept lines
    assert np.allclose(counted.context_totals(only_first),
                       counted.in_lines(only_first).toarray().sum(axis=0))


def test_ppmi_follows_its_published_definition():
    rng = np.random.default_rng(0)
    dense = rng.integers(0, 6, size=(7, 7)).astype(float)
    dense = dense + dense.T
    # PMI(w, c) = log P(w, c) / (P(w) P_0.75(c)), P_0.75(c) = n(c)^0.75 / sum n(c')^0.75;
    # the grand total cancels: n(w, c) * sum n(c')^0.75 / (n(w) * n(c)^0.75)
    smoothed = dense.sum(axis=0) ** 0.75
    with np.errstate(divide="ignore"):
        pmi = np.log(dense * smoothed.sum() / (dense.sum(axis=1, keepdims=True) * smoothed))
    expected = np.where(dense > 0, np.maximum(pmi, 0), 0)
    assert np.allclose(ppmi(sp.csr_matrix(dense)).toarray(), expected)


def test_the_shared_basis_spans_numpys_leading_singular_subspace():
    rng = np.random.default_rng(1)
    matrix = rng.random((40, 40)) * (rng.random((40, 40)) < 0.3)
    basis = shared_basis(sp.csr_matrix(matrix), dim=5)
    _, _, vt = np.linalg.svd(matrix)
    reference = vt[:5].T
    assert np.allclose(basis @ basis.T, reference @ reference.T, atol=1e-8)


def test_ppmi_takes_the_context_distribution_it_is_given():
    rng = np.random.default_rng(3)
    dense = rng.integers(0, 6, size=(6, 6)).astype(float)
    dense = dense + dense.T
    totals = rng.integers(1, 50, size=6).astype(float)
    smoothed = totals**0.75
    with np.errstate(divide="ignore"):
        pmi = np.log(dense * smoothed.sum() / (dense.sum(axis=1, keepdims=True) * smoothed))
    expected = np.where(dense > 0, np.maximum(pmi, 0), 0)
    assert np.allclose(ppmi(sp.csr_matrix(dense), totals).toarray(), expected)


def test_each_words_own_null_deals_its_lines_in_its_own_proportion():
    # 400 lines, each holding every word once: a word's row in a half counts the lines dealt to
    # it, so over many splits the first half's share of its row is its share of occurrences.
    n_lines, words = 400, 3
    ids = np.tile(np.arange(words, dtype=np.int32), n_lines)
    counted = count_pairs(ids, np.full(n_lines, words), words, 2)
    share = np.array([0.1, 0.5, 0.8])
    rng = np.random.default_rng(4)
    got = []
    for _ in range(50):
        first = (rng.integers(0, 2**32, n_lines, dtype=np.uint32)[counted.lines]
                 + rng.integers(0, 2**32, words, dtype=np.uint32)[counted.words]
                 ) < np.floor(share * 2.0**32).astype(np.uint32)[counted.words]
        rows = np.asarray(counted.matrix(first).sum(axis=1)).ravel()
        got.append(rows / np.asarray(counted.matrix().sum(axis=1)).ravel())
    # binomial: sd of a share over 400 lines <= 0.025, of the mean of 50 splits <= 0.004
    assert np.allclose(np.mean(got, axis=0), share, atol=0.015)
    in_from = np.arange(n_lines) < 100
    basis = np.eye(words)
    distance = own_share_distance(counted, basis, share, in_from, np.random.default_rng(5))
    assert distance.shape == (words,) and np.isfinite(distance).all()


def test_moderated_spreads_are_closer_to_the_truth_than_the_raw_ones():
    # Smyth's (2004) model: true variances scaled inverse chi-square with d0 degrees of freedom
    # around a trend, each estimated from d = 19 degrees of freedom.
    rng = np.random.default_rng(2)
    n, d, d0 = 3000, 19, 12
    covariate = rng.uniform(3, 9, n)
    prior = np.exp(-3.5 + 0.1 * covariate)
    true_var = prior * d0 / rng.chisquare(d0, n)
    raw = np.sqrt(true_var * rng.chisquare(d, n) / d)
    moderated = moderated_spread(raw, d + 1, covariate)
    error_raw = np.mean((np.log(raw) - 0.5 * np.log(true_var)) ** 2)
    error_moderated = np.mean((np.log(moderated) - 0.5 * np.log(true_var)) ** 2)
    assert error_moderated < 0.8 * error_raw


def _write(path: Path, documents: list[list[str]]) -> Path:
    path.write_text("\n".join(" ".join(d) for d in documents) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def reference_text():
    from drift.validate.injection import reference_documents

    return reference_documents()  # gensim's bundled Wikipedia excerpt and Lee corpus


def _halves(documents, seed):
    rng = np.random.default_rng(seed)
    side = rng.random(len(documents)) < 0.5
    first = [d for d, s in zip(documents, side, strict=True) if s]
    last = [d for d, s in zip(documents, side, strict=True) if not s]
    return first, last


def _measured(tmp_path, first, last, min_count=20):
    count_first = Counter(t for d in first for t in d)
    count_last = Counter(t for d in last for t in d)
    words = sorted(w for w in count_first
                   if count_first[w] >= min_count and count_last[w] >= min_count)
    change = context_change(
        _write(tmp_path / "first.txt", first), _write(tmp_path / "last.txt", last), words,
        np.array([count_first[w] for w in words]), np.array([count_last[w] for w in words]),
    )
    return words, change


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_on_real_text_split_at_random_the_permutation_z_is_calibrated(
    tmp_path, reference_text, seed
):
    first, last = _halves(reference_text, seed)
    words, change = _measured(tmp_path, first, last)
    z = change.z
    # A word found in only a few lines (one long article) can lack a null: at most 1% do.
    assert len(words) > 1000 and np.isfinite(z).mean() > 0.99
    z = z[np.isfinite(z)]
    # Under the null about 5% of words pass z = 1.645 (p = 0.05). Bound: the binomial 99.9%
    # upper limit for about 1,450 words, 0.05 + 3.1 * sqrt(0.05 * 0.95 / 1450) = 0.068 (words
    # are treated as independent, which they are only roughly).
    assert (z > 1.645).mean() <= 0.068
    assert 0.85 < z.std() < 1.2


@pytest.mark.parametrize("seed", [1, 3])
def test_on_real_text_a_word_given_a_second_sense_stands_out(tmp_path, reference_text, seed):
    # Shoemark et al. (2019): in the second half, 80% of a donor word's occurrences become the
    # target, which gains the donor's contexts; nothing else changes.
    first, last = _halves(reference_text, seed)
    totals = Counter(t for d in reference_text for t in d)
    ranked = [w for w, _ in totals.most_common()]
    target, donor = ranked[200], ranked[60]
    rng = np.random.default_rng(seed)
    last = [[target if t == donor and rng.random() < 0.8 else t for t in d] for d in last]
    words, change = _measured(tmp_path, first, last)
    z = change.z
    order = [words[i] for i in np.argsort(-z)]
    assert order.index(target) < 30  # of about 1,450 words
    assert z[words.index(donor)] < 2.0  # the donor lost occurrences, not contexts


def test_on_real_text_words_that_only_lost_occurrences_stay_within_their_null(
    tmp_path, reference_text
):
    # A frequency-only change (Shoemark et al. 2019's control): in the second half, 80% of the
    # occurrences of 20 frequent words are deleted; their contexts do not change, only their
    # counts, so their own null, dealt at their new proportion, must hold them.
    first, last = _halves(reference_text, 5)
    totals = Counter(t for d in reference_text for t in d)
    thinned = [w for w, _ in totals.most_common()][40:240:10]
    rng = np.random.default_rng(5)
    last = [[t for t in d if t not in thinned or rng.random() >= 0.8] for d in last]
    words, change = _measured(tmp_path, first, last)
    z = np.array([change.z[words.index(w)] for w in thinned if w in words])
    assert len(z) >= 15  # the rest fell below the count measured
    # Under the null each passes z = 1.645 with probability 0.05; 5 or more of at most 20 has
    # binomial probability <= 0.003 (scipy.stats.binom.sf(4, 20, 0.05)). Their mean is within 3
    # standard errors of 0 (sd 1 each).
    assert (z > 1.645).sum() <= 4
    assert abs(z.mean()) < 3 / np.sqrt(len(z))


def test_too_few_lines_to_split_is_said_plainly(tmp_path):
    first = [["a", "b", "c"]] * 5
    with pytest.raises(DriftError, match="too few to split"):
        context_change(_write(tmp_path / "a.txt", first), _write(tmp_path / "b.txt", first),
                       ["a", "b", "c"], np.array([5, 5, 5]), np.array([5, 5, 5]))
