"""Alignment: preparation of vectors, orthogonal Procrustes, anchor selection."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.linalg import orthogonal_procrustes
from scipy.spatial.distance import cosine
from scipy.stats import ortho_group

from drift.compare.alignment import (
    SliceVectors,
    align_onto,
    anchor_words,
    parse_anchors,
    prepare_vectors,
    procrustes_rotation,
    unit_rows,
)
from drift.errors import DriftError


def _slice(label, words, matrix, counts=None):
    counts = np.arange(len(words), 0, -1) if counts is None else np.asarray(counts)
    return SliceVectors(label, list(words), prepare_vectors(matrix), counts.astype(np.int64))


def test_procrustes_equals_scipy():
    # Reference: scipy.linalg.orthogonal_procrustes (Schonemann 1966 SVD solution).
    rng = np.random.default_rng(0)
    source, target = rng.standard_normal((200, 12)), rng.standard_normal((200, 12))
    expected, _ = orthogonal_procrustes(source, target)
    np.testing.assert_allclose(procrustes_rotation(source, target), expected, atol=1e-12)
    # float32 vectors, as the rank stage passes them: the same rotation to float32 precision.
    single = procrustes_rotation(source.astype(np.float32), target.astype(np.float32))
    np.testing.assert_allclose(single, expected, atol=1e-5)


def test_procrustes_recovers_a_known_random_rotation():
    # A random orthogonal matrix from scipy.stats.ortho_group (Haar measure); exact recovery.
    rng = np.random.default_rng(1)
    rotation = ortho_group.rvs(30, random_state=2)
    source = rng.standard_normal((500, 30))
    found = procrustes_rotation(source, source @ rotation)
    np.testing.assert_allclose(found, rotation, atol=1e-8)
    np.testing.assert_allclose(found @ found.T, np.eye(30), atol=1e-10)


def test_align_onto_recovers_rotation_with_words_in_another_order():
    rng = np.random.default_rng(3)
    words = [f"w{i}" for i in range(300)]
    base = rng.standard_normal((300, 20))
    rotation = ortho_group.rvs(20, random_state=4)
    order = rng.permutation(300)
    target = _slice("a", words, base)
    # The same geometry rotated, stored in another word order: alignment must follow the words.
    moved = _slice("b", [words[i] for i in order], base[order] @ rotation)
    found = align_onto(moved, target)
    aligned = moved.vectors @ found
    np.testing.assert_allclose(aligned[moved.rows(words)], target.vectors, atol=1e-5)


def test_prepare_vectors_unit_length_and_centred_direction():
    rng = np.random.default_rng(5)
    raw = rng.standard_normal((400, 16)) + 3.0  # a strong common direction, as SGNS vectors have
    prepared = prepare_vectors(raw)
    assert prepared.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(prepared, axis=1), 1.0, atol=1e-6)
    centred = unit_rows(raw) - unit_rows(raw).mean(axis=0)
    # Cosine after preparation equals SciPy's cosine of the centred vectors.
    assert 1 - prepared[0] @ prepared[1] == pytest.approx(cosine(centred[0], centred[1]), abs=1e-6)
    # The common direction is gone: the mean of the prepared vectors is small.
    assert np.linalg.norm(prepared.mean(axis=0)) < 0.2


def test_anchor_words_number_list_and_default():
    words = ["the", "cat", "sat", "mat", "hat"]
    rng = np.random.default_rng(6)
    first = _slice("a", words, rng.standard_normal((5, 4)), [50, 40, 30, 20, 10])
    second = _slice("b", words[::-1] + ["new"], rng.standard_normal((6, 4)), [1, 2, 3, 4, 5, 99])
    assert set(anchor_words(first, second)) == set(words)
    # Combined counts: the 60, cat 42, sat 33, mat 24, hat 15.
    assert anchor_words(first, second, 2) == ["the", "cat"]
    assert anchor_words(first, second, ["mat", "nope", "cat"]) == ["mat", "cat"]
    with pytest.raises(DriftError, match="share only 1 anchor"):
        anchor_words(first, second, ["mat", "nope"])


def test_parse_anchors_number_file_and_errors(tmp_path):
    assert parse_anchors(None) is None
    assert parse_anchors("500") == 500
    assert parse_anchors(12) == 12
    listing = tmp_path / "anchors.txt"
    listing.write_text("# stable words\nthe cat\nsat\ncat\n", encoding="utf-8")
    assert parse_anchors(str(listing)) == ["the", "cat", "sat"]
    with pytest.raises(DriftError, match="neither a number of words nor an existing"):
        parse_anchors(str(tmp_path / "missing.txt"))
    with pytest.raises(DriftError, match="too few"):
        parse_anchors("1")
    short = tmp_path / "short.txt"
    short.write_text("alone\n", encoding="utf-8")
    with pytest.raises(DriftError, match="holds 1 words"):
        parse_anchors(str(short))
    binary = tmp_path / "binary.txt"
    binary.write_bytes(b"\xff\xfe\xfa bad")
    with pytest.raises(DriftError, match="cannot be read as UTF-8"):
        parse_anchors(str(binary))


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), dim=st.integers(2, 12))
def test_alignment_undoes_any_rotation(seed, dim):
    # Property: whatever orthogonal map relates two copies of a space, aligning one onto the
    # other makes every word's cosine distance zero (checked with scipy.spatial.distance.cosine).
    rng = np.random.default_rng(seed)
    words = [f"w{i}" for i in range(40)]
    base = rng.standard_normal((40, dim))
    rotation = ortho_group.rvs(dim, random_state=seed) if dim > 1 else np.eye(1)
    first, second = _slice("a", words, base), _slice("b", words, base @ rotation)
    aligned = second.vectors @ align_onto(second, first)
    for i in (0, 17, 39):
        assert cosine(aligned[i], first.vectors[i]) == pytest.approx(0.0, abs=1e-5)
