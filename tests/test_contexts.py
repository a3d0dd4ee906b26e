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
    count_imbalance,
    count_pairs,
    moderated_spread,
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
    assert counted.matrix(only_first).toarray()[0, 1] == pytest.approx(1.0 + 2 / 3)


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


def test_equal_counts_need_no_imbalance_correction_and_unequal_ones_do():
    same = count_imbalance(np.array([50.0, 400.0]), np.array([50.0, 400.0]), 0.5)
    assert np.allclose(same, 0.0)
    # halves of shares 0.3 and 0.7 expect counts in that proportion: no correction then either
    assert count_imbalance(np.array([30.0]), np.array([70.0]), 0.3)[0] == pytest.approx(0.0)
    assert count_imbalance(np.array([100.0]), np.array([25.0]), 0.5)[0] > 0.4


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
    assert len(words) > 1000 and np.isfinite(z).all()
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


def test_too_few_lines_to_split_is_said_plainly(tmp_path):
    first = [["a", "b", "c"]] * 5
    with pytest.raises(DriftError, match="too few to split"):
        context_change(_write(tmp_path / "a.txt", first), _write(tmp_path / "b.txt", first),
                       ["a", "b", "c"], np.array([5, 5, 5]), np.array([5, 5, 5]))
