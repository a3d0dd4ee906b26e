"""Measures: blocked top-k neighbours, cosine displacement, Jaccard turnover, local change."""

from __future__ import annotations

import numpy as np
import pytest
from gensim.models import Word2Vec
from hypothesis import given, settings
from hypothesis import strategies as st
from rankrun_builder import lee_documents
from scipy.spatial.distance import cosine, jaccard
from scipy.stats import ortho_group

from drift.compare.alignment import prepare_vectors, unit_rows
from drift.compare.measures import (
    block_rows_for,
    consensus_neighbours,
    cosine_distance_rows,
    jaccard_distance_rows,
    local_change_rows,
    mean_and_spread,
    top_k_neighbours,
    union_rows,
)


@pytest.fixture(scope="module")
def lee_model():
    """A tiny skip-gram model of gensim's bundled Lee background corpus (real text)."""
    return Word2Vec(
        lee_documents(), vector_size=24, min_count=5, sg=1, epochs=5, workers=1, seed=1
    ).wv


def _brute_force_top_k(queries, candidates, k, exclude=None):
    full = queries @ candidates.T
    if exclude is not None:
        for i, j in enumerate(exclude):
            if j >= 0:
                full[i, j] = -np.inf
    order = np.argsort(-full, axis=1, kind="stable")[:, :k]
    return order, np.take_along_axis(full, order, axis=1)


@pytest.mark.parametrize("block_bytes", [4 * 37 * 7, 4 * 37 * 64, 1 << 26])
def test_blocked_top_k_equals_brute_force(block_bytes):
    # Reference: the full similarity matrix sorted row by row (brute force, no blocks).
    rng = np.random.default_rng(0)
    candidates = unit_rows(rng.standard_normal((37, 8))).astype(np.float32)
    strangers = unit_rows(rng.standard_normal((5, 8)))
    queries = np.vstack([candidates[:20], strangers]).astype(np.float32)
    exclude = np.array(list(range(20)) + [-1] * 5)
    found = top_k_neighbours(queries, candidates, 6, exclude, block_bytes=block_bytes)
    expected_ids, expected_sims = _brute_force_top_k(queries, candidates, 6, exclude)
    np.testing.assert_array_equal(found.indices, expected_ids)
    np.testing.assert_allclose(found.similarities, expected_sims, rtol=1e-6)
    assert not np.any(found.indices[:20] == np.arange(20)[:, None])  # never the word itself


def test_block_rows_bound_memory():
    # A 50,000-word vocabulary: a block of 64 MiB float32 holds 335 rows, never V x V.
    assert block_rows_for(50_000) == (64 * 2**20) // (4 * 50_000)
    assert block_rows_for(50_000) * 50_000 * 4 <= 64 * 2**20


def test_top_k_equals_gensim_most_similar(lee_model):
    # Reference: gensim's KeyedVectors.most_similar (cosine over unit vectors, word excluded).
    vectors = unit_rows(lee_model.vectors.astype(np.float64)).astype(np.float32)
    words = ["government", "police", "australia", "fire", "said"]
    rows = np.array([lee_model.key_to_index[w] for w in words])
    found = top_k_neighbours(vectors[rows], vectors, 10, exclude=rows)
    for row, word in enumerate(words):
        expected = lee_model.most_similar(word, topn=10)
        assert [lee_model.index_to_key[i] for i in found.indices[row]] == [w for w, _ in expected]
        np.testing.assert_allclose(found.similarities[row], [s for _, s in expected], atol=1e-5)


def test_top_k_rejects_k_beyond_candidates():
    vectors = np.eye(4, dtype=np.float32)
    with pytest.raises(ValueError):
        top_k_neighbours(vectors, vectors, 4, exclude=np.arange(4))


def test_cosine_distance_equals_scipy():
    # Reference: scipy.spatial.distance.cosine.
    rng = np.random.default_rng(1)
    a, b = rng.standard_normal((50, 7)), rng.standard_normal((50, 7))
    expected = [cosine(x, y) for x, y in zip(a, b, strict=True)]
    np.testing.assert_allclose(cosine_distance_rows(a, b), expected, atol=1e-12)


def test_jaccard_equals_scipy_on_membership_vectors():
    # Reference: scipy.spatial.distance.jaccard on boolean membership vectors of the two sets.
    rng = np.random.default_rng(2)
    a = np.array([rng.choice(30, 8, replace=False) for _ in range(40)])
    b = np.array([rng.choice(30, 8, replace=False) for _ in range(40)])
    found = jaccard_distance_rows(a, b)
    for i in range(40):
        in_a, in_b = np.zeros(30, bool), np.zeros(30, bool)
        in_a[a[i]], in_b[b[i]] = True, True
        assert found[i] == pytest.approx(jaccard(in_a, in_b))
    missing = a.copy()
    missing[3] = -1
    assert np.isnan(jaccard_distance_rows(missing, b)[3])


