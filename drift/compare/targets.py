"""Target words: a study's own list of words, scored exactly, with a reason for each one that
could not be measured.

A word list (``--words FILE``) is a text file with one word per line (blank lines and lines that
start with ``#`` are skipped), or a CSV file with a ``word`` column. Words are normalised the way
the run's tokens were (Unicode NFC, lower-cased unless the run kept case).
"""

from __future__ import annotations

import unicodedata
from collections.abc import Iterable, Sequence
from pathlib import Path

import pandas as pd

from drift import runfolder
from drift.errors import DriftError, close_matches

UNMEASURED_COLUMNS = ["word", "reason"]


def read_word_list(path: str | Path) -> list[str]:
    r"""The words of a word-list file, in file order, each once.

    Parameters
    ----------
    path : str or Path
        One word per line (blank lines and ``#`` lines skipped), or a CSV with a ``word`` column.

    Returns
    -------
    list of str

    Raises
    ------
    DriftError
        A missing file, a CSV without a ``word`` column, or no words.

    Examples
    --------
    >>> _ = (workdir / "words.txt").write_text("tablet\n# planted\nscreen\ntablet\n")
    >>> read_word_list(workdir / "words.txt")
    ['tablet', 'screen']
    """
    path = Path(path)
    if not path.is_file():
        raise DriftError(f"There is no word list at {path}; give a file with one word per line.")
    text = path.read_text(encoding="utf-8", errors="replace")
    lines = text.splitlines()
    header = lines[0].strip().lstrip("\ufeff") if lines else ""
    if path.suffix.lower() == ".csv" or "," in header:
        import io

        table = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
        columns = [str(c).strip().lstrip("\ufeff") for c in table.columns]
        table.columns = columns
        if "word" not in columns:
            raise DriftError(
                f"The word list {path} has no 'word' column (its columns are: "
                f"{', '.join(columns)}); name the column of words 'word'."
            )
        words = [w.strip() for w in table["word"]]
    else:
        words = [line.strip().lstrip("\ufeff") for line in lines]
        words = [w for w in words if not w.startswith("#")]
    words = [w for w in words if w]
    if not words:
        raise DriftError(f"The word list {path} holds no words; put one word per line.")
    return list(dict.fromkeys(words))


def normalise_words(words: Iterable[str], keep_case: bool = False) -> list[str]:
    """Words as the run's tokens are written: NFC, lower-cased unless ``keep_case``."""
    out = []
    for word in words:
        word = unicodedata.normalize("NFC", str(word).strip())
        out.append(word if keep_case else word.lower())
    return list(dict.fromkeys(out))


def run_keeps_case(run: str | Path) -> bool:
    params = runfolder.read_manifest(Path(run)).get("stages", {}).get("slice", {}).get(
        "params", {}
    )
    return bool(params.get("keep_case"))


def _min_count(run: Path) -> int | None:
    params = runfolder.read_manifest(run).get("stages", {}).get("train", {}).get("params", {})
    value = params.get("min_count")
    return int(value) if value is not None else None


def unmeasured_reasons(run: str | Path, words: Sequence[str], pair: Sequence[str]) -> pd.DataFrame:
    """Why each of ``words`` has no score: it does not occur in a compared slice, occurs there
    under the training's minimum count, or is missing from the archive altogether."""
    from drift.ingest.slicing import read_counts

    run = Path(run)
    counts = read_counts(run)
    minimum = _min_count(run)
    rows = []
    for word in words:
        if word not in counts.index:
            hint = close_matches(word, counts.index[:50_000])
            rows.append({"word": word, "reason": "does not occur in the archive"
                         + (f" (close: {', '.join(hint)})" if hint else "")})
            continue
        reasons = []
        for label in pair:
            n = int(counts.at[word, label]) if label in counts.columns else 0
            if n == 0:
                reasons.append(f"does not occur in slice {label}")
            elif minimum is not None and n < minimum:
                reasons.append(f"occurs {n:,} times in slice {label}, under the minimum count "
                               f"{minimum} (--min-count)")
        if not reasons:
            reasons.append(f"not in the trained vocabulary of slices {pair[0]} and {pair[1]}")
        rows.append({"word": word, "reason": "; ".join(reasons)})
    return pd.DataFrame(rows, columns=UNMEASURED_COLUMNS)


def target_scores(
    run: str | Path, words: Sequence[str], scores: pd.DataFrame | None = None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The scores rows of exactly ``words`` (best first), and why each other word has none.

    Parameters
    ----------
    run : str or Path
        A ranked run folder.
    words : sequence of str
        The target words (normalised as the run's tokens: NFC, lower case unless it kept case).
    scores : pandas.DataFrame, optional
        The run's scores, when already read.

    Returns
    -------
    rows : pandas.DataFrame
        The scores rows of the measured target words, ordered by rank.
    unmeasured : pandas.DataFrame
        ``word, reason`` for each target word without a score.

    Raises
    ------
    DriftError
        The run has no scores yet.

    Examples
    --------
    >>> import drift
    >>> rows, unmeasured = drift.target_scores(run, ["Tablet", "zzzq"])
    >>> rows["word"].tolist(), unmeasured["reason"].tolist()
    (['tablet'], ['does not occur in the archive'])
    """
    from drift.compare.ranking import rank_record, read_scores

    run = Path(run)
    words = normalise_words(words, run_keeps_case(run))
    scores = read_scores(run) if scores is None else scores
    found = scores[scores["word"].isin(words)].sort_values("rank", kind="stable")
    missing = [w for w in words if w not in set(found["word"])]
    pair = rank_record(run).get("params", {}).get("between") or []
    reasons = unmeasured_reasons(run, missing, pair) if missing else pd.DataFrame(
        columns=UNMEASURED_COLUMNS
    )
    return found.reset_index(drop=True), reasons
