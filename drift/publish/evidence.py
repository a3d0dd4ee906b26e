"""Example passages from the original documents, drawn reproducibly, so readers can check a change.

How examples are drawn (:func:`examples_for_words`):

1. Each slice file is streamed once, line by line (never loaded whole), and every line that holds
   a wanted word as a token is matched to its document through the document index
   (``documents.parquet``: each document's first line and number of lines in the slice file).
2. Per word and slice, one reservoir sample (Vitter's algorithm R) of *documents* is kept for each
   value of the run's first ``--meta`` column, with a random generator seeded from
   ``(seed, slice, word, value)``: the same call gives the same examples, and a word's sample does
   not depend on which other words are drawn with it. A document counts once however often it
   uses the word. The examples of a slice are then taken in turn from each value (sorted), so
   they spread over documents and sources.
3. The chosen documents' original text is read from the source in one pass that stops after the
   last row needed (a folder of .txt files: only the files needed), and the first use of the word
   is cut out with its context as written: case, punctuation and script untouched.

When the run has no document index, or its source is gone or changed since slicing, the
passages come from the tokenized slice files instead (``original`` is False) and a note says why.
"""

from __future__ import annotations

import random
import re
import unicodedata
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from drift import runfolder
from drift.errors import DriftError
from drift.ingest import documents
from drift.options import ChartOptions
from drift.runfolder import RunPaths

_CHART = ChartOptions()  # the one seed's default

#: Tokens kept on each side of the word when a tokenized line is cut to a passage.
CONTEXT_TOKENS = 20
#: Characters of original text kept on each side of the word (cut at white space).
CONTEXT_CHARS = 120
ELLIPSIS = "…"
#: Columns of an examples table, before and after the run's metadata columns.
LEAD_COLUMNS = ["word", "slice", "document", "date"]
TAIL_COLUMNS = ["left", "match", "right", "sentence", "source_row", "source_file", "line",
                "original"]


def passage(line: str, word: str, context: int = CONTEXT_TOKENS) -> str:
    """The part of ``line`` around the first ``word`` token, at most ``context`` tokens a side."""
    left, match, right = token_context(line, word, context)
    return f"{left}{match}{right}"


def token_context(line: str, word: str, context: int = CONTEXT_TOKENS) -> tuple[str, str, str]:
    """(left, word, right) around the first ``word`` token of a tokenized line; ``left`` ends and
    ``right`` starts with the space between them and the word."""
    tokens = line.split()
    try:
        at = tokens.index(word)
    except ValueError:
        return " ".join(tokens[: 2 * context + 1]), "", ""
    start, stop = max(0, at - context), min(len(tokens), at + context + 1)
    left = " ".join([ELLIPSIS] * (start > 0) + tokens[start:at] + [""])
    right = " ".join([""] + tokens[at + 1 : stop] + [ELLIPSIS] * (stop < len(tokens)))
    return left.lstrip(), tokens[at], right.rstrip()


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
    """Reservoir samples of (line number, line) per word from one slice file, in file order
    (used when a run has no document index)."""
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


# ---------------------------------------------------------------------------- documents per slice


@dataclass
class _Reservoir:
    """Algorithm R over documents: (index position, line number, line) kept."""

    rng: random.Random
    size: int
    seen: int = 0
    kept: list[tuple[int, int, str]] = field(default_factory=list)

    def offer(self, item: tuple[int, int, str]) -> None:
        self.seen += 1
        if len(self.kept) < self.size:
            self.kept.append(item)
            return
        slot = self.rng.randrange(self.seen)
        if slot < self.size:
            self.kept[slot] = item


