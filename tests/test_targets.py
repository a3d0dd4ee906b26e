"""Target words (--words): exactly those words scored, and a reason for each one not measured."""

from __future__ import annotations

import json

import pandas as pd
import pytest
from chart_run_fixture import fixture_run_copy
from typer.testing import CliRunner

from drift import runfolder
from drift.cli.app import app
from drift.compare import targets
from drift.compare.ranking import read_scores, read_terms
from drift.errors import DriftError
from drift.publish import report


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    root = fixture_run_copy(tmp_path_factory.mktemp("targets") / "run")
    manifest = runfolder.read_manifest(root)
    manifest["stages"]["train"]["params"]["min_count"] = 5  # the fixture's models use 5
    runfolder.write_json_atomic(runfolder.RunPaths(root).manifest, manifest)
    return root


def test_word_lists_as_lines_or_csv(tmp_path):
    lines = tmp_path / "words.txt"
    lines.write_text("\ufeffPolice\n\n# a comment\nfire\npolice\n", encoding="utf-8")
    assert targets.read_word_list(lines) == ["Police", "fire", "police"]
    table = tmp_path / "words.csv"
    table.write_text("word,note\nfire,x\ngovernment,y\n", encoding="utf-8")
    assert targets.read_word_list(table) == ["fire", "government"]
    (tmp_path / "bad.csv").write_text("term\nfire\n", encoding="utf-8")
    with pytest.raises(DriftError, match="no 'word' column .*term"):
        targets.read_word_list(tmp_path / "bad.csv")
    with pytest.raises(DriftError, match="no word list"):
        targets.read_word_list(tmp_path / "none.txt")


def test_exactly_the_target_words_and_reasons_for_the_rest(run):
    counts = pd.read_parquet(runfolder.RunPaths(run).counts).set_index("word")
    scores = read_scores(run)
    measured = scores["word"].iloc[[0, 5, 40]].tolist()
    rare = counts.index[(counts["2001"] > 0) & (counts["2001"] < 5) & (counts["2003"] >= 5)][0]
    absent = counts.index[(counts["2001"] == 0) & (counts["2003"] > 0)][0]
    wanted = [measured[2], "Zzzqx", rare, measured[0], absent, measured[1]]
    rows, missing = targets.target_scores(run, wanted)
    assert rows["word"].tolist() == measured  # best first
    reasons = dict(zip(missing["word"], missing["reason"], strict=True))
    assert list(reasons) == ["zzzqx", rare, absent]
    assert reasons["zzzqx"].startswith("does not occur in the archive")
    assert f"occurs {counts.at[rare, '2001']} times in slice 2001, under the minimum count 5" \
        in reasons[rare]
    assert "does not occur in slice 2001" in reasons[absent]


def test_cli_rank_with_words(run, tmp_path):
    scores = read_scores(run)
    words = tmp_path / "w.txt"
    words.write_text(f"{scores['word'].iloc[3]}\n{scores['word'].iloc[1]}\nzzzqx\n")
    result = CliRunner().invoke(
        app, ["rank", str(run), "--words", str(words), "--output-format", "json", "-q"]
    )
    assert result.exit_code == 0, result.output
    shown = json.loads(result.stdout)
    # Exactly the two words asked for, in the order of the ranking the command left behind.
    ranked = read_scores(run)["word"].tolist()
    asked = set(scores["word"].iloc[[1, 3]])
    assert [row["word"] for row in shown] == [w for w in ranked if w in asked]
    assert "not measured: zzzqx: does not occur in the archive" in result.stderr


def test_report_with_words_charts_those_and_lists_the_rest(run, tmp_path):
    scores = read_scores(run)
    chosen = scores["word"].iloc[[2, 9]].tolist()
    words = tmp_path / "w.txt"
    words.write_text("\n".join([*chosen, "zzzqx"]) + "\n")
    index = report.build_report(run, words=words, examples=1)
    html = index.read_text(encoding="utf-8")
    assert "Target words not measured" in html and "zzzqx" in html
    for word in chosen:
        assert report.word_page_path(run, word).exists()
    ranked = html.split('id="ranked"')[1].split('id="scatter"')[0]
    assert ranked.count("<tr data-word=") == len(chosen)


def test_terms_get_pages_linked_from_the_report(run):
    terms = read_terms(run)
    index = report.build_report(run, top=2, examples=1)
    html = index.read_text(encoding="utf-8")
    shown = report.shown_terms(terms, "emerging")
    assert len(shown)
    for word in shown["word"]:
        page = report.word_page_path(run, word)
        assert page.exists() and f'href="words/{page.name}"' in html
    page = report.word_page_path(run, shown["word"].iloc[0]).read_text(encoding="utf-8")
    assert "emerging term" in page and "at least" in page and 'id="examples"' in page
