"""The neighbours table: computed once at rank time, read by pages and queries."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from chart_run_fixture import LABELS, SEEDS, fixture_run_copy
from scipy.spatial.distance import cdist

from drift.compare import neighbours
from drift.compare.alignment import prepare_vectors
from drift.embed.training import read_keyed_vectors
from drift.errors import DriftError
from drift.runfolder import RunPaths

WORD = "government"


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return fixture_run_copy(tmp_path_factory.mktemp("neighbours") / "run")


def count_model_loads(monkeypatch) -> Counter:
    """Count every model load (drift.embed.training.load_vectors is the one way models are read)."""
    import drift.embed.training

    loads: Counter = Counter()
    real = drift.embed.training.load_vectors

    def counted(run, label, seed, control=False):
        loads[(label, seed, control)] += 1
        return real(run, label, seed, control=control)

    monkeypatch.setattr(drift.embed.training, "load_vectors", counted)
    return loads


def reference_neighbours(run: Path, word: str, k: int) -> pd.DataFrame:
    """Seed-averaged cosine similarity from SciPy's cdist over gensim's own vectors, prepared."""
    kvs = {(label, seed): read_keyed_vectors(RunPaths(run).model_file(label, seed))
           for label in LABELS for seed in range(SEEDS)}
    candidates = [w for w in kvs[(LABELS[0], 0)].index_to_key
                  if all(w in kv.key_to_index for kv in kvs.values())]
    rows = []
    for label in LABELS:
        sims = []
        for seed in range(SEEDS):
            kv = kvs[(label, seed)]
            prepared = prepare_vectors(kv.vectors)
            cand = prepared[[kv.key_to_index[w] for w in candidates]]
            query = prepared[[kv.key_to_index[word]]]
            sims.append(1.0 - cdist(query, cand, metric="cosine")[0])
        mean = np.mean(sims, axis=0)
        mean[candidates.index(word)] = -np.inf
        best = np.argsort(-mean, kind="stable")[:k]
        rows += [{"slice": label, "rank": r + 1, "neighbour": candidates[i],
                  "similarity": mean[i]} for r, i in enumerate(best)]
    return pd.DataFrame(rows)


def test_table_holds_the_seed_averaged_cosine_neighbours(run):
    table = neighbours.read_neighbours(run)
    assert list(table.columns) == neighbours.NEIGHBOUR_COLUMNS
    assert neighbours.stored_k(table) == neighbours.PAGE_K
    mine = table[table["word"] == WORD].reset_index(drop=True)
    expected = reference_neighbours(run, WORD, neighbours.PAGE_K)
    assert list(mine["slice"]) == list(expected["slice"])
    np.testing.assert_allclose(mine["similarity"], expected["similarity"], atol=1e-5)
    # the lists agree except where two candidates tie within float32 rounding
    for label in LABELS:
        got = list(mine.loc[mine["slice"] == label, "neighbour"])
        want = list(expected.loc[expected["slice"] == label, "neighbour"])
        assert len(set(got) ^ set(want)) <= 2


def test_table_covers_every_scored_word(run):
    table = neighbours.read_neighbours(run)
    scored = pd.read_parquet(RunPaths(run).scores_parquet)["word"]
    assert set(table["word"]) == set(scored)
    per = table.groupby(["word", "slice"])["rank"].agg(["min", "max", "count"])
    assert (per["min"] == 1).all() and (per["count"] == neighbours.PAGE_K).all()


def test_reading_the_table_loads_no_model(run, monkeypatch):
    loads = count_model_loads(monkeypatch)
    rows = neighbours.neighbours_for(run, [WORD, "police"], k=5)
    single = neighbours.word_neighbours(run, WORD, k=5)  # what 'drift neighbours' calls
    assert not loads
    assert len(single) == 5 * len(LABELS)
    table = neighbours.read_neighbours(run)
    stored = table[table["word"].isin([WORD, "police"]) & (table["rank"] <= 5)]
    assert len(rows) == len(stored) == 2 * 5 * len(LABELS)
    assert list(rows["word"].unique()) == [WORD, "police"]  # in the order asked


def test_words_missing_from_the_table_load_each_model_once(tmp_path, monkeypatch):
    copy = fixture_run_copy(tmp_path / "run")
    stored = neighbours.read_neighbours(copy)
    RunPaths(copy).neighbours_parquet.unlink()
    words = list(pd.read_parquet(RunPaths(copy).scores_parquet)["word"].head(20))
    loads = count_model_loads(monkeypatch)
    rows = neighbours.neighbours_for(copy, words, k=neighbours.PAGE_K)
    assert loads == Counter({(label, seed, False): 1 for label in LABELS for seed in range(SEEDS)})
    again = stored[stored["word"].isin(words)].reset_index(drop=True)
    pd.testing.assert_frame_equal(rows.sort_values(["word", "slice", "rank"], ignore_index=True),
                                  again.sort_values(["word", "slice", "rank"], ignore_index=True))


def test_k_beyond_the_table_is_computed_from_the_models(run):
    rows = neighbours.word_neighbours(run, WORD, k=12)
    assert rows.groupby("slice").size().tolist() == [12] * len(LABELS)
    stored = neighbours.read_neighbours(run)
    stored = stored[stored["word"] == WORD]
    for label in LABELS:
        top = rows.loc[rows["slice"] == label, "similarity"].head(10).to_numpy()
        np.testing.assert_allclose(top, stored.loc[stored["slice"] == label, "similarity"],
                                   atol=1e-6)


def test_unknown_word_suggests_close_matches(run):
    with pytest.raises(DriftError, match="did you mean government"):
        neighbours.word_neighbours(run, "goverment")
    with pytest.raises(DriftError, match="at least 1"):
        neighbours.word_neighbours(run, WORD, k=0)


def test_gained_lost_and_turnover_of_a_hand_made_example():
    rows = pd.DataFrame(
        {"slice": ["a"] * 3 + ["b"] * 3, "rank": [1, 2, 3] * 2,
         "neighbour": ["ship", "dock", "crane", "dock", "team", "cup"], "similarity": 0.5}
    )
    gained, lost = neighbours.gained_and_lost(rows, "a", "b", k=3)
    assert gained == ["team", "cup"] and lost == ["ship", "crane"]
    # Jaccard distance by hand: 1 shared of 5 distinct words -> 1 - 1/5
    assert neighbours.turnover(rows, "a", "b", k=3) == pytest.approx(0.8)
    assert neighbours.turnover(rows, "a", "b", k=1) == pytest.approx(1.0)  # ship vs dock
    assert np.isnan(neighbours.turnover(rows, "a", "c", k=3))


def test_rank_writes_the_table_for_every_measured_word(demo_run):
    table = neighbours.read_neighbours(demo_run.run)
    scores = pd.read_parquet(RunPaths(demo_run.run).scores_parquet)
    assert table is not None and set(table["word"]) == set(scores["word"])
    assert neighbours.stored_k(table) == neighbours.PAGE_K


def seed_lists(models: neighbours.RunModels, words: list[str], width: int) -> list[dict]:
    """Each seed's best ``width`` candidates of ``words`` per slice, searched in full the way
    the rank stage searches them (drift.compare.seedmeasures.slice_neighbours)."""
    from drift.compare.seedmeasures import slice_neighbours

    index = {w: i for i, w in enumerate(models.candidates)}
    lists = []
    for seed in models.seeds:
        per_label = {}
        for label in models.labels:
            model = models.slices[(label, seed)]
            candidates = model.vectors[model.rows(models.candidates)]
            per_label[label] = slice_neighbours(model, words, candidates, index, width)
        lists.append(per_label)
    return lists


def test_the_table_from_the_rank_lists_equals_a_full_search(run, monkeypatch):
    """The threshold algorithm (Fagin, Lotem and Naor 2003) on two seeds' neighbour lists gives
    the full seed-averaged search's neighbours; words whose lists cannot prove it, or that the
    lists lack, are searched in full."""
    models = neighbours.load_run_models(run)
    words = list(pd.read_parquet(RunPaths(run).scores_parquet)["word"])
    assert len(models.seeds) == 2
    full = neighbours.compute_neighbours(models, words)
    searched: list[int] = []
    real_search = neighbours.compute_neighbours

    def counted(models, asked, k=neighbours.PAGE_K):
        searched.append(len(asked))
        return real_search(models, asked, k)

    monkeypatch.setattr(neighbours, "compute_neighbours", counted)
    # this fixture's small models agree little between seeds: top-50 lists prove most words
    from_lists = neighbours.table_from_lists(models, words, words, seed_lists(models, words, 50))
    assert sum(searched) < len(words) / 10
    keys = ["word", "slice", "rank"]
    pd.testing.assert_frame_equal(from_lists[keys], full[keys])
    np.testing.assert_allclose(from_lists["similarity"], full["similarity"], atol=1e-6)
    differs = (from_lists["neighbour"] != full["neighbour"]).to_numpy()
    near_tie = np.abs(np.diff(full["similarity"].to_numpy(), prepend=np.nan)) < 1e-6
    near_tie |= np.roll(near_tie, -1)
    assert not (differs & ~near_tie).any()  # only within float32 rounding of a tie
    # lists of exactly k prove nothing for two seeds: every word is searched in full
    searched.clear()
    short = neighbours.table_from_lists(models, words[:30], words, seed_lists(models, words, 10))
    assert searched == [30]
    pd.testing.assert_frame_equal(short, real_search(models, words[:30]))
    # a word the lists lack is searched in full too
    searched.clear()
    lists = seed_lists(models, words[1:], 50)
    mixed = neighbours.table_from_lists(models, words[:5], words[1:], lists)
    assert searched and searched[0] >= 1
    expected = full[full["word"].isin(words[:5])].reset_index(drop=True)
    pd.testing.assert_frame_equal(mixed[keys + ["neighbour"]], expected[keys + ["neighbour"]])