def sample_documents(
    path: Path,
    label: str,
    words: Iterable[str],
    starts: np.ndarray,
    positions: np.ndarray,
    strata: np.ndarray,
    per_slice: int,
    seed: int,
) -> dict[str, list[tuple[int, int, str]]]:
    """Up to ``per_slice`` documents per word from one slice file, spread over the strata.

    ``starts`` (sorted) are the documents' first lines in the file, ``positions`` their rows in
    the index and ``strata`` their metadata values. Returns (index row, line number, line) per
    word, in file order.
    """
    words = set(words)
    reservoirs: dict[str, dict[str, _Reservoir]] = {w: {} for w in words}
    last_doc = dict.fromkeys(words, -1)
    if per_slice <= 0 or len(starts) == 0:
        return {w: [] for w in words}
    for number, line, found in _matching_lines(path, words):
        at = int(np.searchsorted(starts, number, side="right")) - 1
        if at < 0:
            continue
        for word in found:
            if last_doc[word] == at:  # one example per document
                continue
            last_doc[word] = at
            stratum = str(strata[at])
            pool = reservoirs[word].get(stratum)
            if pool is None:
                rng = random.Random(f"drift-examples:{seed}:{label}:{word}:{stratum}")
                pool = reservoirs[word][stratum] = _Reservoir(rng, per_slice)
            pool.offer((int(positions[at]), number, line))
    chosen = {}
    for word, pools in reservoirs.items():
        queues = [sorted(pools[s].kept, key=lambda item: item[1]) for s in sorted(pools)]
        picks: list[tuple[int, int, str]] = []
        while len(picks) < per_slice and any(queues):
            for queue in queues:
                if queue and len(picks) < per_slice:
                    picks.append(queue.pop(0))
        chosen[word] = sorted(picks, key=lambda item: item[1])
    return chosen


# ---------------------------------------------------------------------------- original text


def _slice_record(run: Path) -> dict:
    return runfolder.read_manifest(run).get("stages", {}).get("slice", {})


def source_problem(run: Path) -> str | None:
    """Why the original texts cannot be read (None when they can)."""
    record = _slice_record(run)
    source = record.get("source")
    if not source:
        return "the run does not record its source"
    if record.get("sources"):
        return "the run was sliced from several files"
    if len(record.get("history") or []) > 1:
        return "documents were appended to the run from other sources (drift slice --append)"
    path = Path(source)
    if not path.exists():
        return f"its source {path} is no longer there"
    if record.get("inputs") and runfolder.fingerprint_path(path) != record["inputs"]:
        return f"its source {path} changed after slicing"
    return None


def original_texts(run: Path, rows: Iterable[int], files: Iterable[str] = ()) -> dict:
    """The original text of documents by source row (and, for a folder of .txt files, by file
    name), read in one pass that stops after the last row wanted."""
    from drift.ingest.readers import open_source

    record = _slice_record(run)
    params = record.get("params", {})
    source = Path(record["source"])
    options = {k: params.get(k) for k in ("encoding", "delimiter") if params.get(k) is not None}
    texts: dict = {}
    if params.get("format") == "txt":
        for name in dict.fromkeys(files):
            reader = open_source(source / name if source.is_dir() else source, "txt", **options)
            texts[name] = "".join(
                "".join(batch.texts.to_pylist()) for batch in reader.batches()
            )
        return texts
    wanted = sorted(set(rows))
    if not wanted:
        return texts
    reader = open_source(source, params.get("format"), params.get("time_col"),
                         params.get("text_col"), **options)
    wanted_set, last = set(wanted), wanted[-1]
    row = 0
    for batch in reader.batches():
        first = row + 1
        row += len(batch)
        if row < wanted[0]:
            continue
        values = batch.texts.to_pylist()
        for number in range(first, row + 1):
            if number in wanted_set:
                value = values[number - first]
                texts[number] = "" if value is None else value
        if row >= last:
            break
    return texts


def _is_token_char(ch: str, pretokenized: bool) -> bool:
    if pretokenized:
        return not ch.isspace()
    category = unicodedata.category(ch)
    return category[0] in "LMN" or category == "Pc"


_SPACES = re.compile(r"\s+")


def _squeeze(text: str) -> str:
    return _SPACES.sub(" ", text)