@settings(max_examples=50, deadline=None)
@given(
    st.lists(st.sets(st.integers(0, 60), min_size=5, max_size=5), min_size=1, max_size=8),
    st.lists(st.sets(st.integers(0, 60), min_size=5, max_size=5), min_size=8, max_size=8),
)
def test_jaccard_is_a_distance_in_unit_interval(first, second):
    a = np.array([sorted(s) for s in first])
    b = np.array([sorted(s) for s in second[: len(first)]])
    found = jaccard_distance_rows(a, b)
    assert np.all((found >= 0) & (found <= 1))
    np.testing.assert_allclose(found, jaccard_distance_rows(b, a))  # symmetric
    np.testing.assert_array_equal(jaccard_distance_rows(a, a), 0.0)


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_turnover_needs_no_alignment(seed):
    # Property: neighbour sets, hence turnover, do not change under any rotation of a slice.
    rng = np.random.default_rng(seed)
    base = prepare_vectors(rng.standard_normal((60, 6)))
    turned = (base @ ortho_group.rvs(6, random_state=seed)).astype(np.float32)
    own = np.arange(60)
    first = top_k_neighbours(base, base, 5, own)
    second = top_k_neighbours(turned, turned, 5, own)
    np.testing.assert_allclose(jaccard_distance_rows(first.indices, second.indices), 0.0)


def test_local_change_equals_second_order_definition():
    # Reference: the definition of Hamilton, Leskovec and Jurafsky (2016, EMNLP): cosine distance
    # (scipy.spatial.distance.cosine) between the similarity vectors of the word to the union of
    # its neighbour sets in both slices, written out word by word.
    rng = np.random.default_rng(3)
    cand_a = prepare_vectors(rng.standard_normal((80, 10)))
    cand_b = prepare_vectors(rng.standard_normal((80, 10)))
    words_a, words_b = cand_a[:12], cand_b[:12]
    own = np.arange(12)
    near_a = top_k_neighbours(words_a, cand_a, 7, own).indices
    near_b = top_k_neighbours(words_b, cand_b, 7, own).indices
    found = local_change_rows(words_a, cand_a, near_a, words_b, cand_b, near_b)
    for i in range(12):
        union = sorted(set(near_a[i]) | set(near_b[i]))
        first = [float(words_a[i] @ cand_a[j]) for j in union]
        second = [float(words_b[i] @ cand_b[j]) for j in union]
        assert found[i] == pytest.approx(cosine(first, second), abs=1e-6)
    # The same space twice: no local change at all.
    same = local_change_rows(words_a, cand_a, near_a, words_a, cand_a, near_a)
    np.testing.assert_allclose(same, 0.0, atol=1e-9)


def test_union_rows_marks_duplicates():
    ids, valid = union_rows(np.array([[3, 1, 2]]), np.array([[2, 5, 3]]))
    assert sorted(ids[0][valid[0]].tolist()) == [1, 2, 3, 5]


def test_consensus_neighbours_average_over_seeds():
    rng = np.random.default_rng(4)
    seeds = [prepare_vectors(rng.standard_normal((50, 6))) for _ in range(3)]
    own = np.arange(10)
    lists = [top_k_neighbours(s[:10], s, 5, own).indices for s in seeds]
    found = consensus_neighbours([s[:10] for s in seeds], seeds, lists, 5)
    for i in range(10):
        union = sorted(set(np.concatenate([lst[i] for lst in lists])))
        mean = {j: np.mean([s[i] @ s[j] for s in seeds]) for j in union}
        best = sorted(union, key=lambda j: -mean[j])[:5]
        assert found.indices[i].tolist() == best
        np.testing.assert_allclose(found.similarities[i], [mean[j] for j in best], rtol=1e-5)
    single = consensus_neighbours([seeds[0][:10]], [seeds[0]], [lists[0]], 5)
    np.testing.assert_array_equal(single.indices, lists[0])


def test_mean_and_spread_over_seeds():
    per_seed = [np.array([0.1, np.nan, 0.3]), np.array([0.3, np.nan, 0.5])]
    mean, spread = mean_and_spread(per_seed)
    np.testing.assert_allclose(mean, [0.2, np.nan, 0.4])
    expected = [np.std([0.1, 0.3], ddof=1), np.nan, np.std([0.3, 0.5], ddof=1)]
    np.testing.assert_allclose(spread, expected)
    one_mean, one_spread = mean_and_spread(per_seed[:1])
    assert np.isnan(one_spread).all()
    np.testing.assert_allclose(one_mean, per_seed[0])
