"""A ranking judged against gold values: graded change scores or changed/unchanged labels.

A gold file is a CSV with a ``word`` column and either ``score`` (graded change, any numbers) or
``changed`` (1 for changed, 0 for unchanged). The two kinds follow the two tasks of the published
SemEval-2020 Task 1 protocol (Schlechtweg et al. 2020): graded change is judged by Spearman's rank
correlation, binary change by accuracy (we add precision, recall and F1).

* Spearman's rho and its two-sided p-value come from ``scipy.stats.spearmanr``; the 95%
  confidence interval is Fisher's z transformation, ``tanh(atanh(rho) +- 1.96 / sqrt(n - 3))``
  (Fisher 1915; the usual large-sample interval, applied to Spearman's rho as is common practice).
* The prediction for binary gold is the run's ``significant`` column (q <= alpha of the rank
  stage); it needs a run with a control.
* The system's value for the correlation is the column the run is ordered by: ``z`` when the run
  has a control, else ``score`` (``by`` chooses another).
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift.errors import DriftError

CONFIDENCE = 0.95
GOLD_KINDS = {"score": "graded", "changed": "binary"}


@dataclass
class Evaluation:
    """What :func:`evaluate_run` found; ``pairs`` holds word, gold, system value, prediction."""

    kind: str
    by: str
    n: int
    rho: float
    p: float
    ci_low: float
    ci_high: float
    accuracy: float | None = None
    precision: float | None = None
    recall: float | None = None
    f1: float | None = None
    confusion: dict[str, int] | None = None
    pairs: pd.DataFrame = field(default_factory=pd.DataFrame)
    unmeasured: pd.DataFrame = field(default_factory=pd.DataFrame)
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        keys = ("kind", "by", "n", "rho", "p", "ci_low", "ci_high", "accuracy", "precision",
                "recall", "f1", "confusion")
        return {k: getattr(self, k) for k in keys} | {
            "ci_method": "Fisher z, 95%",
            "unmeasured": self.unmeasured.to_dict(orient="records"),
        }


def read_gold(path: str | Path) -> tuple[pd.DataFrame, str]:
    """A gold file as (word, gold) rows and its kind ('graded' or 'binary'); a bad value or a
    repeated word is an error naming its line."""
    path = Path(path)
    if not path.is_file():
        raise DriftError(f"There is no gold file at {path}; give a CSV with word,score or "
                         "word,changed.")
    text = path.read_text(encoding="utf-8", errors="replace").lstrip("\ufeff")
    try:
        table = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise DriftError(f"The gold file {path} is not a readable CSV ({exc}); write one "
                         "word,score line per word.") from None
    table.columns = [str(c).strip() for c in table.columns]
    value_col = next((c for c in GOLD_KINDS if c in table.columns), None)
    if "word" not in table.columns or value_col is None:
        raise DriftError(
            f"The gold file {path} needs a 'word' column and a 'score' (graded) or 'changed' "
            f"(0/1) column; its columns are: {', '.join(table.columns)}."
        )
    kind = GOLD_KINDS[value_col]
    seen: dict[str, int] = {}
    words, values = [], []
    for i, (word, raw) in enumerate(zip(table["word"], table[value_col], strict=True)):
        line = i + 2  # the header is line 1
        word = word.strip()
        if not word:
            raise DriftError(f"Line {line} of {path} has no word; fill it in or remove the line.")
        try:
            value = float(raw.strip())
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            raise DriftError(
                f"Line {line} of {path} has '{raw}' as its {value_col}, which is not a number; "
                "give a number."
            )
        if kind == "binary" and value not in (0.0, 1.0):
            raise DriftError(
                f"Line {line} of {path} has changed = '{raw}'; write 1 (changed) or 0 (unchanged)."
            )
        if word in seen:
            raise DriftError(
                f"Line {line} of {path} repeats the word '{word}' (first on line {seen[word]}); "
                "keep one line per word."
            )
        seen[word] = line
        words.append(word)
        values.append(value)
    if not words:
        raise DriftError(f"The gold file {path} holds no words.")
    return pd.DataFrame({"word": words, "gold": values}), kind


def fisher_interval(rho: float, n: int, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """The confidence interval of a correlation by Fisher's z transformation (needs n > 3).

    Examples
    --------
    >>> [round(x, 4) for x in fisher_interval(0.5, 28)]
    [0.156, 0.7358]
    """
    if n <= 3 or not np.isfinite(rho):
        return math.nan, math.nan
    if abs(rho) >= 1:
        return float(rho), float(rho)
    z = math.atanh(rho)
    half = stats.norm.ppf(0.5 + confidence / 2) / math.sqrt(n - 3)
    return math.tanh(z - half), math.tanh(z + half)


def binary_scores(gold: np.ndarray, predicted: np.ndarray) -> dict[str, Any]:
    """Accuracy, precision, recall and F1 (harmonic mean of precision and recall) of 0/1
    predictions, with the confusion counts; an undefined ratio (0/0) is NaN."""
    gold, predicted = np.asarray(gold, bool), np.asarray(predicted, bool)
    tp = int((gold & predicted).sum())
    fp = int((~gold & predicted).sum())
    fn = int((gold & ~predicted).sum())
    tn = int((~gold & ~predicted).sum())

    def ratio(a: int, b: int) -> float:
        return a / b if b else math.nan

    precision, recall = ratio(tp, tp + fp), ratio(tp, tp + fn)
    f1 = (2 * precision * recall / (precision + recall)
          if precision + recall > 0 else math.nan)
    return {
        "accuracy": ratio(tp + tn, len(gold)), "precision": precision, "recall": recall,
        "f1": f1, "confusion": {"tp": tp, "fp": fp, "fn": fn, "tn": tn},
    }


def evaluate_scores(
    scores: pd.DataFrame, gold: pd.DataFrame, kind: str, by: str | None = None
) -> Evaluation:
    """Judge a scores table against gold rows (word, gold)."""
    if by is None:
        by = "z" if "z" in scores and scores["z"].notna().any() else "score"
    if by not in scores.columns:
        raise DriftError(f"--by {by} is not a column of the scores; use score, z, displacement, "
                         "turnover or local.")
    merged = gold.merge(scores, on="word", how="inner")
    merged = merged[merged[by].notna()]
    n = len(merged)
    notes = []
    if n < 3:
        raise DriftError(
            f"Only {n} gold word{'s are' if n != 1 else ' is'} measured in this run; a "
            "correlation needs at least 3 (see which words are missing with --format json)."
        )
    result = stats.spearmanr(merged["gold"], merged[by])
    rho, p = float(result.statistic), float(result.pvalue)
    low, high = fisher_interval(rho, n)
    if n <= 3:
        notes.append("the confidence interval needs more than 3 words.")
    pairs = pd.DataFrame({"word": merged["word"], "gold": merged["gold"], by: merged[by]})
    evaluation = Evaluation(kind, by, n, rho, p, low, high, pairs=pairs, notes=notes)
    if kind == "binary":
        if "significant" not in merged or scores["z"].isna().all():
            notes.append("the run has no control, so nothing is marked significant; accuracy "
                         "and F1 need a run trained with a control.")
        else:
            predicted = merged["significant"].fillna(False).astype(bool).to_numpy()
            evaluation.pairs["significant"] = predicted
            for key, value in binary_scores(merged["gold"].to_numpy() == 1, predicted).items():
                setattr(evaluation, key, value)
    return evaluation


def evaluate_run(run: str | Path, gold_path: str | Path, by: str | None = None) -> Evaluation:
    r"""Judge a ranked run against a gold file.

    Parameters
    ----------
    run : str or Path
        A ranked run folder.
    gold_path : str or Path
        CSV with ``word,score`` (graded) or ``word,changed`` (0/1).
    by : str, optional
        The scores column to correlate (default: ``z`` with a control, else ``score``).

    Returns
    -------
    Evaluation
        ``rho``, ``p``, ``ci_low``, ``ci_high`` (95%, Fisher z), ``n``; for 0/1 gold also
        ``accuracy``, ``precision``, ``recall``, ``f1`` and ``confusion``; ``unmeasured``: the
        gold words without a score and why.

    Raises
    ------
    DriftError
        A bad gold file (the message names the line), or fewer than 3 gold words measured.

    Examples
    --------
    >>> import drift
    >>> scores = drift.read_scores(run).head(6)
    >>> _ = (workdir / "gold.csv").write_text(
    ...     "word,score\n" + "".join(f"{w},{6 - i}\n" for i, w in enumerate(scores["word"])))
    >>> result = drift.evaluate_run(run, workdir / "gold.csv")
    >>> result.n, round(result.rho, 3)
    (6, 1.0)
    """
    from drift.compare.ranking import read_scores
    from drift.compare.targets import normalise_words, run_keeps_case, target_scores

    gold, kind = read_gold(gold_path)
    keep_case = run_keeps_case(run)
    gold["word"] = [normalise_words([w], keep_case)[0] for w in gold["word"]]
    if gold["word"].duplicated().any():
        word = gold.loc[gold["word"].duplicated(), "word"].iloc[0]
        raise DriftError(
            f"The gold file {gold_path} lists '{word}' twice once case is folded as the run "
            "folds it; keep one line per word."
        )
    scores = read_scores(run)
    _, unmeasured = target_scores(run, gold["word"].tolist(), scores)
    evaluation = evaluate_scores(scores, gold, kind, by)
    evaluation.unmeasured = unmeasured
    return evaluation
