"""Examples quoted from the original documents: as written, with id, date and metadata, spread
over documents and sources, reproducible; Unicode, right-to-left text and long documents."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import gensim
import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from drift.cli.app import app
from drift.ingest.slicing import slice_archive
from drift.publish import evidence, report

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"
LEE = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
SOURCES = ("gazette", "letter", "minutes")
HEBREW = "שלום עולם, אמר הזקן. מה נשמע בעולם?"
ARABIC = "قال الرجل: مرحبا بالعالم، ثم مضى."


def frame() -> pd.DataFrame:
    """gensim's real Lee documents (their case and punctuation as written) over two years,
    with ids and three sources (every fourth holds three lines), plus a Hebrew, an Arabic and
    a very long document."""
    rows = [
        {"id": f"lee-{i}", "date": f"{1990 + i % 2}-{1 + i % 12:02d}-05",
         "source": SOURCES[(i // 2) % 3],
         "text": text if i % 4 else f"{text}\n{LEE[i - 1]}\n{LEE[i - 2]}"}
        for i, text in enumerate(LEE)
    ]
    rows.append({"id": "he-1", "date": "1990-02-02", "source": "letter", "text": HEBREW})
    rows.append({"id": "ar-1", "date": "1991-02-02", "source": "letter", "text": ARABIC})
    long_text = " ".join(["filler"] * 25_000) + " the Zeppelin landed. " + " ".join(["x"] * 9)
    rows.append({"id": "long-1", "date": "1991-03-03", "source": "gazette", "text": long_text})
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("original")
    source = folder / "lee.csv.gz"
    frame().to_csv(source, index=False)
    out = folder / "run"
    slice_archive(source, out, by="year", id_col="id", meta="source", quiet=True)
    return out


def squeeze(text: str) -> str:
    return re.sub(r"\s+", " ", text)


def test_passages_are_the_original_text_with_the_documents_facts(run):
    table = evidence.examples_for_words(run, ["police", "government"], per_slice=4, seed=0)
    originals = frame().set_index("id")
    assert table["original"].all() and len(table) == 16
    assert list(table.columns[:5]) == ["word", "slice", "document", "date", "source"]
    for row in table.itertuples():
        doc = originals.loc[row.document]
        assert row.date == doc["date"] and row.source == doc["source"]
        assert row.slice == doc["date"][:4]
        assert row.match.lower() == row.word
        # the passage is a piece of the original, case and punctuation as written
        assert row.sentence.strip("… ") in squeeze(doc["text"])
        assert row.source_row == originals.index.get_loc(row.document) + 1


def test_examples_spread_over_documents_and_sources(run):
    table = evidence.examples_for_words(run, ["the"], per_slice=3, seed=0)
    for _, part in table.groupby("slice"):
        assert part["document"].is_unique
        assert sorted(part["source"]) == sorted(SOURCES)


def test_examples_are_reproducible(run):
    first = evidence.example_sentences(run, "police", per_slice=3, seed=4)
    again = evidence.example_sentences(run, "police", per_slice=3, seed=4)
    other = evidence.example_sentences(run, "police", per_slice=3, seed=5)
    pd.testing.assert_frame_equal(first, again)
    assert first["document"].tolist() != other["document"].tolist()


def test_right_to_left_unicode_and_long_documents(run):
    table = evidence.examples_for_words(run, ["עולם", "مرحبا", "zeppelin"], per_slice=2)
    found = table.set_index("word")
    assert found.loc["עולם", "document"] == "he-1"
    assert found.loc["עולם", "sentence"] == "שלום עולם, אמר הזקן. מה נשמע בעולם?"
    assert found.loc["مرحبا", "match"] == "مرحبا"
    assert found.loc["zeppelin", "document"] == "long-1"
    assert found.loc["zeppelin", "match"] == "Zeppelin"  # as written
    assert len(found.loc["zeppelin", "sentence"]) < 2 * evidence.CONTEXT_CHARS + 20
    html = report.examples_html(table[table["word"] == "עולם"], "עולם", ["1990"])
    assert '<bdi dir="auto" class="passage">' in html and "<mark>עולם</mark>" in html


def test_original_context_finds_whole_tokens_only():
    text = "Wildfires spread; the FIRE-fighters came. Fire!"
    left, match, right = evidence.original_context(text, "fire")
    assert (left, match, right) == ("Wildfires spread; the ", "FIRE", "-fighters came. Fire!")
    assert evidence.original_context("wildfire", "fire") is None
    assert evidence.original_context("Fire", "fire", keep_case=True) is None


def test_hostile_text_is_escaped_in_the_page():
    examples = pd.DataFrame([{
        "word": "x", "slice": "1990", "document": "<b>id</b>", "date": "1990",
        "source": "<script>alert(1)</script>", "left": "<img src=x> ", "match": "X",
        "right": " &amp;", "sentence": "", "source_row": 3, "source_file": "a.csv", "line": 1,
        "original": True,
    }])
    html = report.examples_html(examples, "x", ["1990"])
    assert "<script>" not in html and "<img" not in html and "<b>id" not in html
    assert "&lt;script&gt;" in html and "&amp;amp;" in html


def test_source_gone_falls_back_to_slice_files_with_a_note(run, tmp_path):
    copy = tmp_path / "run"
    shutil.copytree(run, copy)
    manifest = json.loads((copy / "run.json").read_text())
    manifest["stages"]["slice"]["source"] = str(tmp_path / "gone.csv")
    (copy / "run.json").write_text(json.dumps(manifest))
    table = evidence.examples_for_words(copy, ["police"], per_slice=2)
    assert not table["original"].any() and table["document"].notna().all()
    assert "no longer there" in table.attrs["notes"][0]


def test_text_folder_documents_are_quoted_from_their_files(tmp_path):
    folder = tmp_path / "letters"
    folder.mkdir()
    for i, text in enumerate(LEE[:40]):
        (folder / f"{1990 + i % 2}-01-{1 + i % 28:02d}_n{i}.txt").write_text(text, encoding="utf-8")
    run = tmp_path / "run"
    slice_archive(folder, run, by="year", quiet=True)
    table = evidence.examples_for_words(run, ["the"], per_slice=2)
    assert table["original"].all()
    for row in table.itertuples():
        assert row.sentence.strip("… ") in squeeze((folder / row.document).read_text())


def test_cli_examples_prints_and_writes_csv(run, tmp_path):
    target = tmp_path / "ex.csv"
    shown = CliRunner().invoke(app, ["examples", str(run), "Police", "--examples", "2"])
    assert shown.exit_code == 0, shown.output
    assert "police" in shown.stdout.lower() and "lee-" in shown.stdout
    result = CliRunner().invoke(
        app, ["examples", str(run), "police", "--examples", "2", "--output-format", "csv",
              "-o", str(target)]
    )
    assert result.exit_code == 0, result.output
    written = pd.read_csv(target)
    assert len(written) == 4 and written["original"].all()
    as_json = CliRunner().invoke(
        app, ["examples", str(run), "police", "--output-format", "json"]
    )
    assert json.loads(as_json.stdout)[0]["word"] == "police"


def test_cli_examples_of_an_absent_word_exits_2(run):
    from drift.cli import main

    with pytest.raises(SystemExit) as caught:
        main(["examples", str(run), "qqqzzz"])
    assert caught.value.code == 2


def test_a_document_counts_once_however_often_it_uses_the_word(tmp_path):
    # document 0 fills lines 1-50 with the word, document 1 has it once on line 51
    path = tmp_path / "s.txt"
    path.write_text("word here\n" * 50 + "the word\n", encoding="utf-8")
    starts = np.array([1, 51])
    for seed in range(5):
        kept = evidence.sample_documents(
            path, "s", ["word"], starts, np.array([10, 11]), np.array(["a", "a"], dtype=object),
            per_slice=2, seed=seed,
        )["word"]
        assert sorted(pos for pos, _, _ in kept) == [10, 11]
