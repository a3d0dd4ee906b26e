"""End to end, as a user types it: metadata, --where, target words, evaluation and the pages'
examples on the demo archive."""

from __future__ import annotations

import json
import re
import subprocess
import sys

import pandas as pd
import pytest

from drift.ingest import documents
from drift.pipeline import planted_words
from drift.publish import report

pytestmark = pytest.mark.slow


def _drift(*args, timeout=900):
    return subprocess.run([sys.executable, "-m", "drift", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def where_run(small_demo_archive, tmp_path_factory):
    folder = tmp_path_factory.mktemp("where")
    planted = planted_words()
    words = folder / "targets.txt"
    words.write_text("\n".join(["Screen", "pitch", "nosuchword", "hovercraft"]) + "\n")
    out = folder / "run"
    done = _drift("run", small_demo_archive, "--out", out, "--meta", "source", "--id-col", "id",
                  "--where", "source!=letter", "--by", "decade", "--dim", "16", "--epochs", "2",
                  "--seeds", "1", "--min-count", "5", "--words", words, "--quiet",
                  "--output-format", "json")
    return out, done, planted, words


def test_run_with_meta_and_where_end_to_end(where_run, small_demo_archive):
    out, done, _, _ = where_run
    assert done.returncode == 0, done.stderr
    index = documents.read_documents(out)
    source = pd.read_csv(small_demo_archive)
    assert set(index["source"]) == {"gazette", "minutes"}
    assert len(index) == (source["source"] != "letter").sum()
    assert index["document"].str.startswith("pm-").all()
    composition = pd.read_csv(out / "composition.csv")
    assert set(composition["value"]) == {"gazette", "minutes"}
    assert (out / "documents.csv").exists() and (out / "timeline.csv").exists()
    assert (out / "terms.csv").exists() and (out / "scores.csv").exists()


def test_target_words_are_shown_and_the_unmeasured_explained(where_run):
    out, done, _, _ = where_run
    shown = json.loads(done.stdout)
    assert {row["word"] for row in shown} <= {"screen", "pitch"}
    assert "not measured: nosuchword: does not occur in the archive" in done.stderr
    assert "not measured: hovercraft:" in done.stderr  # absent before 1966
    html = (out / "charts" / "index.html").read_text(encoding="utf-8")
    assert "Target words not measured" in html


def test_target_word_page_quotes_original_documents(where_run, small_demo_archive):
    out, _, _, _ = where_run
    page = report.word_page_path(out, "screen").read_text(encoding="utf-8")
    examples = page.split('id="examples"')[1]
    source = pd.read_csv(small_demo_archive).set_index("id")
    ids = re.findall(r"document <b>(pm-\d+)</b> · (\d{4}-\d{2}-\d{2}) · source: (\w+)", examples)
    assert len(ids) >= 6
    for doc, date, kind in ids:
        assert source.loc[doc, "date"] == date and source.loc[doc, "source"] == kind != "letter"
    assert re.search(r"<mark>[Ss]creen</mark>", examples)


def test_evaluate_against_the_planted_gold(where_run, tmp_path):
    out, _, planted, _ = where_run
    gold = tmp_path / "gold.csv"
    chosen = planted[planted["kind"].isin(["shift", "frequency"])]
    pd.DataFrame({"word": chosen["word"], "changed": (chosen["kind"] == "shift").astype(int)}) \
        .to_csv(gold, index=False)
    done = _drift("evaluate", out, "--gold", gold, "--output-format", "json")
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["kind"] == "binary" and result["n"] >= 6
    assert -1 <= result["rho"] <= 1 and result["ci_low"] <= result["rho"] <= result["ci_high"]


def test_bad_metadata_options_exit_2(small_demo_archive, tmp_path):
    done = _drift("slice", small_demo_archive, "--out", tmp_path / "a", "--meta", "author")
    assert done.returncode == 2
    assert "no column 'author' (--meta); its columns are: id, date, source, text" in done.stderr
    done = _drift("slice", small_demo_archive, "--out", tmp_path / "b", "--where", "source=diary")
    assert done.returncode == 2 and "keeps no document" in done.stderr
    assert "gazette: " in done.stderr and "letter: " in done.stderr
    done = _drift("slice", small_demo_archive, "--out", tmp_path / "c", "--where", "source")
    assert done.returncode == 2 and "column=value" in done.stderr


def test_demo_pages_of_planted_words_quote_the_documents(demo_run):
    planted = planted_words()
    for word in planted.loc[planted["kind"] != "frequency", "word"]:
        path = report.word_page_path(demo_run.run, word)
        if not path.exists():  # not among the charted words: chart it as a user would
            done = _drift("chart", demo_run.run, word)
            assert done.returncode == 0, done.stderr
        examples = path.read_text(encoding="utf-8").split('id="examples"')[1]
        cited = r"document <b>pm-\d+</b> · \d{4}-\d{2}-\d{2} · source: \w+"
        assert re.search(cited, examples), word
        assert f"<mark>{word.capitalize()}</mark>" in examples or f"<mark>{word}</mark>" in examples
