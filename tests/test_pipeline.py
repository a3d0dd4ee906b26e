"""End to end: ``drift demo`` and ``drift run`` against the demo archive's gold list.

The demo archive is invented (data_demo/generate.py); what is checked here is that the whole job
finds what the generator planted: data_demo/planted.csv lists words whose contexts move from one
topic to another (shift), words whose frequency alone changes about sevenfold (frequency), and
words that appear or vanish (emerging, fading).
"""

from __future__ import annotations

import json
import subprocess
import sys

from drift.compare.ranking import read_scores, read_terms
from drift.embed.training import train_run
from drift.ingest.slicing import read_summary
from drift.pipeline import DEMO_DIR, planted_words, run_all


def test_demo_prints_the_top_words_and_the_report(demo_run):
    report = demo_run.run / "charts" / "index.html"
    assert report.exists()
    assert f"Report: {report}" in demo_run.stdout
    top_word = read_scores(demo_run.run).sort_values("rank")["word"].iloc[0]
    assert top_word in demo_run.stdout


def test_demo_slices_match_the_generator_counts(demo_run):
    """drift slice's token and document counts equal the generator's own (data_demo/counts.json)."""
    expected = json.loads((DEMO_DIR / "counts.json").read_text())["decades"]
    summary = read_summary(demo_run.run).set_index("label")
    assert list(summary.index) == sorted(expected)
    for label, counts in expected.items():
        assert summary.loc[label, "documents"] == counts["documents"]
        assert summary.loc[label, "tokens"] == counts["tokens"]
        assert summary.loc[label, "types"] == counts["types"]


def test_demo_planted_shifts_come_out_on_top_and_significant(demo_run):
    scores = read_scores(demo_run.run).set_index("word")
    planted = planted_words()
    shifts = planted.loc[planted["kind"] == "shift", "word"].tolist()
    assert set(shifts) <= set(scores.index)
    ranks = scores.loc[shifts, "rank"]
    assert ranks.max() == len(shifts), f"planted shifts ranked {ranks.to_dict()}"
    assert scores.loc[shifts, "significant"].all(), scores.loc[shifts, ["z", "p", "q"]]


def test_demo_frequency_only_words_are_not_significant(demo_run):
    scores = read_scores(demo_run.run).set_index("word")
    planted = planted_words()
    frequency_only = planted.loc[planted["kind"] == "frequency", "word"].tolist()
    measured = [word for word in frequency_only if word in scores.index]
    assert len(measured) >= 5
    ratios = (scores.loc[measured, "count_to"] / scores.loc[measured, "count_from"]).abs()
    assert ((ratios > 4) | (ratios < 0.25)).all(), "the planted frequency change is there"
    assert not scores.loc[measured, "significant"].any(), scores.loc[measured, ["z", "q"]]


def test_demo_emerging_and_fading_terms_are_listed(demo_run):
    terms = read_terms(demo_run.run)
    planted = planted_words()
    for kind in ("emerging", "fading"):
        words = planted.loc[planted["kind"] == kind, "word"]
        listed = set(terms.loc[terms["kind"] == kind, "word"])
        assert set(words) <= listed, f"{kind}: {set(words) - listed} missing"


def test_demo_change_points_follow_the_planted_onsets(demo_run):
    """The change point falls in the decade of the planted onset or the one after it (a word
    planted mid-decade is only half moved in its onset decade)."""
    scores = read_scores(demo_run.run).set_index("word")
    planted = planted_words().set_index("word")
    for word, row in planted[planted["kind"] == "shift"].iterrows():
        onset_decade = int(row["onset"]) // 10 * 10
        allowed = {f"{onset_decade}s", f"{onset_decade + 10}s"}
        assert scores.loc[word, "change_point"] in allowed, (word, scores.loc[word, "change_point"])


def test_a_rerun_reuses_every_finished_stage(demo_run):
    models = train_run(demo_run.run, quiet=True)
    assert models["reused"].all()


def test_drift_run_goes_from_a_csv_to_a_report(small_demo_archive, tmp_path):
    out = tmp_path / "run"
    command = [sys.executable, "-m", "drift", "run", str(small_demo_archive), "--out", str(out),
               "--by", "decade", "--dim", "16", "--epochs", "1", "--seeds", "1",
               "--min-count", "5", "--top", "3", "--quiet"]
    done = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    assert (out / "charts" / "index.html").exists()
    ranked = subprocess.run(
        [sys.executable, "-m", "drift", "rank", str(out), "--output-format", "json", "--top", "5"],
        capture_output=True, text=True, timeout=300,
    )
    rows = json.loads(ranked.stdout)
    assert len(rows) == 5
    keys = {"word", "rank", "score", "displacement", "turnover", "z", "p", "q", "count_from",
            "count_to"}
    assert keys <= set(rows[0])


def test_drift_run_with_a_missing_source_exits_2(tmp_path):
    done = subprocess.run(
        [sys.executable, "-m", "drift", "run", str(tmp_path / "nope.csv"), "--out",
         str(tmp_path / "run")], capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "nope.csv" in done.stderr


def test_run_all_returns_the_tables_of_every_stage(small_demo_archive, tmp_path):
    result = run_all(
        small_demo_archive, tmp_path / "run", slice_options={"by": "decade"},
        train_options={"dim": 16, "epochs": 1, "seeds": 1, "min_count": 5}, report_top=2,
        quiet=True,
    )
    assert list(result.summary["label"]) == ["1950s", "1960s", "1970s", "1980s", "1990s", "2000s"]
    assert set(result.models["group"]) == {"slice", "control"}
    assert result.scores["rank"].tolist() == list(range(1, len(result.scores) + 1))
    assert result.report.exists()
