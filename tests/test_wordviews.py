"""A word's 2-D path, its self-similarity and its change point range."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from chart_run_fixture import LABELS, SEEDS, fixture_run_copy
from scipy.linalg import orthogonal_procrustes
from scipy.spatial.distance import cosine, pdist

from drift.compare import neighbours
from drift.compare.alignment import prepare_vectors
from drift.embed.training import read_keyed_vectors
from drift.publish import wordviews
from drift.runfolder import RunPaths

WORD = "government"
LETTERS = ["a", "b", "c", "d", "e", "f"]
IDENTITY = (np.zeros(len(LETTERS)), np.ones(len(LETTERS)))  # no per-slice standardising


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return fixture_run_copy(tmp_path_factory.mktemp("wordviews") / "run")


@pytest.fixture(scope="module")
def models(run):
    return neighbours.load_run_models(run)


# ---------------------------------------------------------------------------- geometry


def test_pca_recovers_a_plane_and_its_variance_shares():
    rng = np.random.default_rng(0)
    flat = rng.normal(size=(30, 2)) * [3.0, 1.0]
    basis, _ = np.linalg.qr(rng.normal(size=(12, 2)))
    points = flat @ basis.T + 5.0  # a plane in 12 dimensions, shifted
    scores, shares = wordviews._pca_2d(points)
    # distances within the plane are kept exactly (SciPy's pdist as the reference)
    np.testing.assert_allclose(pdist(scores), pdist(points), rtol=1e-9)
    # shares of variance = eigenvalues of the covariance matrix (numpy's eigh, another route)
    eigen = np.sort(np.linalg.eigvalsh(np.cov(points.T)))[::-1]
    np.testing.assert_allclose(shares, eigen[:2] / eigen.sum(), rtol=1e-9)


def test_self_similarity_matches_scipy_procrustes_and_cosine(run, models):
    near = neighbours.neighbours_for(run, [WORD], 10, models=models)
    shape = wordviews.word_geometry(models, [WORD], near, LABELS[0])[WORD]
    matrix = shape.self_similarity.loc[list(LABELS), list(LABELS)].to_numpy()
    expected = np.zeros((len(LABELS), len(LABELS)))
    for seed in range(SEEDS):
        kvs = [read_keyed_vectors(RunPaths(run).model_file(label, seed)) for label in LABELS]
        ref = kvs[0]
        aligned = []
        for kv in kvs:
            shared = [w for w in ref.index_to_key if w in kv.key_to_index]
            mine = prepare_vectors(kv.vectors)
            theirs = prepare_vectors(ref.vectors)
            rotation, _ = orthogonal_procrustes(  # SciPy's reference Procrustes
                mine[[kv.key_to_index[w] for w in shared]],
                theirs[[ref.key_to_index[w] for w in shared]],
            )
            aligned.append(mine[kv.key_to_index[WORD]] @ rotation)
        for i, a in enumerate(aligned):
            for j, b in enumerate(aligned):
                expected[i, j] += (1.0 - cosine(a, b)) / SEEDS  # SciPy's cosine distance
    np.testing.assert_allclose(matrix, expected, atol=1e-4)
    np.testing.assert_allclose(matrix, matrix.T)


def test_path_holds_every_slice_and_the_neighbours_once(run, models):
    near = neighbours.neighbours_for(run, [WORD], 10, models=models)
    shape = wordviews.word_geometry(models, [WORD], near, LABELS[0])[WORD]
    assert list(shape.path["slice"]) == list(LABELS)
    assert set(shape.neighbours["neighbour"]) == set(near["neighbour"])
    assert shape.neighbours["neighbour"].is_unique
    # each neighbour is placed in the slice where it ranked best
    best = near.sort_values("rank", kind="stable").groupby("neighbour")["rank"].min()
    placed = shape.neighbours.set_index("neighbour")["rank"]
    assert (placed == best.loc[placed.index]).all()
    assert 0 < sum(shape.explained) <= 1


# ---------------------------------------------------------------------------- change range


def test_a_clean_planted_step_has_a_narrow_range():
    distance = np.array([0.0, 0.1, 0.1, 0.9, 1.0, 1.0])
    found = wordviews.change_range(distance, np.full(6, 0.01), LETTERS, "d", 0.87, IDENTITY,
                                   reference="a")
    assert (found.point, found.low, found.high) == ("d", "d", "d")
    assert found.share > 0.95 and found.redraws == wordviews.REDRAWS


def test_a_gradual_ramp_has_a_wide_range_and_is_reproducible():
    distance = np.array([0.0, 0.2, 0.4, 0.6, 0.8, 1.0])
    sd = np.full(6, 0.1)
    found = wordviews.change_range(distance, sd, LETTERS, "d", 0.5, IDENTITY, reference="a")
    assert LETTERS.index(found.low) < LETTERS.index("d") or LETTERS.index(found.high) > 3
    assert found.low <= found.point <= found.high
    assert found == wordviews.change_range(distance, sd, LETTERS, "d", 0.5, IDENTITY,
                                           reference="a")


def test_no_range_without_a_boundary():
    distance = np.array([0.0, 0.5])
    assert wordviews.change_range(distance, np.zeros(2), ["a", "b"], "a", 0.5,
                                  (np.zeros(2), np.ones(2))) is None
