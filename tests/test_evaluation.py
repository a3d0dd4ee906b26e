"""Judging a ranking against gold values: Spearman's rho, its Fisher-z interval, accuracy/F1."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from chart_run_fixture import fixture_run_copy
from typer.testing import CliRunner

from drift.cli.app import app
from drift.compare.ranking import read_scores
from drift.errors import DriftError
from drift.validate import evaluation

# The worked example of Spearman's rank correlation in the Wikipedia article "Spearman's rank
# correlation coefficient" (values recalled from memory): IQ and hours of television per week of
# ten people. By hand: the ranks give sum(d^2) = 194, so rho = 1 - 6 * 194 / (10 * (10^2 - 1))
# = 1 - 1164 / 990 = -29/165 (Spearman 1904; no ties, so the formula is exact).
IQ = [106, 100, 86, 101, 99, 103, 97, 113, 112, 110]
TV = [7, 27, 2, 50, 28, 29, 20, 12, 6, 17]


def _ranks(values):
    order = sorted(values)
    return [order.index(v) + 1 for v in values]


def test_spearman_matches_the_hand_computed_textbook_example():
    d2 = sum((a - b) ** 2 for a, b in zip(_ranks(IQ), _ranks(TV), strict=True))
    assert d2 == 194
    scores = pd.DataFrame({"word": [f"w{i}" for i in range(10)], "score": TV,
                           "z": np.nan, "significant": False})
    gold = pd.DataFrame({"word": [f"w{i}" for i in range(10)], "gold": [float(v) for v in IQ]})
    result = evaluation.evaluate_scores(scores, gold, "graded")
    assert result.by == "score" and result.n == 10
    assert result.rho == pytest.approx(-29 / 165)
    assert result.ci_low < result.rho < result.ci_high


def test_fisher_interval_by_hand():
    # rho = 0.5, n = 28: z = atanh(0.5) = 0.549306, half width = 1.959964 / sqrt(25) = 0.391993,
    # interval tanh(0.157313) = 0.156028 to tanh(0.941299) = 0.735818 (by hand, with
    # tanh(x) = (e^2x - 1) / (e^2x + 1); Fisher 1915)
    low, high = evaluation.fisher_interval(0.5, 28)
    assert low == pytest.approx(0.156028, abs=1e-5)
    assert high == pytest.approx(0.735818, abs=1e-5)
    assert all(math.isnan(v) for v in evaluation.fisher_interval(0.5, 3))


def test_accuracy_precision_recall_f1_by_hand():
    # 10 words: 3 changed and flagged, 1 flagged only, 2 changed but missed, 4 neither.
    # accuracy (3 + 4) / 10 = 0.7; precision 3 / 4 = 0.75; recall 3 / 5 = 0.6;
    # F1 = 2 * 0.75 * 0.6 / (0.75 + 0.6) = 0.9 / 1.35 = 2/3 (van Rijsbergen's F with beta = 1)
    gold = np.array([1, 1, 1, 0, 1, 1, 0, 0, 0, 0])
    flagged = np.array([1, 1, 1, 1, 0, 0, 0, 0, 0, 0])
    found = evaluation.binary_scores(gold, flagged)
    assert found["confusion"] == {"tp": 3, "fp": 1, "fn": 2, "tn": 4}
    assert found["accuracy"] == pytest.approx(0.7)
    assert found["precision"] == pytest.approx(0.75)
    assert found["recall"] == pytest.approx(0.6)
    assert found["f1"] == pytest.approx(2 / 3)


def _write(tmp_path, text: str):
    path = tmp_path / "gold.csv"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("word,score\na,0.5\nb,high\n", "Line 3 of .* 'high' as its score, which is not a"),
        ("word,score\na,0.5\nb,0.1\na,0.2\n",
         "Line 4 of .* repeats the word 'a' \\(first on line 2\\)"),
        ("word,changed\na,1\nb,2\n", "Line 3 of .* changed = '2'; write 1"),
        ("term,value\na,1\n", "needs a 'word' column .* its columns are: term, value"),
        ("word,score\n,0.5\n", "Line 2 of .* has no word"),
        ("word,score\na,nan\n", "Line 2 of .* not a number"),
    ],
)
def test_bad_gold_files_name_the_line(tmp_path, text, message):
    with pytest.raises(DriftError, match=message):
        evaluation.read_gold(_write(tmp_path, text))


def test_gold_kinds(tmp_path):
    table, kind = evaluation.read_gold(_write(tmp_path, "word,changed\nx,1\ny,0\n"))
    assert kind == "binary" and table["gold"].tolist() == [1.0, 0.0]
    _, kind = evaluation.read_gold(_write(tmp_path, "\ufeffword,score\nx,0.3\n"))
    assert kind == "graded"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return fixture_run_copy(tmp_path_factory.mktemp("evaluate") / "run")


def test_evaluate_a_run_against_graded_gold(run, tmp_path):
    scores = read_scores(run)
    chosen = scores.iloc[::7].head(12)
    # gold = the run's own z with noise: rho must agree with scipy on the same pairs
    rng = np.random.default_rng(0)
    values = chosen["z"].to_numpy() + rng.normal(0, 0.5, len(chosen))
    rows = "".join(f"{w},{v}\n" for w, v in zip(chosen["word"], values, strict=True))
    gold = _write(tmp_path, "word,score\n" + rows + "nosuchwordzz,1.0\n")
    result = evaluation.evaluate_run(run, gold)
    from scipy.stats import spearmanr  # the reference implementation

    expected = spearmanr(values, chosen["z"])
    assert result.by == "z" and result.n == len(chosen)
    assert result.rho == pytest.approx(expected.statistic)
    assert result.p == pytest.approx(expected.pvalue)
    assert result.unmeasured["word"].tolist() == ["nosuchwordzz"]
    assert "does not occur in the archive" in result.unmeasured["reason"].iloc[0]


def test_evaluate_binary_gold_uses_the_significance_flag(run, tmp_path):
    scores = read_scores(run)
    chosen = pd.concat([scores.head(6), scores.tail(6)])
    gold = _write(tmp_path, "word,changed\n" + "".join(
        f"{w},{int(i < 6)}\n" for i, w in enumerate(chosen["word"])))
    result = evaluation.evaluate_run(run, gold)
    flagged = chosen["significant"].to_numpy(bool)
    truth = np.arange(12) < 6
    assert result.accuracy == pytest.approx((flagged == truth).mean())
    assert sum(result.confusion.values()) == 12


def test_cli_evaluate_prints_rho_and_lists_unmeasured(run, tmp_path):
    scores = read_scores(run)
    rows = "".join(f"{w},{i}\n" for i, w in enumerate(scores["word"].head(8)))
    gold = _write(tmp_path, "word,score\n" + rows + "zzzunknown,3\n")
    result = CliRunner().invoke(app, ["evaluate", str(run), "--gold", str(gold)])
    assert result.exit_code == 0, result.output
    assert "Spearman's rho = " in result.stdout and "Fisher z" in result.stdout
    assert "not measured: zzzunknown" in result.stderr
    as_json = CliRunner().invoke(
        app, ["evaluate", str(run), "--gold", str(gold), "--output-format", "json"]
    )
    data = json.loads(as_json.stdout)
    assert data["n"] == 8 and data["ci_method"] == "Fisher z, 95%"


def test_cli_bad_gold_exits_2(run, tmp_path):
    from drift.cli import main

    gold = _write(tmp_path, "word,score\na,1\nb,x\n")
    with pytest.raises(SystemExit) as caught:
        main(["evaluate", str(run), "--gold", str(gold)])
    assert caught.value.code == 2
