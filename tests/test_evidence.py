"""Example sentences: reproducible, uniform reservoir samples streamed from the slice files."""

from __future__ import annotations

import tracemalloc
from collections import Counter
from pathlib import Path

import pandas as pd
import pytest
from chart_run_fixture import HOSTILE_WORDS, LABELS, fixture_run_copy
from scipy import stats

from drift.errors import DriftError
from drift.publish import evidence
from drift.runfolder import RunPaths


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return fixture_run_copy(tmp_path_factory.mktemp("evidence") / "run")


def _matching_line_numbers(path: Path, word: str) -> list[int]:
    """Brute force: every line holding ``word`` as a space-separated token."""
    lines = path.read_text(encoding="utf-8").split("\n")
    return [i for i, line in enumerate(lines, start=1) if word in line.split(" ")]


def test_examples_hold_the_word_and_come_from_its_slice(run):
    table = evidence.example_sentences(run, "government", per_slice=3, seed=0)
    # this fixture run has no document index: passages come from the tokenized slice files
    assert list(table.columns) == ["slice", "document", "date", "left", "match", "right",
                                   "sentence", "source_row", "source_file", "line", "original"]
    assert not table["original"].any()
    assert "no document index" in table.attrs["notes"][0]
    assert list(table["slice"].unique()) == list(LABELS)
    for row in table.itertuples():
        assert "government" in row.sentence.split(" ")
        line = RunPaths(run).slice_file(row.slice).read_text(encoding="utf-8").split("\n")[
            row.line - 1
        ]
        # the passage is a piece of that very line (ellipses aside)
        assert row.sentence.strip("… ") in line


def test_each_slice_gives_min_of_per_slice_and_matching_lines(run):
    # "tanks" is rare in the Lee corpus: some slices hold fewer than 3 lines with it.
    for word in ("government", "tanks", HOSTILE_WORDS[0]):
        table = evidence.example_sentences(run, word, per_slice=3, seed=1)
        for label in LABELS:
            expected = len(_matching_line_numbers(RunPaths(run).slice_file(label), word))
            assert (table["slice"] == label).sum() == min(3, expected)


def test_all_matching_lines_when_per_slice_is_large(run):
    words = ["police", "fire", "government", "israeli", "tanks", HOSTILE_WORDS[2]]
    for chosen in (words[:1], words):  # both ways of screening lines
        table = evidence.examples_for_words(run, chosen, per_slice=10_000, seed=0)
        for word in chosen:
            for label in LABELS:
                rows = table[(table["slice"] == label) & (table["word"] == word)]
                expected = _matching_line_numbers(RunPaths(run).slice_file(label), word)
                assert rows["line"].tolist() == expected


def test_same_seed_same_examples_other_seed_other_examples(run):
    first = evidence.example_sentences(run, "the", per_slice=3, seed=7)
    again = evidence.example_sentences(run, "the", per_slice=3, seed=7)
    other = evidence.example_sentences(run, "the", per_slice=3, seed=8)
    pd.testing.assert_frame_equal(first, again)
    assert first["line"].tolist() != other["line"].tolist()


@pytest.mark.parametrize(
    "others",
    [["the", "fire"], ["the", "fire", "government", "israeli", "tanks", "sydney"]],
    ids=["screened-by-substring", "split-and-intersect"],
)
def test_a_words_sample_does_not_depend_on_the_other_words_drawn(run, others):
    alone = evidence.example_sentences(run, "police", per_slice=2, seed=3)
    together = evidence.examples_for_words(run, ["police", *others], per_slice=2, seed=3)
    together = together[together["word"] == "police"].drop(columns="word").reset_index(drop=True)
    pd.testing.assert_frame_equal(alone, together)


def test_word_matches_whole_tokens_only(tmp_path):
    path = tmp_path / "s.txt"
    path.write_text("fires burn\nthe fire burns\nfire\nwildfire here\n", encoding="utf-8")
    kept = evidence.sample_slice(path, "s", ["fire"], per_slice=10)
    assert [n for n, _ in kept["fire"]] == [2, 3]


def test_reservoir_sample_is_uniform(tmp_path):
    # Reservoir sampling (Vitter 1985, algorithm R) keeps each of n matching lines with probability
    # k/n. Over many seeds the inclusion counts must fit a uniform distribution (chi-square test,
    # scipy.stats.chisquare).
    path = tmp_path / "s.txt"
    lines = [f"line {i} {'word' if i % 3 == 0 else 'other'} end" for i in range(60)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    matching = [i + 1 for i in range(60) if i % 3 == 0]  # 20 lines
    inclusions: Counter[int] = Counter()
    trials = 1500
    for seed in range(trials):
        kept = evidence.sample_slice(path, "s", ["word"], per_slice=4, seed=seed)["word"]
        assert len(kept) == 4
        inclusions.update(n for n, _ in kept)
    assert set(inclusions) == set(matching)
    observed = [inclusions[n] for n in matching]
    assert sum(observed) == 4 * trials
    assert stats.chisquare(observed).pvalue > 0.001


def test_long_lines_are_cut_around_the_word():
    line = " ".join(f"t{i}" for i in range(5000)) + " target " + " ".join("u" for _ in range(5000))
    text = evidence.passage(line, "target", context=5)
    assert text == "… t4995 t4996 t4997 t4998 t4999 target u u u u u …"


def test_slices_are_streamed_not_loaded(tmp_path):
    # A 12 MB slice file: peak memory while sampling stays far below the file's size.
    path = tmp_path / "big.txt"
    line = " ".join(["filler"] * 30) + "\n"
    with open(path, "w", encoding="utf-8") as handle:
        for i in range(60_000):
            handle.write(line if i % 1000 else "the needle is here " + line)
    assert path.stat().st_size > 10_000_000
    tracemalloc.start()
    kept = evidence.sample_slice(path, "big", ["needle"], per_slice=3, seed=0)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert len(kept["needle"]) == 3
    assert peak < 1_000_000


def test_undecodable_bytes_are_replaced_not_fatal(tmp_path):
    path = tmp_path / "s.txt"
    path.write_bytes(b"bad \xff\xfe byte word here\nword again\n")
    kept = evidence.sample_slice(path, "s", ["word"], per_slice=5)
    assert [n for n, _ in kept["word"]] == [1, 2]
    assert "\ufffd" in kept["word"][0][1]


def test_missing_slice_file_is_a_clear_error(tmp_path):
    import pandas as pd

    from drift import runfolder

    root = tmp_path / "run"
    runfolder.write_table(root, "summary", pd.DataFrame(
        {"label": ["1990"], "start": ["1990-01-01"], "end": ["1990-12-31"], "documents": [1],
         "tokens": [1], "types": [1], "dropped": [0]}))
    with pytest.raises(DriftError, match="Slice file .*1990.txt is missing"):
        evidence.example_sentences(root, "word")


def test_run_without_slices_is_a_clear_error(tmp_path):
    with pytest.raises(DriftError, match="no slices yet"):
        evidence.example_sentences(tmp_path, "word")


def test_negative_examples_per_slice_is_an_error(run):
    with pytest.raises(DriftError, match="0 or more"):
        evidence.example_sentences(run, "government", per_slice=-1)
