"""Example sentences drawn reproducibly from the slice files, so readers can check a change.

Each slice file is streamed once, line by line (never loaded whole). For every word and slice a
reservoir sample (Vitter's algorithm R) keeps ``per_slice`` of the lines that hold the word as a
token, with a random generator seeded from ``(seed, slice, word)``: the same call always gives
the same sentences, and a word's sample does not depend on which other words are drawn with it.
"""

from __future__ import annotations

import random
from collections.abc import Iterable, Iterator
from pathlib import Path

import pandas as pd

from drift import ranking
from drift.errors import DriftError
from drift.options import ChartOptions
from drift.runfolder import RunPaths

_CHART = ChartOptions()  # the one seed's default

#: Tokens kept on each side of the word when a line (up to 10,000 tokens) is cut to a passage.
CONTEXT_TOKENS = 20
ELLIPSIS = "…"


def passage(line: str, word: str, context: int = CONTEXT_TOKENS) -> str:
    """The part of ``line`` around the first ``word`` token, at most ``context`` tokens a side."""
    tokens = line.split()
    try:
        at = tokens.index(word)
    except ValueError:
        return " ".join(tokens[: 2 * context + 1])
    start, stop = max(0, at - context), min(len(tokens), at + context + 1)
    text = " ".join(tokens[start:stop])
    if start > 0:
        text = f"{ELLIPSIS} {text}"
    if stop < len(tokens):
        text = f"{text} {ELLIPSIS}"
    return text


#: Up to this many words, a substring test per word screens lines before they are split into
#: tokens; with more words, splitting every line once and intersecting is faster (measured by
#: benchmarks/bench_examples.py).
SUBSTRING_SCREEN_WORDS = 4


def _matching_lines(path: Path, words: set[str]) -> Iterator[tuple[int, str, list[str]]]:
    """Stream ``path``; yield (line number, line, words of ``words`` it holds as tokens)."""
    screen = len(words) <= SUBSTRING_SCREEN_WORDS
    with open(path, encoding="utf-8", errors="replace") as handle:
        for number, line in enumerate(handle, start=1):
            if screen:
                candidates = [w for w in words if w in line]
                if not candidates:
                    continue
                tokens = set(line.split())
                found = [w for w in candidates if w in tokens]
            else:
                found = sorted(words.intersection(line.split()))
            if found:
                yield number, line, found


def sample_slice(
    path: Path, label: str, words: Iterable[str], per_slice: int = 3, seed: int = 0
) -> dict[str, list[tuple[int, str]]]:
    """Reservoir samples of (line number, line) per word from one slice file, in file order."""
    words = set(words)
    rngs = {w: random.Random(f"drift-examples:{seed}:{label}:{w}") for w in words}
    seen = dict.fromkeys(words, 0)
    kept: dict[str, list[tuple[int, str]]] = {w: [] for w in words}
    if per_slice <= 0:
        return kept
    for number, line, found in _matching_lines(path, words):
        for word in found:
            seen[word] += 1
            if len(kept[word]) < per_slice:
                kept[word].append((number, line))
            else:
                slot = rngs[word].randrange(seen[word])
                if slot < per_slice:
                    kept[word][slot] = (number, line)
    return {w: sorted(lines) for w, lines in kept.items()}


def examples_for_words(
    run: Path, words: Iterable[str], per_slice: int = 3, seed: int = 0
) -> pd.DataFrame:
    """Example passages for several words, reading each slice file once.

    Returns a DataFrame with columns ``word, slice, line, sentence`` (``line``: the line number
    in ``slices/<slice>.txt``), slices in time order and lines in file order.
    """
    run = Path(run)
    words = list(dict.fromkeys(words))
    if per_slice < 0:
        raise DriftError(f"The number of examples per slice must be 0 or more, not {per_slice}.")
    rows = []
    for label in ranking.slice_labels(run):
        path = RunPaths(run).slice_file(label)
        if not path.exists():
            raise DriftError(f"Slice file {path} is missing; rerun 'drift slice' for {run}.")
        sampled = sample_slice(path, label, words, per_slice=per_slice, seed=seed)
        for word in words:
            for number, line in sampled[word]:
                rows.append(
                    {"word": word, "slice": label, "line": number, "sentence": passage(line, word)}
                )
    return pd.DataFrame(rows, columns=["word", "slice", "line", "sentence"])


def example_sentences(
    run: Path, word: str, per_slice: int = 3, seed: int = _CHART.seed
) -> pd.DataFrame:
    """Up to ``per_slice`` passages holding ``word`` from each slice, drawn reproducibly.

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.
    word : str
        The word, as tokenized (lower case unless the run keeps case).
    per_slice : int
        Passages drawn from each slice at most.
    seed : int
        Seed of the draw: the same seed gives the same passages.

    Returns
    -------
    pandas.DataFrame
        ``slice, line, sentence``: the slice label, the line of the slice file, the passage.

    Raises
    ------
    DriftError
        The folder holds no slices.

    Examples
    --------
    >>> import drift
    >>> passages = drift.example_sentences(run, "tablet", per_slice=2)
    >>> list(passages.columns)
    ['slice', 'line', 'sentence']
    >>> len(passages) >= 2
    True
    >>> all("tablet" in sentence.split() for sentence in passages["sentence"])
    True
    """
    table = examples_for_words(run, [word], per_slice=per_slice, seed=seed)
    return table.drop(columns="word").reset_index(drop=True)