def original_context(
    text: str, word: str, *, keep_case: bool = False, pretokenized: bool = False,
    context: int = CONTEXT_CHARS,
) -> tuple[str, str, str] | None:
    """(left, word as written, right) around the first use of ``word`` as a whole token in the
    original ``text`` (NFC-normalised, white space squeezed, cut at white space; the three parts
    join without a separator); None if the word is not found."""
    if not unicodedata.is_normalized("NFC", text):
        text = unicodedata.normalize("NFC", text)
    flags = 0 if keep_case else re.IGNORECASE
    for found in re.finditer(re.escape(word), text, flags):
        start, end = found.span()
        if start > 0 and _is_token_char(text[start - 1], pretokenized):
            continue
        if end < len(text) and _is_token_char(text[end], pretokenized):
            continue
        left = text[max(0, start - context - 40) : start]
        right = text[end : end + context + 40]
        return _cut_left(left, start > len(left), context), found.group(0), \
            _cut_right(right, end + len(right) < len(text), context)
    return None


def _cut_left(text: str, more: bool, context: int) -> str:
    text = _squeeze(text)
    if len(text) > context:
        text = text[-context:]
        more = True
        space = text.find(" ")
        if 0 <= space < context // 2:
            text = text[space + 1 :]
    return f"{ELLIPSIS} {text.lstrip()}" if more else text.lstrip()


def _cut_right(text: str, more: bool, context: int) -> str:
    text = _squeeze(text)
    if len(text) > context:
        text = text[:context]
        more = True
        space = text.rfind(" ")
        if space > context // 2:
            text = text[:space]
    return f"{text.rstrip()} {ELLIPSIS}" if more else text.rstrip()


# ---------------------------------------------------------------------------- the table


def examples_for_words(
    run: Path, words: Iterable[str], per_slice: int = 3, seed: int = _CHART.seed
) -> pd.DataFrame:
    """Example passages for several words, reading each slice file once.

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.
    words : iterable of str
        The words, as tokenized (lower case unless the run keeps case).
    per_slice : int
        Passages per word and slice at most (one per document).
    seed : int
        Seed of the draw: the same seed gives the same passages.

    Returns
    -------
    pandas.DataFrame
        Columns ``word, slice, document, date``, the run's metadata columns,
    then ``left, match, right`` (the passage: the word as written with its context),
    ``sentence`` (the whole passage), ``source_row, source_file`` (where the document lies in
    the source), ``line`` (line number in ``slices/<slice>.txt``) and ``original`` (True when the
    passage is the original text, False when it comes from the tokenized slice file). Slices in
    time order, passages in file order. ``attrs["notes"]`` says why originals were not used.

    Raises
    ------
    DriftError
        A negative ``per_slice``, a folder without slices or a missing slice file.

    Examples
    --------
    >>> import drift
    >>> table = drift.examples_for_words(run, ["tablet", "screen"], per_slice=1)
    >>> bool(table["original"].all()), sorted(table["word"].unique())
    (True, ['screen', 'tablet'])
    >>> row = table.iloc[0]
    >>> row["document"].startswith("pm-"), row["match"].lower()
    (True, 'tablet')
    """
    run = Path(run)
    words = list(dict.fromkeys(words))
    if per_slice < 0:
        raise DriftError(f"The number of examples per slice must be 0 or more, not {per_slice}.")
    labels = _labels(run)
    meta = documents.meta_columns(run) if documents.has_index(run) else []
    columns = LEAD_COLUMNS + meta + TAIL_COLUMNS
    if not documents.has_index(run):
        table = _from_slice_files(run, labels, words, per_slice, seed, columns)
        table.attrs["notes"] = [
            "this run has no document index, so examples come from the tokenized slice files; "
            "slice it again to quote the original documents."
        ]
        return table
    index = documents.read_documents(run)
    strata_column = meta[0] if meta else None
    picks: list[tuple[str, str, int, int, str]] = []
    for label in labels:
        path = _slice_path(run, label)
        part = index[(index["slice"] == label) & (index["lines"] > 0)].sort_values("line")
        strata = part[strata_column].fillna("").to_numpy() if strata_column else \
            np.zeros(len(part), dtype=object)
        sampled = sample_documents(
            path, label, words, part["line"].to_numpy(), part.index.to_numpy(), strata,
            per_slice, seed,
        )
        for word in words:
            picks.extend((word, label, pos, number, line) for pos, number, line in sampled[word])
    problem = source_problem(run)
    texts: dict = {}
    if problem is None and picks:
        rows = index.loc[[p[2] for p in picks]]
        txt = _slice_record(run).get("params", {}).get("format") == "txt"
        texts = original_texts(
            run, [] if txt else rows["source_row"].tolist(),
            rows["source_file"].tolist() if txt else (),
        )
    params = _slice_record(run).get("params", {})
    records = []
    for word, label, pos, number, line in picks:
        doc = index.loc[pos]
        key = doc["source_file"] if params.get("format") == "txt" else int(doc["source_row"])
        found = None
        if key in texts:
            found = original_context(
                texts[key], word, keep_case=bool(params.get("keep_case")),
                pretokenized=bool(params.get("pretokenized")),
            )
        left, match, right = found if found else token_context(line, word)
        record = {
            "word": word, "slice": label, "document": doc["document"], "date": doc["date"],
            **{m: doc[m] for m in meta},
            "left": left, "match": match, "right": right,
            "sentence": f"{left}{match}{right}",
            "source_row": int(doc["source_row"]), "source_file": doc["source_file"],
            "line": number, "original": found is not None,
        }
        records.append(record)
    table = pd.DataFrame(records, columns=columns)
    notes = []
    if problem and picks:
        notes.append(f"examples come from the tokenized slice files because {problem}.")
    table.attrs["notes"] = notes
    return table


