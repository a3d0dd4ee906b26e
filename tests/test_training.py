"""The train stage: models per slice and seed, the control pair, reuse, determinism, bad input."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections import Counter

import numpy as np
import pytest
from gensim.test.utils import datapath
from train_fixtures import (
    LEE_BACKGROUND,
    copy_run,
    corpus_lines,
    lee_run,
    make_run,
    permuted_vocabulary,
    wiki_lines,
)

from drift import runfolder
from drift.embed import training
from drift.errors import DriftError
from drift.runfolder import RunPaths

TINY = {"dim": 8, "epochs": 1, "min_count": 2, "seeds": 2, "workers": 1, "quiet": True}


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """The Lee corpus in three slices, trained with tiny models (and the control pair)."""
    root = lee_run(tmp_path_factory.mktemp("train") / "run")
    table = training.train_run(root, **TINY)
    return root, table


def test_every_model_is_written_with_its_counts(trained):
    root, table = trained
    paths = RunPaths(root)
    assert list(table.columns) == training.RESULT_COLUMNS
    assert len(table) == (3 + 2) * 2
    assert set(table["group"]) == {"slice", "control"}
    assert not table["reused"].any()
    for label in ("2001", "2002", "2003"):
        words = Counter(paths.slice_file(label).read_text(encoding="utf-8").split())
        kept = {word for word, count in words.items() if count >= TINY["min_count"]}
        for seed in (0, 1):
            assert paths.model_file(label, seed).is_file()
            vectors = training.load_vectors(root, label, seed)
            assert vectors.vector_size == TINY["dim"]
            # the vocabulary is exactly the words at or above --min-count, with their counts
            assert set(vectors.index_to_key) == kept
            for word in list(kept)[:50]:
                assert vectors.get_vecattr(word, "count") == words[word]
    for name in training.CONTROL_LABELS:
        for seed in (0, 1):
            assert paths.control_model_file(name, seed).is_file()
            assert len(training.load_vectors(root, name, seed, control=True)) > 100


def test_run_json_records_every_value_used(trained):
    root, _ = trained
    record = runfolder.read_manifest(root)["stages"]["train"]
    assert record["params"] == {
        "architecture": "skipgram",
        "dim": 8,
        "window": 5,
        "negative": 5,
        "sample": 1e-3,
        "epochs": 1,
        "min_count": 2,
        "seeds": 2,
        "base_seed": 1,
        "control": True,
        "between": ["2001", "2003"],
    }
    assert record["execution"]["engine"] == "local"
    assert record["execution"]["threads_per_model"] == [1]
    assert record["control"]["between"] == ["2001", "2003"]
    assert training.trained_seeds(root) == [0, 1]
    info = training.control_info(root)
    assert info["between"] == ["2001", "2003"]
    assert info["labels"] == ["control-a", "control-b"]
    assert info["shuffle_seed"] == 1


def test_control_pair_is_a_shuffled_split_of_the_compared_slices(trained):
    root, _ = trained
    paths = RunPaths(root)

    def lines(path):
        return path.read_text(encoding="utf-8").splitlines()

    first, last = lines(paths.slice_file("2001")), lines(paths.slice_file("2003"))
    control_a = lines(training.control_slice_file(paths, "control-a"))
    control_b = lines(training.control_slice_file(paths, "control-b"))
    # the same lines, pooled and redistributed
    assert Counter(control_a + control_b) == Counter(first + last)
    # each control slice draws from both periods
    assert set(control_a) & set(first) and set(control_a) & set(last)
    assert set(control_b) & set(first) and set(control_b) & set(last)
    # sizes: control-a has slice A's token count to within one line
    longest = max(len(line.split()) for line in first + last)

    def tokens(text_lines):
        return sum(len(line.split()) for line in text_lines)

    assert abs(tokens(control_a) - tokens(first)) <= longest
    assert abs(tokens(control_b) - tokens(last)) <= longest


def test_control_shuffle_is_reproducible_from_its_seed(trained, tmp_path):
    root, _ = trained
    paths = RunPaths(copy_run(root, tmp_path / "copy"))
    before = training.control_slice_file(paths, "control-a").read_bytes()
    training.build_control_slices(paths, ["2001", "2003"], shuffle_seed=1)
    assert training.control_slice_file(paths, "control-a").read_bytes() == before
    training.build_control_slices(paths, ["2001", "2003"], shuffle_seed=2)
    assert training.control_slice_file(paths, "control-a").read_bytes() != before


def test_a_second_control_split_is_another_shuffle_trained_alike(trained, tmp_path):
    """--control-splits 2: control-a-2 and control-b-2 pool the same lines with another
    shuffle seed; the first split and every slice model are reused, run.json lists both."""
    root, _ = trained
    copy = copy_run(root, tmp_path / "copy")
    table = training.train_run(copy, **TINY, control_splits=2)
    assert len(table) == (3 + 4) * 2
    assert set(table.loc[~table["reused"], "label"]) == {"control-a-2", "control-b-2"}
    paths = RunPaths(copy)

    def lines(name):
        return training.control_slice_file(paths, name).read_text(encoding="utf-8").splitlines()

    assert Counter(lines("control-a-2") + lines("control-b-2")) == Counter(
        lines("control-a") + lines("control-b"))
    assert lines("control-a-2") != lines("control-a")
    info = training.control_info(copy)
    assert info["splits"] == 2 and info["labels"] == ["control-a", "control-b"]
    assert info["more_splits"][0]["labels"] == ["control-a-2", "control-b-2"]
    assert info["more_splits"][0]["shuffle_seed"] == 1 + training.SPLIT_SEED_STEP
    assert runfolder.read_manifest(copy)["stages"]["train"]["params"]["control_splits"] == 2
    assert len(training.load_vectors(copy, "control-b-2", 1, control=True)) > 100
    again = training.train_run(copy, **TINY, control_splits=2)
    assert again["reused"].all()
    with pytest.raises(DriftError, match="--control-splits"):
        training.train_run(copy, **TINY, control_splits=0)


def test_line_index_agrees_with_reading_the_lines(tmp_path):
    text = "a bb ccc\n\nd e\nfff g h i\n" * 40 + "last line no newline"
    path = tmp_path / "s.txt"
    path.write_bytes(text.encode())
    starts, ends, tokens = training.line_index(path, chunk_size=7)  # lines cross chunk edges
    data = path.read_bytes()
    expected = [line for line in text.split("\n") if line]
    assert [data[s:e].decode() for s, e in zip(starts, ends, strict=True)] == expected
    assert tokens.tolist() == [len(line.split()) for line in expected]


def test_unchanged_models_are_reused_and_changed_ones_retrained(trained, tmp_path):
    root = copy_run(trained[0], tmp_path / "run")
    model = RunPaths(root).model_file("2002", 0)
    before = model.stat().st_mtime_ns
    again = training.train_run(root, **TINY)
    assert again["reused"].all()
    assert model.stat().st_mtime_ns == before

    # a changed middle slice retrains its own models only (the control pair is 2001 vs 2003)
    slice_file = RunPaths(root).slice_file("2002")
    slice_file.write_text(slice_file.read_text(encoding="utf-8") + "one more line here\n")
    changed = training.train_run(root, **TINY)
    retrained = changed[~changed["reused"]]
    assert set(zip(retrained["group"], retrained["label"], strict=True)) == {("slice", "2002")}

    # another parameter retrains everything
    other = training.train_run(root, **{**TINY, "epochs": 2})
    assert not other["reused"].any()
    assert runfolder.read_manifest(root)["stages"]["train"]["params"]["epochs"] == 2


def test_training_from_the_command_line_imports_no_pandas(trained, tmp_path):
    """`drift train` that trains a model (and writes its Parquet vocabulary) runs without
    pandas, whose import costs a short run about a quarter second (the append benchmark counts
    it as drift's overhead); the rows match what train_run returns."""
    root = copy_run(trained[0], tmp_path / "run")
    slice_file = RunPaths(root).slice_file("2002")
    slice_file.write_text(slice_file.read_text(encoding="utf-8") + "one more line here\n")
    options = {key: value for key, value in TINY.items() if key != "quiet"}
    probe = (
        "import sys, json; from drift.embed.training import train_models; "
        f"rows = train_models({str(root)!r}, quiet=True, **{options!r}); "
        "print(json.dumps(['pandas' in sys.modules, sum(not r['reused'] for r in rows)]))"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                          check=True)
    assert json.loads(done.stdout) == [False, 2]  # two seeds of 2002 retrained
    import pandas as pd

    model = RunPaths(root).model_file("2002", 0)
    vocabulary = pd.read_parquet(training.vocabulary_file(model))
    assert list(vocabulary.columns) == ["word", "count"]
    assert vocabulary["count"].dtype == np.int64 and vocabulary["word"].is_unique
    assert len(vocabulary) == len(np.load(model, allow_pickle=False))
    assert (vocabulary["count"] >= TINY["min_count"]).all()


def test_temporary_files_of_a_killed_run_are_cleared(trained, tmp_path):
    root = copy_run(trained[0], tmp_path / "run")
    left = RunPaths(root).model_file("2001", 0).parent / ".seed-0.npy.x1y2.tmp"
    left.write_bytes(b"half a model")
    assert training.train_run(root, **TINY)["reused"].all()
    assert not left.exists()
    assert len(training.load_vectors(root, "2001", 0)) > 0


def test_same_seed_gives_identical_vectors_with_one_thread(trained, tmp_path):
    root = copy_run(trained[0], tmp_path / "run")
    for path in RunPaths(root).models_dir.rglob("*"):
        if path.suffix in {".npy", ".parquet", ".json"}:
            path.unlink()
    training.train_run(root, **TINY, control=False)
    for label in ("2001", "2003"):
        first = training.load_vectors(trained[0], label, 0)
        second = training.load_vectors(root, label, 0)
        assert first.index_to_key == second.index_to_key
        assert np.array_equal(first.vectors, second.vectors)
    # and different seeds give different vectors
    seed0, seed1 = (training.load_vectors(root, "2001", seed) for seed in (0, 1))
    assert not np.allclose(seed0.vectors, seed1.vectors)


def test_every_task_reports_its_progress_from_the_worker_processes(trained, tmp_path, monkeypatch):
    root = copy_run(trained[0], tmp_path / "run")
    seen: dict[str, tuple[int, int]] = {}
    original = training._TaskBars.on_event

    def record(self, key, completed, total):
        seen[key] = (completed, total)
        original(self, key, completed, total)

    monkeypatch.setattr(training._TaskBars, "on_event", record)
    table = training.train_run(root, **{**TINY, "epochs": 2, "workers": 2, "quiet": False})
    keys = {f"{g}/{label}/seed-{k}" for g, label, k in table[["group", "label", "seed"]].values}
    # one step for the vocabulary, then one per epoch, all reported from the pool workers
    assert seen == {key: (3, 3) for key in keys}


def test_stable_hash_is_the_same_in_every_process():
    # gensim's default hashfxn is Python's hash(), salted per process unless PYTHONHASHSEED is set
    code = "from drift.embed.training import stable_hash; print(stable_hash('river'))"
    values = {
        subprocess.run(
            [sys.executable, "-c", code],
            env={**os.environ, "PYTHONHASHSEED": salt},
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        for salt in ("1", "2")
    }
    assert values == {str(training.stable_hash("river"))}


# ---------------------------------------------------------------------------- bad input


def test_a_folder_without_slices_names_the_command_that_makes_them(tmp_path):
    runfolder.prepare_run_folder(tmp_path / "empty")
    with pytest.raises(DriftError, match="drift slice"):
        training.train_run(tmp_path / "empty", **TINY)


def test_a_slice_without_frequent_words_is_named(trained, tmp_path):
    root = copy_run(trained[0], tmp_path / "run")
    with pytest.raises(DriftError) as error:
        training.train_run(root, **{**TINY, "min_count": 10**6})
    message = str(error.value)
    assert "Slice '200" in message and "--min-count" in message and "larger time bins" in message


@pytest.mark.parametrize(
    ("option", "value", "named"),
    [
        ("dim", 1, "--dim"),
        ("window", 0, "--window"),
        ("negative", 0, "--negative"),
        ("epochs", 0, "--epochs"),
        ("min_count", 0, "--min-count"),
        ("seeds", 0, "--seeds"),
        ("sample", 1.5, "--sample"),
        ("architecture", "glove", "--architecture"),
        ("workers", 0, "--workers"),
    ],
)
def test_parameters_out_of_range_are_refused_before_any_work(trained, option, value, named):
    root, _ = trained
    before = runfolder.read_manifest(root)["stages"]["train"]
    with pytest.raises(DriftError, match=named):
        training.train_run(root, **{**TINY, option: value})
    assert runfolder.read_manifest(root)["stages"]["train"] == before


def test_between_must_name_two_slices_of_the_run(trained):
    root, _ = trained
    with pytest.raises(DriftError, match="did you mean 2001"):
        training.train_run(root, **TINY, between=["2001x", "2003"])
    with pytest.raises(DriftError, match="two different slices"):
        training.train_run(root, **TINY, between=["2001", "2001"])


def test_one_slice_is_refused_with_advice_to_slice_again(tmp_path):
    """One slice has nothing to compare: --no-control would train, then rank would stop, so the
    advice is to cut the archive into two or more periods, with or without a control."""
    root = make_run(tmp_path / "one", {"2001": corpus_lines(LEE_BACKGROUND)[:50]})
    for control in (True, False):
        with pytest.raises(DriftError, match="has one slice .*--by even:2") as error:
            training.train_run(root, **TINY, control=control)
        assert "--no-control" not in str(error.value)
    assert not (root / "models").exists()


def test_loading_a_model_that_was_not_trained_suggests_the_labels(trained):
    root, _ = trained
    with pytest.raises(DriftError, match="did you mean 2003, 2002"):
        training.load_vectors(root, "2020", 0)
    with pytest.raises(DriftError, match="seed 5"):
        training.load_vectors(root, "2002", 5)


# ------------------------------------------------------------------------ checks against the world


@pytest.fixture(scope="session")
def wordsim_run(tmp_path_factory):
    """Real text (Wikipedia dump + Lee corpora, all bundled with gensim) and a vocabulary-permuted
    copy of it, as two slices of one run, trained by drift train with usual parameters."""
    lines = wiki_lines() + corpus_lines(LEE_BACKGROUND) + corpus_lines("lee.cor")
    root = make_run(
        tmp_path_factory.mktemp("wordsim") / "run",
        {"text": lines, "permuted": permuted_vocabulary(lines, seed=7, min_count=5)},
    )
    training.train_run(
        root, dim=100, epochs=5, min_count=5, seeds=1, control=False, workers=2, quiet=True
    )
    return root


@pytest.mark.slow
def test_a_model_of_real_text_agrees_with_human_similarity_judgements(wordsim_run):
    # WordSim-353 (Finkelstein et al. 2002), bundled with gensim, scored with gensim's
    # evaluate_word_pairs; Spearman correlation between human ratings and cosine similarity.
    vectors = training.load_vectors(wordsim_run, "text", 0)
    _, (rho, p_value), oov_percent = vectors.evaluate_word_pairs(datapath("wordsim353.tsv"))
    assert oov_percent < 50  # enough pairs are covered for the test to mean something
    assert rho > 0.15 and p_value < 1e-3


@pytest.mark.slow
def test_a_model_of_vocabulary_permuted_text_does_not(wordsim_run):
    # Same protocol on the same text with words consistently permuted (a random bijection of the
    # vocabulary; words above --min-count stay above it): the ratings must no longer be reflected.
    # (A permutation that also kept each word's frequency left a small correlation, about 0.1,
    # in our runs: cosine similarity in these models follows frequency a little.)
    vectors = training.load_vectors(wordsim_run, "permuted", 0)
    _, (rho, p_value), oov_percent = vectors.evaluate_word_pairs(datapath("wordsim353.tsv"))
    assert oov_percent < 50  # the same words exist, at nearly the same frequencies
    assert abs(rho) < 0.1 and p_value > 0.05


def test_the_slice_files_feed_gensim_unchanged(trained):
    # the sidecar's word count is gensim's own corpus_total_words for the slice file
    root, _ = trained
    paths = RunPaths(root)
    sidecar = json.loads(training.sidecar_file(paths.model_file("2001", 0)).read_text())
    tokens = len(paths.slice_file("2001").read_text(encoding="utf-8").split())
    assert sidecar["words"] == tokens


def test_models_see_the_slice_lines_in_a_seeded_random_order(trained, tmp_path):
    """Every model trains on its slice's lines shuffled by the run's base seed: the same lines,
    another order, the same order for every seed of the slice; the model equals gensim's own
    Word2Vec trained on that shuffled file (gensim is the reference), and no copy is left."""
    from gensim.models import Word2Vec

    root, _ = trained
    paths = RunPaths(root)
    corpus = paths.slice_file("2001")
    first, again = tmp_path / "a.txt", tmp_path / "b.txt"
    assert training.write_shuffled_lines(corpus, first, 1) == len(corpus.read_text().splitlines())
    training.write_shuffled_lines(corpus, again, 1)
    lines = corpus.read_text(encoding="utf-8").splitlines()
    shuffled = first.read_text(encoding="utf-8").splitlines()
    assert sorted(shuffled) == sorted(lines) and shuffled != lines
    assert first.read_bytes() == again.read_bytes()
    sidecars = [json.loads(training.sidecar_file(paths.model_file("2001", s)).read_text())
                for s in (0, 1)]
    assert {s["model"]["line_order"] for s in sidecars} == {"shuffled"}
    assert len({s["model"]["line_order_seed"] for s in sidecars}) == 1
    params = sidecars[0]["model"]
    order = tmp_path / "order.txt"
    training.write_shuffled_lines(corpus, order, params["line_order_seed"])
    model = Word2Vec(corpus_file=str(order), sg=1, hs=0, vector_size=params["dim"],
                     window=params["window"], negative=params["negative"],
                     sample=params["sample"], min_count=params["min_count"],
                     epochs=params["epochs"], seed=params["seed"], workers=1,
                     hashfxn=training.stable_hash)
    ours = training.load_vectors(root, "2001", 0)
    assert ours.index_to_key == model.wv.index_to_key
    assert np.allclose(ours.vectors, model.wv.vectors)
    assert not list(paths.models_dir.rglob("*.lines-shuffled.txt"))


# ---------------------------------------------------------------------------- storage, no pickles


class _Planted:
    """An object whose unpickling creates a file: proof that a loader ran code from a model."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_model_files_hold_no_pickles_and_read_with_numpy_and_pandas(trained):
    import pandas as pd

    root, _ = trained
    paths = RunPaths(root)
    files = [
        p for p in root.rglob("*") if p.is_file() and p.parent.parent.name in ("models", "control")
    ]
    assert files and not [p for p in files if p.suffix == ".kv"]
    for path in files:
        assert not path.read_bytes().startswith(b"\x80"), f"{path} is a pickle"
    model = paths.model_file("2002", 1)
    vectors = np.load(model, allow_pickle=False)  # numpy alone
    vocabulary = pd.read_parquet(training.vocabulary_file(model))  # pandas alone
    assert list(vocabulary.columns) == ["word", "count"] and len(vocabulary) == len(vectors)
    keyed = training.load_vectors(root, "2002", 1)  # gensim KeyedVectors built on demand
    assert isinstance(keyed.vectors, np.memmap) and not keyed.vectors.flags.writeable
    np.testing.assert_array_equal(np.asarray(keyed.vectors), vectors)
    word = vocabulary["word"].iloc[3]
    assert keyed.get_vecattr(word, "count") == vocabulary["count"].iloc[3]
    np.testing.assert_array_equal(keyed[word], vectors[3])


def test_a_tampered_model_file_runs_nothing(trained, tmp_path):
    import pickle

    root = copy_run(trained[0], tmp_path / "run")
    marker = tmp_path / "code-ran"
    model = RunPaths(root).model_file("2001", 0)
    cases = {
        "a pickle named .npy": pickle.dumps(_Planted(str(marker))),
        "an object array": None,
        "a truncated array": model.read_bytes()[:200],
    }
    for case, data in cases.items():
        if data is None:
            with model.open("wb") as handle:
                np.save(handle, np.array([_Planted(str(marker))], dtype=object), allow_pickle=True)
        else:
            model.write_bytes(data)
        with pytest.raises(DriftError, match="not a model file as drift writes it"):
            training.load_vectors(root, "2001", 0)
        assert not marker.exists(), f"loading {case} ran code"
    vocabulary = training.vocabulary_file(RunPaths(root).model_file("2002", 0))
    vocabulary.write_bytes(pickle.dumps(_Planted(str(marker))))
    with pytest.raises(DriftError, match="not a model file as drift writes it"):
        training.load_vectors(root, "2002", 0)
    assert not marker.exists()


def test_a_vocabulary_from_another_parquet_writer_reads_as_pandas_reads_it(tmp_path):
    """Counts in several row groups, as int32, read as pandas.read_parquet reads them; a
    missing count is refused."""
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    model = tmp_path / "seed-0.npy"
    words = [f"w{i}" for i in range(250)]
    training.save_model(model, words, np.ones((250, 4), np.float32), np.arange(250) * 3)
    vocabulary = training.vocabulary_file(model)
    table = pa.table({"word": words, "count": pa.array(np.arange(250) * 7, pa.int32())})
    pq.write_table(table, vocabulary, row_group_size=64)  # four row groups: four chunks
    read_words, _, counts = training.read_model(model)
    expected = pd.read_parquet(vocabulary)
    assert read_words == expected["word"].tolist()
    np.testing.assert_array_equal(counts, expected["count"].to_numpy())
    assert counts.dtype == np.int64
    with_gap = table.set_column(1, "count", pa.array([None] + list(range(1, 250)), pa.int64()))
    pq.write_table(with_gap, vocabulary)
    with pytest.raises(DriftError, match="a word without a count"):
        training.read_model(model)


def test_a_run_folder_with_pickled_models_is_refused(tmp_path):
    old = tmp_path / "old"
    old.mkdir()
    (old / "run.json").write_text(json.dumps({"format_version": 1, "stages": {}}))
    with pytest.raises(DriftError, match="stored models as pickle files; this version never opens"):
        training.load_vectors(old, "2001", 0)