def _labels(run: Path) -> list[str]:
    from drift.ingest.slicing import slice_labels

    return slice_labels(run)


def _slice_path(run: Path, label: str) -> Path:
    path = RunPaths(run).slice_file(label)
    if not path.exists():
        raise DriftError(f"Slice file {path} is missing; rerun 'drift slice' for {run}.")
    return path


def _from_slice_files(
    run: Path, labels: list[str], words: list[str], per_slice: int, seed: int, columns
) -> pd.DataFrame:
    rows = []
    for label in labels:
        sampled = sample_slice(_slice_path(run, label), label, words, per_slice, seed)
        for word in words:
            for number, line in sampled[word]:
                left, match, right = token_context(line, word)
                rows.append({
                    "word": word, "slice": label, "document": None, "date": None,
                    "left": left, "match": match, "right": right,
                    "sentence": passage(line, word), "source_row": None, "source_file": None,
                    "line": number, "original": False,
                })
    return pd.DataFrame(rows, columns=columns)


def example_sentences(
    run: Path, word: str, per_slice: int = 3, seed: int = _CHART.seed
) -> pd.DataFrame:
    """Up to ``per_slice`` passages holding ``word`` from each slice, drawn reproducibly and
    quoted from the original documents (see the module notes).

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.
    word : str
        The word, as tokenized (lower case unless the run keeps case).
    per_slice : int
        Passages drawn from each slice at most (one per document).
    seed : int
        Seed of the draw: the same seed gives the same passages.

    Returns
    -------
    pandas.DataFrame
        The columns of :func:`examples_for_words` without ``word``: ``slice, document, date``,
        the run's metadata columns, ``left, match, right, sentence, source_row, source_file,
        line, original``; ``attrs["notes"]`` says why a passage is not the original text.

    Raises
    ------
    DriftError
        The folder holds no slices.

    Examples
    --------
    >>> import drift
    >>> passages = drift.example_sentences(run, "tablet", per_slice=2)
    >>> {"slice", "document", "date", "sentence", "original"} <= set(passages.columns)
    True
    >>> len(passages) >= 2
    True
    >>> all(match.lower() == "tablet" for match in passages["match"])
    True
    """
    table = examples_for_words(run, [word], per_slice=per_slice, seed=seed)
    notes = table.attrs.get("notes", [])
    table = table.drop(columns="word").reset_index(drop=True)
    table.attrs["notes"] = notes
    return table
