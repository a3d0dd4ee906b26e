"""STAGE slice: cut a dated archive into time slices of tokenized text, with word counts.

:func:`slice_archive` streams the source (:mod:`drift.ingest.readers`), gives every document a day
(:mod:`drift.ingest.timeparse`), tokenizes it (:mod:`drift.ingest.tokenize`) and appends its lines
to the file of the slice whose date range holds that day. It writes, as DEVELOPERS.md's run-folder
contract says, ``slices/<label>.txt``, ``slices/summary.csv``, ``counts.parquet`` and the
``slice`` entry of ``run.json``.

Slices (``by``): ``year``, ``decade``, ``Ny`` (N-year bins aligned on multiples of N, so ``5y``
gives 1990-1994, 1995-1999, ...), ``edges:Y1,Y2,...`` (bins [Y1, Y2), [Y2, Y3), ...; years or
ISO dates) and ``even:K`` (K slices of about equal token count, cut between years when every
date is a year, between months when every date is a month, else between days; this needs a
second pass over a temporary copy of the tokenized text). Documents are tokenized on two
threads (Arrow kernels release the GIL) and written in input order, so results do not depend on
timing.

Balancing (``balance``) down-samples the lines of each slice, at random with a fixed seed, to
the smallest slice's token count (``"smallest"``) or to a given number of tokens; the ``dropped``
column of the summary counts the tokens each slice lost that way.
"""

from __future__ import annotations

import collections
import itertools
import os
import shutil
import tempfile
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from drift import runfolder
from drift.errors import DriftError
from drift.ingest import documents
from drift.ingest.readers import DocBatch, Reader
from drift.ingest.sources import MultiReader, common_folder, fingerprint_sources, open_sources
from drift.ingest.timeparse import BadDates, day_to_iso, iso_to_day, parse_times, year_of
from drift.ingest.tokenize import tokenize_array
from drift.options import SliceOptions
from drift.progress import note, progress_bars, warn

STAGE = "slice"
#: Slices under about a million tokens give unstable vectors (common practice, no single
#: published threshold); they get a warning.
SMALL_SLICE_TOKENS = 1_000_000
#: Slice sizes that differ more than this factor get a warning suggesting --balance.
SIZE_RATIO_WARNING = 10
SUMMARY_COLUMNS = list(runfolder.SUMMARY_COLUMNS)
#: Sources smaller than this are read without a progress bar.
PROGRESS_MIN_BYTES = 32 << 20
#: The folder of ``slices/`` where a Dask pass keeps its finished tasks' parts until it
#: succeeds, so that a rerun after a lost cluster resumes (:mod:`drift.ingest.dask_slicing`).
KEPT_PARTS = ".dask-parts"
#: Threads that tokenize batches (this project targets 2-core machines).
WORKERS = max(1, min(2, os.cpu_count() or 1))
_MAX_OPEN_FILES = 64


# ---------------------------------------------------------------------------- slice rules


@dataclass(frozen=True)
class SliceRule:
    """How documents are cut into slices: ``kind`` is 'years', 'edges' or 'even'."""

    kind: str
    years: int = 1
    decade: bool = False
    edges: tuple[int, ...] = ()
    count: int = 0


@dataclass(frozen=True)
class SliceBin:
    """One slice: its sort key, label and inclusive date range (day numbers)."""

    key: int
    label: str
    start: int
    end: int


def parse_by(spec: str) -> SliceRule:
    """Read a ``--by`` value: year, decade, Ny (e.g. 5y), edges:Y1,Y2,... or even:K."""
    text = str(spec).strip().lower()
    if text == "year":
        return SliceRule("years", 1)
    if text == "decade":
        return SliceRule("years", 10, decade=True)
    if text.endswith("y") and text[:-1].isdigit() and int(text[:-1]) >= 1:
        return SliceRule("years", int(text[:-1]))
    if text.startswith("edges:"):
        items = [item.strip() for item in text[len("edges:") :].split(",") if item.strip()]
        if len(items) < 2:
            raise DriftError(f"--by {spec} needs at least two edges, such as edges:1990,2000,2010.")
        edges = tuple(iso_to_day(item) for item in items)
        if any(b <= a for a, b in zip(edges, edges[1:], strict=False)):
            raise DriftError(f"The edges in --by {spec} must increase; list them in time order.")
        return SliceRule("edges", edges=edges)
    if text.startswith("even:"):
        count = text[len("even:") :]
        if not count.isdigit() or int(count) < 1:
            raise DriftError(f"--by {spec} needs a whole number of slices, such as even:4.")
        return SliceRule("even", count=int(count))
    raise DriftError(
        f"Unknown --by '{spec}'; use year, decade, a number of years such as 5y, "
        "edges:1990,2000,2010 or even:4."
    )


def parse_balance(balance: str | int | None) -> str | int | None:
    """None (no balancing), 'smallest', or a positive token budget."""
    if balance is None or balance is False:
        return None
    if balance is True or str(balance).strip().lower() == "smallest":
        return "smallest"
    text = str(balance).strip().replace("_", "").replace(",", "")
    try:
        budget = int(float(text)) if text.replace(".", "", 1).replace("e", "", 1).isdigit() else -1
    except ValueError:
        budget = -1
    if budget < 1:
        raise DriftError(
            f"--balance {balance} is not a token count; give a positive number or no value."
        )
    return budget


def _is_year_range(start: int, end: int) -> bool:
    first, last = np.datetime64(start, "D"), np.datetime64(end, "D")
    return str(first)[5:] == "01-01" and str(last)[5:] == "12-31"


def label_for_range(start: int, end: int) -> str:
    """A readable, file-safe label: 1990, 1990-1994, or 1990-03-01_1994-12-31."""
    if _is_year_range(start, end):
        first, last = (int(y) for y in year_of(np.array([start, end])))
        return f"{first:04d}" if first == last else f"{first:04d}-{last:04d}"
    return f"{day_to_iso(start)}_{day_to_iso(end)}"


def _year_start(year: int) -> int:
    return iso_to_day(f"{year:04d}")


def bin_for_key(rule: SliceRule, key: int) -> SliceBin:
    """The slice that documents with ``key`` belong to (rules 'years' and 'edges')."""
    if rule.kind == "years":
        first = key * rule.years
        last = first + rule.years - 1
        start, end = _year_start(first), _year_start(last + 1) - 1
        label = f"{first:04d}s" if rule.decade else label_for_range(start, end)
        return SliceBin(key, label, start, end)
    start, end = rule.edges[key], rule.edges[key + 1] - 1
    return SliceBin(key, label_for_range(start, end), start, end)


def keys_for_days(rule: SliceRule, days: np.ndarray) -> np.ndarray:
    """Slice key of each day (-1: outside the edges). For 'even' the key is the year."""
    if rule.kind == "edges":
        keys = np.searchsorted(np.asarray(rule.edges), days, side="right") - 1
        return np.where((keys >= 0) & (keys < len(rule.edges) - 1), keys, -1).astype(np.int64)
    years = year_of(days)
    return years // rule.years if rule.kind == "years" else years


def _unit_of(days: np.ndarray) -> str:
    """The finest calendar unit the dates need: 'year', 'month' or 'day'."""
    dates = np.asarray(days).astype("datetime64[D]")
    if (dates == dates.astype("datetime64[Y]").astype("datetime64[D]")).all():
        return "year"
    if (dates == dates.astype("datetime64[M]").astype("datetime64[D]")).all():
        return "month"
    return "day"


def even_bins(days: np.ndarray, tokens: np.ndarray, count: int) -> list[SliceBin]:
    """``count`` contiguous slices of about equal token count, cut between calendar units.

    ``days`` are the distinct day numbers that hold tokens, ``tokens`` the tokens on each.
    """
    unit = _unit_of(days)
    numpy_unit = {"year": "Y", "month": "M", "day": "D"}[unit]
    units = np.asarray(days).astype("datetime64[D]").astype(f"datetime64[{numpy_unit}]")
    distinct, inverse = np.unique(units, return_inverse=True)
    per_unit = np.bincount(inverse, weights=tokens).astype(np.int64)
    if len(distinct) < count:
        raise DriftError(
            f"even:{count} needs at least {count} distinct {unit}s with documents, but the data "
            "has "
            f"{len(distinct)}; ask for fewer slices."
        )
    cumulative = np.cumsum(per_unit)
    total = cumulative[-1]
    cuts: list[int] = []  # index of the last unit of each slice but the last
    for k in range(1, count):
        target = total * k / count
        i = int(np.searchsorted(cumulative, target))
        if i > 0 and abs(cumulative[i - 1] - target) <= abs(
            cumulative[min(i, len(cumulative) - 1)] - target
        ):
            i -= 1
        low = cuts[-1] + 1 if cuts else 0
        high = len(distinct) - (count - k) - 1
        cuts.append(min(max(i, low), high))
    starts = [distinct[0]] + [distinct[i + 1] for i in cuts]
    bins = []
    for k, first in enumerate(starts):
        start = int(first.astype("datetime64[D]").astype(np.int64))
        if k + 1 < len(starts):
            end = int(starts[k + 1].astype("datetime64[D]").astype(np.int64)) - 1
        else:
            end = int((distinct[-1] + 1).astype("datetime64[D]").astype(np.int64)) - 1
        bins.append(SliceBin(k, label_for_range(start, end), start, end))
    return bins


# ---------------------------------------------------------------------------- word counts


@dataclass(frozen=True)
class BatchCounts:
    """Word counts of one batch: its distinct words and, per slice key, (word positions, counts)."""

    words: pa.Array
    by_key: dict[int, tuple[np.ndarray, np.ndarray]]


def count_batch_words(tokens: pa.Array, token_bounds: list[tuple[int, int, int]]) -> BatchCounts:
    """Count ``tokens`` per slice: ``token_bounds`` holds (key, first, end) ranges of tokens."""
    encoded = pc.dictionary_encode(tokens)
    if isinstance(encoded, pa.ChunkedArray):
        encoded = encoded.combine_chunks()
    ids = encoded.indices.to_numpy(zero_copy_only=False)
    size = len(encoded.dictionary)
    by_key = {}
    for key, first, end in token_bounds:
        counts = np.bincount(ids[first:end], minlength=size)
        present = np.flatnonzero(counts)
        by_key[int(key)] = (present, counts[present])
    return BatchCounts(encoded.dictionary, by_key)


class WordCounts:
    """Word counts per slice key: one vocabulary (word -> row) and one count vector per slice.

    Batches are merged a few at a time: their distinct words are united in Arrow first, so the
    Python dictionary is consulted once per distinct word of the group, not once per batch.
    """

    GROUP = 16

    def __init__(self) -> None:
        self._rows: dict[str, int] = {}
        self._counts: dict[int, np.ndarray] = {}
        self._capacity = 1 << 16
        self._pending: list[BatchCounts] = []

    def _grow(self) -> None:
        while len(self._rows) > self._capacity:
            self._capacity *= 2
        for key, vector in self._counts.items():
            if len(vector) < self._capacity:
                grown = np.zeros(self._capacity, dtype=np.int64)
                grown[: len(vector)] = vector
                self._counts[key] = grown

    def add(self, batch: BatchCounts) -> None:
        """Add one batch's counts (called in input order, from one thread)."""
        self._pending.append(batch)
        if len(self._pending) >= self.GROUP:
            self._flush()

    def _rows_of(self, words: pa.Array) -> np.ndarray:
        """Vocabulary rows of distinct ``words``, adding the new ones."""
        rows = self._rows
        listed = words.to_pylist()
        mapping = np.fromiter(
            map(rows.get, listed, itertools.repeat(-1)), dtype=np.int64, count=len(listed)
        )
        for position in np.flatnonzero(mapping < 0):  # words not seen before
            mapping[position] = rows.setdefault(listed[position], len(rows))
        if len(rows) > self._capacity:
            self._grow()
        return mapping

    def _flush(self) -> None:
        if not self._pending:
            return
        pending, self._pending = self._pending, []
        united = pc.dictionary_encode(pa.concat_arrays([b.words for b in pending]))
        group_rows = self._rows_of(united.dictionary)
        positions_in_group = united.indices.to_numpy(zero_copy_only=False)
        start = 0
        for batch in pending:
            batch_rows = group_rows[positions_in_group[start : start + len(batch.words)]]
            start += len(batch.words)
            for key, (positions, counts) in batch.by_key.items():
                vector = self._counts.get(key)
                if vector is None:
                    vector = self._counts[key] = np.zeros(self._capacity, dtype=np.int64)
                vector[batch_rows[positions]] += counts  # positions are distinct within a batch

    def drop(self, key: int) -> None:
        """Forget the counts of slice ``key`` (before counting its balanced text again)."""
        self._flush()
        if key in self._counts:
            self._counts[key][:] = 0

    def as_batch(self) -> BatchCounts | None:
        """Every count as one :class:`BatchCounts` (to be added to another WordCounts), with
        4-byte numbers where they fit; None when nothing was counted. Unsorted, so cheaper than
        :meth:`matrix`."""
        self._flush()
        size = len(self._rows)
        if size == 0:
            return None
        by_key = {}
        for key, vector in self._counts.items():
            present = np.flatnonzero(vector[:size])
            counts = vector[present]
            narrow = np.int32 if len(counts) == 0 or counts.max() < 2**31 else np.int64
            by_key[key] = (present.astype(np.int32), counts.astype(narrow))
        return BatchCounts(pa.array(list(self._rows), pa.string()), by_key)

    def matrix(self, keys: list[int]) -> tuple[pa.Array, np.ndarray]:
        """Words and a word x slice count matrix (columns in the order of ``keys``); words that
        occur nowhere are left out; rows sorted by total count (descending), then by word."""
        self._flush()
        size = len(self._rows)
        empty = np.zeros(size, dtype=np.int64)
        counts = (
            np.stack([self._counts.get(k, empty)[:size] for k in keys], axis=1)
            if keys
            else np.zeros((size, 0), np.int64)
        )
        words = pa.array(list(self._rows), pa.string())
        totals = counts.sum(axis=1)
        present = np.flatnonzero(totals > 0)
        order = pc.sort_indices(
            pa.table({"total": totals[present], "word": words.take(pa.array(present))}),
            sort_keys=[("total", "descending"), ("word", "ascending")],
        ).to_numpy()
        rows = present[order]
        return words.take(pa.array(rows)), counts[rows]


# ---------------------------------------------------------------------------- one batch


@dataclass
class _Part:
    """The lines of one batch that go to one slice key."""

    key: int
    text: pa.Buffer | None  # None once written elsewhere (a Dask worker's part file)
    documents: int
    tokens: int
    line_tokens: np.ndarray
    doc_starts: np.ndarray
    longest_line: int


@dataclass
class _BatchOutcome:
    rows: int
    bad: BadDates
    outside: int
    empty: int
    parts: list[_Part]
    counts: BatchCounts | None
    day_tokens: tuple[np.ndarray, np.ndarray] | None = None
    docs: documents.BatchDocuments | None = None
    where_dropped: int = 0
    where_values: dict[str, collections.Counter] | None = None


@dataclass(frozen=True)
class _Settings:
    rule: SliceRule
    date_format: str | None
    keep_case: bool
    pretokenized: bool
    where: tuple[documents.WhereClause, ...] = ()
    index_columns: tuple[tuple[str, str], ...] = ()  # (name in the index work file, source column)


def _lines_buffer(
    lines: pa.StringArray, prefix: pa.Array | None = None
) -> tuple[pa.Buffer, np.ndarray]:
    """The bytes of ``lines``, each ending in a newline (optionally after ``prefix``), and the
    byte offset where each line starts (plus the end)."""
    parts = [lines, pa.scalar("\n")] if prefix is None else [prefix, lines, pa.scalar("\n")]
    joined = pc.binary_join_element_wise(*parts, "") if parts else lines
    if len(joined) == 0:
        return pa.py_buffer(b""), np.zeros(1, dtype=np.int64)
    offsets = np.frombuffer(joined.buffers()[1], dtype=np.int32)[
        joined.offset : joined.offset + len(joined) + 1
    ]
    return joined.buffers()[2], offsets.astype(np.int64)


def _split_by_key(
    line_keys: np.ndarray,
    lines: pa.StringArray,
    tokens: pa.StringArray,
    token_counts: np.ndarray,
    doc_starts: np.ndarray,
    count_words: bool,
    prefix: pa.Array | None = None,
) -> tuple[list[_Part], BatchCounts | None]:
    """Group lines (already sorted by key) into one part per key, and count their words."""
    data, offsets = _lines_buffer(lines, prefix)
    token_offsets = np.zeros(len(token_counts) + 1, dtype=np.int64)
    np.cumsum(token_counts, out=token_offsets[1:])
    parts = []
    bounds = []
    for key in np.unique(line_keys):
        a, b = np.searchsorted(line_keys, key, "left"), np.searchsorted(line_keys, key, "right")
        bounds.append((int(key), int(token_offsets[a]), int(token_offsets[b])))
        parts.append(
            _Part(
                key=int(key),
                text=data.slice(int(offsets[a]), int(offsets[b] - offsets[a])),
                documents=int(doc_starts[a:b].sum()),
                tokens=int(token_offsets[b] - token_offsets[a]),
                line_tokens=token_counts[a:b].astype(np.uint16),
                doc_starts=doc_starts[a:b],
                longest_line=int(np.diff(offsets[a : b + 1]).max()),
            )
        )
    counts = count_batch_words(tokens, bounds) if count_words and bounds else None
    return parts, counts


def _process_batch(batch: DocBatch, settings: _Settings) -> _BatchOutcome:
    """Date, slice and tokenize one batch (runs on a worker thread)."""
    rows = len(batch)
    days, ok = parse_times(batch.times, settings.date_format)
    bad = BadDates()
    if not ok.all():
        bad.add(batch.times, ok)
    keys = keys_for_days(settings.rule, days)
    outside = int((ok & (keys < 0)).sum())
    in_range = ok & (keys >= 0)
    where_dropped, where_values = 0, None
    if settings.where:
        chosen = documents.where_mask(batch.extra, settings.where, rows)
        where_dropped = int((in_range & ~chosen).sum())
        in_range &= chosen
        where_values = {
            c.column: collections.Counter(
                pc.fill_null(batch.extra[c.column], "").to_pylist()
            )
            for c in settings.where
        }
    valid = np.flatnonzero(in_range)
    order = valid[np.argsort(keys[valid], kind="stable")]
    new_document = np.ones(rows, dtype=bool)
    new_document[0] = not batch.continues
    texts = (
        batch.texts
        if len(order) == rows and (np.diff(order) > 0).all()
        else batch.texts.take(pa.array(order))
    )
    tokenized = tokenize_array(texts, settings.keep_case, settings.pretokenized)
    per_document = tokenized.tokens_per_document(len(order))
    empty = int(((per_document == 0) & new_document[order]).sum())
    line_doc = tokenized.doc_index
    first_line = np.ones(len(line_doc), dtype=bool)
    first_line[1:] = line_doc[1:] != line_doc[:-1]
    doc_starts = first_line & new_document[order][line_doc]
    line_keys = keys[order][line_doc]
    day_tokens = None
    prefix = None
    if settings.rule.kind == "even":
        line_days = days[order][line_doc]
        distinct, inverse = np.unique(line_days, return_inverse=True)
        day_tokens = (
            distinct,
            np.bincount(inverse, weights=tokenized.token_counts).astype(np.int64),
        )
        prefix = pc.binary_join_element_wise(
            pa.array(line_days).cast(pa.string()),
            pa.array(doc_starts.astype(np.int8)).cast(pa.string()),
            "",
            "\t",
        )
    parts, counts = _split_by_key(
        line_keys,
        tokenized.lines,
        tokenized.tokens,
        tokenized.token_counts,
        doc_starts,
        count_words=settings.rule.kind != "even",
        prefix=prefix,
    )
    docs = _batch_documents(batch, settings, valid, order, keys, days, per_document, line_doc)
    return _BatchOutcome(
        rows, bad, outside, empty, parts, counts, day_tokens, docs, where_dropped, where_values
    )


def _batch_documents(
    batch: DocBatch,
    settings: _Settings,
    valid: np.ndarray,
    order: np.ndarray,
    keys: np.ndarray,
    days: np.ndarray,
    per_document: np.ndarray,
    line_doc: np.ndarray,
) -> documents.BatchDocuments:
    """The kept documents of a batch in input order, for the document index."""
    lines_by_order = np.bincount(line_doc, minlength=len(order)).astype(np.int64)
    back = np.empty(len(order), dtype=np.int64)  # position in ``order`` of each valid row
    back[np.searchsorted(valid, order)] = np.arange(len(order))
    taken = pa.array(valid, pa.int64())
    strings = {"date:": _as_text(batch.times).take(taken)}
    for name, column in settings.index_columns:
        strings[name] = _as_text(batch.extra[column]).take(taken)
    return documents.BatchDocuments(
        rows=valid,
        keys=keys[valid],
        days=days[valid],
        lines=lines_by_order[back],
        tokens=np.asarray(per_document, dtype=np.int64)[back],
        strings=pa.table(strings),
        continues=bool(batch.continues and len(valid) and valid[0] == 0),
        source=batch.source,
    )


def _as_text(values) -> pa.Array:
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    return values if pa.types.is_string(values.type) else values.cast(pa.string())


def _ordered_map(fn: Callable, items: Iterable, workers: int | None = None) -> Iterator:
    """``map(fn, items)`` on ``workers`` threads (default WORKERS), results in input order, a
    few items ahead."""
    workers = WORKERS if workers is None else workers
    if workers <= 1:
        yield from map(fn, items)
        return
    with ThreadPoolExecutor(workers, thread_name_prefix="drift-slice") as pool:
        pending: collections.deque = collections.deque()
        for item in items:
            pending.append(pool.submit(fn, item))
            if len(pending) > workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


# ---------------------------------------------------------------------------- slice files


@dataclass
class _Tally:
    documents: int = 0
    tokens: int = 0
    line_tokens: list[np.ndarray] = field(default_factory=list)
    doc_starts: list[np.ndarray] = field(default_factory=list)


class _SliceFiles:
    """Text files per slice key in a private work folder, appended in order, with tallies."""

    def __init__(self, folder: Path, keep_lines: bool):
        self.folder = folder
        self.folder.mkdir(parents=True, exist_ok=True)
        self.keep_lines = keep_lines
        self.tallies: dict[int, _Tally] = {}
        self.longest_line = 0  # bytes, for reading the files back in large enough blocks
        self._open: collections.OrderedDict[int, Any] = collections.OrderedDict()

    def path(self, key: int) -> Path:
        return self.folder / f"{key}.txt"

    def _handle(self, key: int):
        handle = self._open.pop(key, None)
        if handle is None:
            if len(self._open) >= _MAX_OPEN_FILES:
                self._open.popitem(last=False)[1].close()
            handle = open(self.path(key), "ab", buffering=1 << 18)  # noqa: SIM115 - closed in close()
        self._open[key] = handle
        return handle

    def append(self, part: _Part) -> None:
        """Add a part's lines (unless its text was written elsewhere) and its tallies."""
        if part.text is not None:
            self._handle(part.key).write(memoryview(part.text))
        tally = self.tallies.setdefault(part.key, _Tally())
        tally.documents += part.documents
        tally.tokens += part.tokens
        self.longest_line = max(self.longest_line, part.longest_line)
        if self.keep_lines:
            tally.line_tokens.append(part.line_tokens)
            tally.doc_starts.append(part.doc_starts)

    def append_file(self, key: int, path: Path) -> None:
        """Append the bytes of ``path`` (lines of slice ``key`` written by a worker)."""
        handle = self._handle(key)
        with open(path, "rb") as source:
            shutil.copyfileobj(source, handle, 1 << 20)

    def close(self) -> None:
        while self._open:
            self._open.popitem()[1].close()


def _read_lines(
    path: Path, columns: list[str], types: dict[str, pa.DataType], longest_line: int
) -> Iterator[pa.RecordBatch]:
    """Stream a tab-separated work file (no quoting) as record batches; blocks hold at least
    two of its longest lines (pyarrow keeps every row inside one block)."""
    with pacsv.open_csv(
        path,
        read_options=pacsv.ReadOptions(
            column_names=columns, block_size=max(4 << 20, 2 * longest_line + 1024)
        ),
        parse_options=pacsv.ParseOptions(
            delimiter="\t", quote_char=False, double_quote=False, escape_char=False
        ),
        convert_options=pacsv.ConvertOptions(column_types=types),
    ) as reader:
        yield from reader


# ---------------------------------------------------------------------------- the passes


class LocalFeed:
    """Batch outcomes of a reader, processed here on :data:`WORKERS` threads, in input order.

    The first pass reads its outcomes from a feed; :mod:`drift.ingest.dask_slicing` offers one
    whose batches are processed on Dask workers.
    """

    def __init__(self, reader: Reader, settings: _Settings, threads: int | None = None):
        self.reader = reader
        self.settings = settings
        self.threads = threads

    def outcomes(self) -> Iterator[tuple[_BatchOutcome, bool]]:
        """(outcome, the batch continues the previous one) for every batch, in input order."""
        settings = self.settings
        return _ordered_map(
            lambda batch: (_process_batch(batch, settings), batch.continues),
            self.reader.batches(),
            self.threads,
        )

    def position(self) -> int:
        return self.reader.position()

    @property
    def replaced(self) -> int:
        return self.reader.replaced

    @property
    def legacy(self) -> int:
        return self.reader.legacy

    def notes(self) -> list[str]:
        return self.reader.notes()


#: Makes a first pass's feed: (reader, settings, files, counts) -> a feed like LocalFeed.
FeedMaker = Callable[[Reader, _Settings, "_SliceFiles", WordCounts], Any]


@dataclass
class _ReadTotals:
    rows: int = 0
    outside: int = 0
    empty: int = 0
    bad: BadDates = field(default_factory=BadDates)
    day_tokens: list[tuple[np.ndarray, np.ndarray]] = field(default_factory=list)
    where_dropped: int = 0
    where_values: dict[str, collections.Counter] = field(default_factory=dict)


def _first_pass(
    reader: Reader,
    settings: _Settings,
    files: _SliceFiles,
    counts: WordCounts,
    skip_bad_dates: bool,
    quiet: bool,
    index: documents.DocumentIndex | None = None,
    feed: Any = None,
) -> _ReadTotals:
    """Read the source once: slice files (or per-year files for even:K), word counts and the
    document index (batch outcomes from ``feed``, default a :class:`LocalFeed`)."""
    feed = feed or LocalFeed(reader, settings)
    totals = _ReadTotals()
    with progress_bars(quiet or reader.total_bytes < PROGRESS_MIN_BYTES) as progress:
        task = progress.add_task(
            f"Reading {reader.path.name} (MB)", total=max(1, round(reader.total_bytes / 1e6))
        )
        for number, (outcome, continues) in enumerate(feed.outcomes()):
            totals.rows += outcome.rows
            totals.where_dropped += outcome.where_dropped
            for column, counter in (outcome.where_values or {}).items():
                totals.where_values.setdefault(column, collections.Counter()).update(counter)
            if index is not None and outcome.docs is not None:
                index.add(outcome.docs, outcome.rows, continues)
            totals.outside += outcome.outside
            totals.empty += outcome.empty
            totals.bad.count += outcome.bad.count
            for example in outcome.bad.examples:
                if len(totals.bad.examples) < 3 and example not in totals.bad.examples:
                    totals.bad.examples.append(example)
            if number == 0 and not skip_bad_dates and outcome.bad.count == outcome.rows:
                raise totals.bad.error(
                    reader.time_col, first_only=True, text_files=reader.fmt == "txt"
                )
            if outcome.day_tokens is not None:
                totals.day_tokens.append(outcome.day_tokens)
            for part in outcome.parts:
                files.append(part)
            if outcome.counts is not None:
                counts.add(outcome.counts)
            progress.update(task, completed=feed.position() / 1e6)
    files.close()
    return totals


def _second_pass_even(
    year_files: _SliceFiles,
    bins: list[SliceBin],
    files: _SliceFiles,
    counts: WordCounts,
    quiet: bool,
) -> None:
    """Route the per-year work files into the even:K slices and count their words."""
    starts = np.array([b.start for b in bins], dtype=np.int64)
    columns = ["day", "first", "line"]
    types = {"day": pa.int64(), "first": pa.int8(), "line": pa.string()}

    def route(batch: pa.RecordBatch) -> tuple[list[_Part], BatchCounts | None]:
        days = batch.column(0).to_numpy()
        keys = np.searchsorted(starts, days, side="right") - 1
        order = np.argsort(keys, kind="stable")
        lines = batch.column(2).take(pa.array(order))
        token_lists = pc.ascii_split_whitespace(lines)
        token_counts = (
            pc.list_value_length(token_lists).to_numpy(zero_copy_only=False).astype(np.int64)
        )
        doc_starts = batch.column(1).to_numpy(zero_copy_only=False)[order].astype(bool)
        return _split_by_key(
            keys[order], lines, pc.list_flatten(token_lists), token_counts, doc_starts, True
        )

    def batches() -> Iterator[pa.RecordBatch]:
        for year in sorted(year_files.tallies):
            yield from _read_lines(year_files.path(year), columns, types, year_files.longest_line)

    total = sum(year_files.path(year).stat().st_size for year in year_files.tallies)
    with progress_bars(quiet or total < PROGRESS_MIN_BYTES) as progress:
        task = progress.add_task(
            f"Cutting into {len(bins)} even slices (MB)", total=max(1, round(total / 1e6))
        )
        for parts, batch_counts in _ordered_map(route, batches()):
            for part in parts:
                files.append(part)
                progress.advance(task, part.text.size / 1e6)
            if batch_counts is not None:
                counts.add(batch_counts)
    files.close()


def lines_within_budget(line_tokens: np.ndarray, order: np.ndarray, budget: int) -> np.ndarray:
    """Lines taken in ``order`` while they fit: each line is kept if its tokens fit in what is
    left of ``budget`` (a line that does not fit is skipped, later ones may still fit)."""
    taken = []
    candidates = order
    left = int(budget)
    while left > 0 and len(candidates):
        candidates = candidates[line_tokens[candidates] <= left]  # lines that can still fit
        cumulative = np.cumsum(line_tokens[candidates])
        fitting = int(np.searchsorted(cumulative, left, side="right"))
        taken.append(candidates[:fitting])
        left -= int(cumulative[fitting - 1]) if fitting else 0
        candidates = candidates[fitting + 1 :]  # the next line did not fit and never will
    return np.concatenate(taken) if taken else np.zeros(0, dtype=np.int64)


def _balance(
    files: _SliceFiles,
    counts: WordCounts,
    budget: int,
    seed: int,
    keys: list[int],
    strata: dict[int, np.ndarray] | None = None,
    stratum_budgets: np.ndarray | None = None,
) -> tuple[dict[int, int], dict[int, np.ndarray]]:
    """Down-sample every slice over ``budget`` tokens to at most ``budget`` (random lines, seeded).

    With ``strata`` (a stratum code per line of each slice), each stratum ``v`` is down-sampled
    on its own to ``stratum_budgets[v]`` tokens, so every slice keeps the same mix.
    Returns the tokens dropped per slice key and the kept-line masks of the slices that were cut;
    rewrites the work files, tallies and counts.
    """
    dropped: dict[int, int] = {}
    kept_lines: dict[int, np.ndarray] = {}
    for index, key in enumerate(keys):
        tally = files.tallies[key]
        dropped[key] = 0
        if tally.tokens <= budget and strata is None:
            continue
        line_tokens = np.concatenate(tally.line_tokens).astype(np.int64)
        doc_starts = np.concatenate(tally.doc_starts)
        order = np.random.default_rng([seed, index]).permutation(len(line_tokens))
        keep = np.zeros(len(line_tokens), dtype=bool)
        if strata is None:
            keep[lines_within_budget(line_tokens, order, budget)] = True
        else:
            codes = strata[key]
            for code, share in enumerate(stratum_budgets):
                if share > 0:
                    within = order[codes[order] == code]
                    keep[lines_within_budget(line_tokens, within, int(share))] = True
        kept_lines[key] = keep
        counts.drop(key)
        source, target = files.path(key), files.path(key).with_suffix(".balanced")
        position = 0
        with open(target, "wb") as out:
            for batch in _read_lines(source, ["line"], {"line": pa.string()}, files.longest_line):
                mask = keep[position : position + batch.num_rows]
                position += batch.num_rows
                lines = batch.column(0).filter(pa.array(mask))
                if len(lines) == 0:
                    continue
                data, offsets = _lines_buffer(lines)
                out.write(memoryview(data.slice(int(offsets[0]), int(offsets[-1] - offsets[0]))))
                tokens = pc.list_flatten(pc.ascii_split_whitespace(lines))
                counts.add(count_batch_words(tokens, [(key, 0, len(tokens))]))
        os.replace(target, source)
        document_ids = np.cumsum(doc_starts) - 1
        kept_tokens = int(line_tokens[keep].sum())
        dropped[key] = tally.tokens - kept_tokens
        tally.tokens = kept_tokens
        tally.documents = len(np.unique(document_ids[keep & (document_ids >= 0)]))
    return dropped, kept_lines


def _documents_by_slice(
    bin_of: np.ndarray, lines: np.ndarray, order: np.ndarray, keys: list[int]
) -> dict[int, np.ndarray]:
    """For each slice key, its documents that have lines, in the order of the slice file."""
    ordered = order[lines[order] > 0]
    return {key: ordered[bin_of[ordered] == b] for b, key in enumerate(keys)}


def _line_documents(tally: _Tally) -> np.ndarray:
    """For each line of a slice, the position of its document among the slice's documents."""
    return np.cumsum(np.concatenate(tally.doc_starts)) - 1


def _apply_kept(
    tally: _Tally, keep: np.ndarray, docs: np.ndarray, lines: np.ndarray, tokens: np.ndarray
) -> None:
    """Lines and tokens of each document that balancing kept."""
    owner = _line_documents(tally)
    line_tokens = np.concatenate(tally.line_tokens).astype(np.int64)
    lines[docs] = np.bincount(owner[keep], minlength=len(docs))[: len(docs)]
    tokens[docs] = np.bincount(
        owner[keep], weights=line_tokens[keep], minlength=len(docs)
    )[: len(docs)].astype(np.int64)


def _strata(
    index: documents.DocumentIndex,
    column: str,
    files: _SliceFiles,
    keys: list[int],
    in_slice: dict[int, np.ndarray],
    bin_of: np.ndarray,
    doc_tokens: np.ndarray,
    budget: str | int,
) -> tuple[dict[int, np.ndarray], np.ndarray, list[str]]:
    """Stratum code of each line per slice, and each stratum's token budget: every slice keeps
    as many tokens of a value as the slice that has fewest of it (scaled down to a numeric
    ``budget``), so all slices keep the same mix. A value missing from a slice is left out."""
    encoded = pc.dictionary_encode(index.column_values(f"meta:{column}"))
    codes = encoded.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    values = encoded.dictionary.to_pylist()
    per_slice = np.zeros((len(keys), len(values)), dtype=np.int64)
    np.add.at(per_slice, (bin_of, codes), doc_tokens)
    budgets = per_slice.min(axis=0)
    notes = []
    missing = [values[v] for v in np.flatnonzero(budgets == 0)]
    if missing:
        notes.append(
            f"--balance-by {column} leaves out {', '.join(repr(m) for m in missing[:5])}"
            f"{' ...' if len(missing) > 5 else ''}: missing from at least one slice, so no "
            "slice can keep the same share of it."
        )
    if budgets.sum() == 0:
        raise DriftError(
            f"--balance-by {column}: no value of '{column}' occurs in every slice, so no mix can "
            "be kept the same; choose another column or leave out --balance-by."
        )
    if budget != "smallest":
        if int(budget) > budgets.sum():
            raise DriftError(
                f"--balance {budget} asks for more tokens than the same mix of '{column}' allows "
                f"in every slice ({int(budgets.sum()):,}); give a smaller number, or --balance "
                "alone."
            )
        budgets = np.floor(budgets * (int(budget) / budgets.sum())).astype(np.int64)
    strata = {key: codes[in_slice[key]][_line_documents(files.tallies[key])] for key in keys}
    return strata, budgets, notes


def _index_columns(spec: documents.IndexSpec) -> tuple[tuple[str, str], ...]:
    columns = [(f"id:{spec.id_col}", spec.id_col)] if spec.id_col else []
    columns += [(f"meta:{name}", name) for name in spec.meta]
    if spec.file_names:
        columns.append(("file:", "file"))
    return tuple(columns)


def _check_where(settings: _Settings, totals: _ReadTotals, index: documents.DocumentIndex) -> None:
    if settings.where and totals.rows and not any(len(k) for k in index.keys):
        raise documents.where_error(settings.where, totals.where_values)


# ---------------------------------------------------------------------------- reading the results


def read_summary(run: Path | str) -> pd.DataFrame:
    """The slice summary of a run folder (``slices/summary.csv``, labels as text).

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`slice_archive`.

    Returns
    -------
    pandas.DataFrame
        ``label, start, end, documents, tokens, types, dropped``, one row per slice in time
        order.

    Raises
    ------
    DriftError
        The folder does not exist or holds no slices.

    Examples
    --------
    >>> import drift
    >>> drift.read_summary(run)[["label", "start", "end"]].iloc[0].tolist()
    ['1950s', '1950-01-01', '1959-12-31']
    """
    paths = runfolder.existing_run(Path(run), needs="slices")
    return runfolder.read_table(paths.root, "summary")


def slice_labels(run: Path | str) -> list[str]:
    """The slice labels of a run, in time order.

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`slice_archive`.

    Returns
    -------
    list of str

    Raises
    ------
    DriftError
        The folder does not exist or holds no slices.

    Examples
    --------
    >>> import drift
    >>> drift.slice_labels(run)
    ['1950s', '1960s', '1970s', '1980s', '1990s', '2000s']
    """
    return runfolder.slice_labels(runfolder.existing_run(Path(run), needs="slices").root)


def read_counts(run: Path | str) -> pd.DataFrame:
    """Word counts per slice (``counts.parquet``).

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`slice_archive`.

    Returns
    -------
    pandas.DataFrame
        Index ``word``, one int64 column per slice label in time order; rows by total count,
        most frequent first.

    Raises
    ------
    DriftError
        The folder does not exist or holds no slices.

    Examples
    --------
    >>> import drift
    >>> counts = drift.read_counts(run)
    >>> list(counts.columns) == drift.slice_labels(run)
    True
    >>> counts.index[0]
    'the'
    """
    paths = runfolder.existing_run(Path(run), needs="slices")
    return runfolder.read_table(paths.root, "counts").set_index("word")


# ---------------------------------------------------------------------------- the stage


def _count(number: int, noun: str) -> str:
    """'1 document', '2,000 documents'."""
    return f"{number:,} {noun}" + ("" if number == 1 else "s")


def slice_warnings(summary: pd.DataFrame) -> list[str]:
    """Warnings about slice sizes: small slices (common practice: about a million tokens or more)
    and sizes that differ more than tenfold."""
    messages = []
    small = summary[summary["tokens"] < SMALL_SLICE_TOKENS]
    if len(small):
        names = ", ".join(small["label"].astype(str).head(8)) + (" ..." if len(small) > 8 else "")
        if len(small) == 1:
            which = f"slice {names} has"
        elif len(small) == len(summary):
            which = (
                f"{'both' if len(small) == 2 else 'all ' + str(len(small))} slices ({names}) have"
            )
        else:
            which = f"{len(small)} of {len(summary)} slices ({names}) have"
        messages.append(
            f"{which} under a million tokens; vectors trained on small slices are unstable "
            "(common practice: a million tokens or more per slice), so consider wider slices "
            "(--by) or more text."
        )
    if len(summary) > 1 and summary["tokens"].min() > 0:
        smallest, largest = (
            summary.loc[summary["tokens"].idxmin()],
            summary.loc[summary["tokens"].idxmax()],
        )
        if largest["tokens"] > SIZE_RATIO_WARNING * smallest["tokens"]:
            messages.append(
                "slice sizes differ more than tenfold "
                f"({smallest['label']}: {smallest['tokens']:,} "
                f"tokens, {largest['label']}: {largest['tokens']:,}); consider --balance."
            )
    return messages


def _outputs_exist(paths: runfolder.RunPaths, labels: list[str] | None) -> bool:
    if not labels or not paths.slice_summary.exists() or not paths.counts.exists():
        return False
    if not paths.documents_parquet.exists() or not paths.composition_parquet.exists():
        return False
    return all(paths.slice_file(label).exists() for label in labels)


def _clean_leftovers(paths: runfolder.RunPaths) -> None:
    """Remove work folders and temporary files left by a slice run that was killed."""
    if not paths.slices_dir.is_dir():
        return
    for leftover in paths.slices_dir.glob(".work-*"):
        shutil.rmtree(leftover, ignore_errors=True)
    for leftover in paths.slices_dir.glob(".*.tmp"):
        leftover.unlink(missing_ok=True)


def _check_read(
    reader: Reader, totals: _ReadTotals, skip_bad_dates: bool, any_tokens: bool
) -> None:
    name = reader.path
    if totals.rows == 0:
        detail = "only a header row" if reader.fmt in ("csv", "tsv") else "no records"
        raise DriftError(
            f"{name} has no documents ({detail}); give a file with one document per row."
        )
    if totals.bad.count and (not skip_bad_dates or totals.bad.count == totals.rows):
        raise totals.bad.error(
            reader.time_col,
            total=totals.rows,
            text_files=reader.fmt == "txt",
            skipping=skip_bad_dates,
        )
    if not any_tokens:
        raise DriftError(
            f"{name} has {totals.rows:,} documents but no words in them; check --text-col "
            f"(now '{reader.text_col}')."
        )


def _check_edges(rule: SliceRule, files: _SliceFiles) -> None:
    if rule.kind != "edges":
        return
    empty = [
        bin_for_key(rule, k).label for k in range(len(rule.edges) - 1) if k not in files.tallies
    ]
    if empty:
        present = [day_to_iso(rule.edges[k]) for k in sorted(files.tallies)]
        raise DriftError(
            f"The slice{'s' if len(empty) > 1 else ''} {', '.join(empty)} of --by edges hold no "
            f"documents; choose edges around the dates the data covers (documents found from "
            f"{present[0] if present else 'nowhere'} on)."
        )


_SLICE = SliceOptions()  # the defaults of slice_archive's keyword arguments


def slice_archive(
    source: Path | str,
    out: Path | str,
    *,
    fmt: str | None = _SLICE.fmt,
    time_col: str | None = _SLICE.time_col,
    text_col: str | None = _SLICE.text_col,
    date_format: str | None = _SLICE.date_format,
    skip_bad_dates: bool = _SLICE.skip_bad_dates,
    by: str = _SLICE.by,
    balance: str | int | None = _SLICE.balance,
    keep_case: bool = _SLICE.keep_case,
    pretokenized: bool = _SLICE.pretokenized,
    seed: int = _SLICE.seed,
    quiet: bool = False,
    encoding: str | None = _SLICE.encoding,
    delimiter: str | None = _SLICE.delimiter,
    id_col: str | None = _SLICE.id_col,
    meta: Sequence[str] | str | None = _SLICE.meta,
    where: Sequence[str] | str | None = _SLICE.where,
    balance_by: str | None = _SLICE.balance_by,
    append: bool = _SLICE.append,
    engine: str = _SLICE.engine,
    scheduler: str | None = _SLICE.scheduler,
    dask_workers: int | None = None,
) -> pd.DataFrame:
    """Cut ``source`` into time slices in the run folder ``out`` and return the slice summary.

    The archive is streamed, never held whole. Writes ``slices/<label>.txt``,
    ``slices/summary.csv``, ``counts.parquet`` and the slice stage of ``run.json``; a rerun with
    the same source and options reuses the slices. Defaults and help texts of the options:
    :class:`drift.options.SliceOptions`.
    Also writes the document index (``documents.parquet``/``.csv``) and the composition of each
    slice (``composition.parquet``/``.csv``), see :mod:`drift.ingest.documents`.

    Parameters
    ----------
    source : str, Path, or a sequence of them
        CSV, TSV, JSON Lines, Parquet file or a folder of .txt files; may be .gz, .bz2 or .xz.
        Several paths, glob patterns (``news/*.csv.gz``) and folders of table parts are read
        as one archive (see :func:`drift.ingest.sources.expand_sources`).
    out : str or Path
        The run folder (made if missing).
    fmt : str, optional
        ``csv``, ``tsv``, ``jsonl``, ``parquet`` or ``txt``; by default from the extension.
    time_col, text_col : str, optional
        Columns with the dates and the text; by default the one column named ``date``,
        ``time``, ``year`` or ``timestamp``, and ``text``, ``body`` or ``content``.
    date_format : str, optional
        strptime layout of the dates, e.g. ``"%d/%m/%Y"``.
    skip_bad_dates : bool
        Drop documents whose date does not parse (counted) instead of stopping.
    by : str
        ``year``, ``decade``, ``Ny`` (e.g. ``5y``), ``edges:1990,2000,2010`` or ``even:K``.
    balance : str or int, optional
        ``"smallest"`` down-samples every slice to the smallest slice's tokens; a number, to
        that many tokens.
    keep_case, pretokenized : bool
        Keep upper case; split on white space only.
    seed : int
        Seed of the balancing draw.
    quiet : bool
        No progress bar or notes.
    encoding, delimiter : str, optional
        Text encoding (default UTF-8, cp1252 when a file is not UTF-8) and CSV field separator,
        passed to :func:`drift.ingest.readers.open_source`.
    id_col : str, optional
        Column with document ids (default: the source row number, or a .txt file's name).
    meta : str or sequence of str, optional
        Metadata columns kept in the document index and counted in the composition.
    where : str or sequence of str, optional
        Keep part of the archive: ``column=value``, ``column!=value``, several values separated
        by commas; every condition must hold.
    balance_by : str, optional
        Balance so that every slice keeps the same tokens of each value of this column.
    append : bool
        Add the documents of ``source`` to the slices already in ``out`` instead of starting
        over: see :func:`drift.ingest.growing.append_archive` (the slicing options are the run's).
    engine : str
        ``local`` (this process, two threads) or ``dask`` (one task per source file on a Dask
        cluster, merged in input order: the same run folder, see
        :mod:`drift.ingest.dask_slicing`).
    scheduler : str, optional
        With ``engine="dask"``: the scheduler's address (default: a LocalCluster).
    dask_workers : int, optional
        Workers of that LocalCluster (default: the cores, at most one per task: per file,
        or per piece of a large file).

    Returns
    -------
    pandas.DataFrame
        One row per slice in time order: ``label, start, end, documents, tokens, types,
        dropped``. ``summary.attrs`` holds ``reused`` (the slices were already current),
        ``warnings`` and ``totals`` (documents read, bad dates skipped, outside the edges, empty
        documents, replaced characters).

    Raises
    ------
    DriftError
        A missing or unreadable source, unknown columns (the message lists those that exist),
        dates that do not parse, an empty slice, a bad ``by`` or ``balance``.

    Examples
    --------
    >>> import drift
    >>> summary = drift.slice_archive(archive, workdir / "run", by="decade", quiet=True)
    >>> summary["label"].tolist()
    ['1950s', '1960s', '1970s', '1980s', '1990s', '2000s']
    >>> list(summary.columns)
    ['label', 'start', 'end', 'documents', 'tokens', 'types', 'dropped']
    """
    if append:
        from drift.ingest.growing import append_archive

        return append_archive(
            source, out, fmt=fmt, time_col=time_col, text_col=text_col, date_format=date_format,
            skip_bad_dates=skip_bad_dates, encoding=encoding, delimiter=delimiter, quiet=quiet,
            by=by, balance=balance, keep_case=keep_case, pretokenized=pretokenized,
            id_col=id_col, meta=meta, where=where, balance_by=balance_by,
        )
    started = time.perf_counter()
    SliceOptions(engine=engine, scheduler=scheduler)  # checks them as the command line does
    rule = parse_by(by)
    budget = parse_balance(balance)
    given = [source] if isinstance(source, str | Path) else list(source)
    for folder in (Path(item) for item in given):
        if folder.is_dir() and Path(out).resolve().is_relative_to(folder.resolve()):
            raise DriftError(
                f"--out {out} is inside the source folder {folder}, so its slices would be read "
                "as documents next time; choose a run folder outside it."
            )
    reader, files = open_sources(
        source, fmt, time_col, text_col, encoding=encoding, delimiter=delimiter, exclude=out
    )
    source = files[0] if len(files) == 1 else common_folder(files)
    spec, clauses = _resolve_columns(reader, id_col, meta, where, balance_by)
    if balance_by and budget is None:
        budget = "smallest"
    paths = runfolder.prepare_run_folder(Path(out))
    params = {
        "format": reader.fmt,
        "time_col": reader.time_col,
        "text_col": reader.text_col,
        "date_format": date_format,
        "skip_bad_dates": bool(skip_bad_dates),
        "by": str(by).strip().lower(),
        "balance": budget,
        "keep_case": bool(keep_case),
        "pretokenized": bool(pretokenized),
        "seed": int(seed),
        "encoding": reader.encoding,
        "delimiter": delimiter,
        "id_col": spec.id_col,
        "meta": list(spec.meta),
        "where": [c.text() for c in clauses],
        "balance_by": spec.meta[0] if balance_by else None,
    }
    with runfolder.run_lock(paths.root):
        inputs = fingerprint_sources(files)
        recorded = runfolder.read_manifest(paths.root).get("stages", {}).get(STAGE, {})
        from drift.ingest import growing

        grown = growing.first_source_is_current(recorded, params, inputs)
        if (
            runfolder.stage_is_current(paths.root, STAGE, params, inputs) or grown
        ) and _outputs_exist(paths, recorded.get("labels")):
            note(
                f"the slices in {paths.root} are current (same input and parameters"
                f"{', plus the documents appended since' if grown else ''}); reusing them.",
                quiet,
            )
            summary = read_summary(paths.root)
            summary.attrs.update(reused=True, warnings=[], totals=recorded.get("totals", {}))
            return summary
        runfolder.forget_stage(paths.root, STAGE)
        _clean_leftovers(paths)
        if engine == "dask":
            from drift.ingest import dask_slicing

            with dask_slicing.feeds(
                reader, fmt=fmt, encoding=encoding, delimiter=delimiter,
                scheduler=scheduler, workers=dask_workers, quiet=quiet,
            ) as make_feed:
                summary, totals, timings = _run(
                    reader, paths, rule, budget, params, seed, quiet, spec, make_feed=make_feed
                )
        else:
            summary, totals, timings = _run(reader, paths, rule, budget, params, seed, quiet, spec)
        # parts a failed Dask pass kept for its rerun are not needed once a pass succeeded
        shutil.rmtree(paths.slices_dir / KEPT_PARTS, ignore_errors=True)
        labels = summary["label"].tolist()
        timings["total"] = round(time.perf_counter() - started, 3)
        runfolder.record_stage(
            paths.root,
            STAGE,
            params,
            inputs,
            time.perf_counter() - started,
            extra={
                "labels": labels,
                "source": str(source.resolve()),
                **({"sources": [str(f.resolve()) for f in files]} if len(files) > 1 else {}),
                "engine": engine,
                "totals": totals,
                "timings": timings,
                "history": [growing.first_entry(source, inputs, totals, labels)],
            },
        )
    messages = (
        slice_warnings(summary)
        + summary.attrs.get("index_notes", [])
        + summary.attrs.get("reader_notes", [])
    )
    labels = summary["label"].tolist()
    if len(labels) > 1 and spec.meta:
        messages += documents.composition_shifts(summary.attrs["composition"],
                                                 documents.mix_pairs(labels))[1]
    if totals.get("left_out_by_where"):
        messages.append(
            f"{_count(totals['left_out_by_where'], 'document')} left out by "
            f"{' '.join('--where ' + w for w in params['where'])}."
        )
    if totals["bad_dates_skipped"]:
        messages.append(
            f"{_count(totals['bad_dates_skipped'], 'document')} whose date does not parse "
            "left out (--skip-bad-dates)."
        )
    if totals["outside_edges"]:
        messages.append(
            f"{_count(totals['outside_edges'], 'document')} outside the --by edges left out."
        )
    if totals["replaced_characters"]:
        messages.append(
            f"{_count(totals['replaced_characters'], 'undecodable byte sequence')} in "
            f"{reader.path.name} replaced by U+FFFD (the input is read as "
            f"{reader.encoding_used}; name another with --encoding)."
        )
    for message in messages:
        warn(message)
    summary.attrs.update(reused=False, warnings=messages, totals=totals)
    return summary


def _resolve_columns(
    reader: Reader,
    id_col: str | None,
    meta: Sequence[str] | str | None,
    where: Sequence[str] | str | None,
    balance_by: str | None,
) -> tuple[documents.IndexSpec, tuple[documents.WhereClause, ...]]:
    """Check the id, metadata and --where columns against the source (a missing one is an error
    listing the columns) and ask the reader for them."""
    if isinstance(meta, str):
        meta = [meta]
    names = [m.strip() for item in (meta or []) for m in str(item).split(",") if m.strip()]
    if balance_by:
        names = [balance_by, *[n for n in names if n != balance_by]]
    resolved = []
    for name in names:
        found = reader.want(name, "--balance-by" if name == balance_by else "--meta")
        if found in documents.INDEX_COLUMNS:
            raise DriftError(
                f"--meta {found} has the name of a column the document index already has "
                f"({', '.join(documents.INDEX_COLUMNS)}); rename that column in the source."
            )
        if found not in resolved:
            resolved.append(found)
    clauses = documents.parse_where(where)
    clauses = tuple(
        documents.WhereClause(reader.want(c.column, "--where"), c.values, c.keep) for c in clauses
    )
    txt = reader.fmt == "txt"
    if txt:
        reader.want("file", "--meta")
    id_found = reader.want(id_col, "--id-col") if id_col else None
    spec = documents.IndexSpec(
        id_found, tuple(resolved), txt, reader.path.name,
        many_sources=isinstance(reader, MultiReader),
    )
    return spec, clauses


def _run(
    reader: Reader,
    paths: runfolder.RunPaths,
    rule: SliceRule,
    budget: str | int | None,
    params: dict[str, Any],
    seed: int,
    quiet: bool,
    spec: documents.IndexSpec | None = None,
    check_edges: bool = True,
    make_feed: FeedMaker | None = None,
) -> tuple[pd.DataFrame, dict[str, int], dict[str, float]]:
    """Read, slice, balance and write; returns the summary, totals and timings (with
    ``check_edges`` False, --by edges that hold no documents are no error: appended documents).
    ``make_feed`` makes the first pass's feed (default: :class:`LocalFeed`, batches processed
    here).

    The summary's ``attrs`` carry the composition table, the index's warnings and the reader's
    notes (``reader_notes``)."""
    spec = spec or documents.IndexSpec(
        source_name=reader.path.name, many_sources=isinstance(reader, MultiReader)
    )
    settings = _Settings(
        rule, params["date_format"], params["keep_case"], params["pretokenized"],
        documents.parse_where(params.get("where")), _index_columns(spec),
    )
    timings: dict[str, float] = {}
    paths.slices_dir.mkdir(parents=True, exist_ok=True)
    counts = WordCounts()
    # a Dask task still running when the pass failed may write into the work folder while it is
    # removed; a leftover is removed by the next run (_clean_leftovers)
    with tempfile.TemporaryDirectory(
        prefix=".work-", dir=paths.slices_dir, ignore_cleanup_errors=True
    ) as work:
        index = documents.DocumentIndex(spec, Path(work) / "index")
        clock = time.perf_counter()
        skip = params["skip_bad_dates"]
        if rule.kind == "even":
            year_files = _SliceFiles(Path(work) / "years", keep_lines=False)
            feed = (make_feed or _local_feed)(reader, settings, year_files, counts)
            try:
                totals = _first_pass(reader, settings, year_files, counts, skip, quiet, index, feed)
            finally:
                index.close()
            _check_where(settings, totals, index)
            _check_read(reader, totals, skip, bool(year_files.tallies))
            days = np.concatenate([d for d, _ in totals.day_tokens])
            tokens = np.concatenate([t for _, t in totals.day_tokens])
            bins = even_bins(days, tokens, rule.count)
            files = _SliceFiles(Path(work) / "slices", keep_lines=budget is not None)
            _second_pass_even(year_files, bins, files, counts, quiet)
            shutil.rmtree(year_files.folder, ignore_errors=True)
        else:
            files = _SliceFiles(Path(work) / "slices", keep_lines=budget is not None)
            feed = (make_feed or _local_feed)(reader, settings, files, counts)
            try:
                totals = _first_pass(reader, settings, files, counts, skip, quiet, index, feed)
            finally:
                index.close()
            _check_where(settings, totals, index)
            _check_read(reader, totals, skip, bool(files.tallies))
            if check_edges:
                _check_edges(rule, files)
            bins = [bin_for_key(rule, key) for key in sorted(files.tallies)]
        timings["read"] = round(time.perf_counter() - clock, 3)
        keys = [b.key for b in bins]
        numbers = index.numbers()
        if rule.kind == "even":
            starts = np.array([b.start for b in bins], dtype=np.int64)
            bin_of = np.searchsorted(starts, numbers["days"], side="right") - 1
        else:
            bin_of = np.searchsorted(np.asarray(keys), numbers["keys"])
        order = documents.slice_order(bin_of, numbers["keys"], rule.kind == "even")
        doc_lines, doc_tokens = numbers["lines"].copy(), numbers["tokens"].copy()
        dropped = dict.fromkeys(keys, 0)
        notes: list[str] = []
        if budget is not None:
            clock = time.perf_counter()
            in_slice = _documents_by_slice(bin_of, doc_lines, order, keys)
            if params.get("balance_by"):
                strata, budgets, notes = _strata(
                    index, params["balance_by"], files, keys, in_slice, bin_of, doc_tokens,
                    budget,
                )
                dropped, kept = _balance(files, counts, 0, seed, keys, strata, budgets)
            else:
                target = (
                    min(files.tallies[k].tokens for k in keys) if budget == "smallest" else budget
                )
                short = [b for b in bins if files.tallies[b.key].tokens < target]
                if short:
                    raise DriftError(
                        f"--balance {budget} asks for more tokens than slice {short[0].label} "
                        f"holds ({files.tallies[short[0].key].tokens:,}); give a smaller number, "
                        "or --balance alone for the smallest slice's size."
                    )
                dropped, kept = _balance(files, counts, int(target), seed, keys)
            for key, keep in kept.items():
                _apply_kept(files.tallies[key], keep, in_slice[key], doc_lines, doc_tokens)
            timings["balance"] = round(time.perf_counter() - clock, 3)
        first = documents.first_lines(bin_of, doc_lines, order)
        composition, index_notes = documents.write_index(
            index, paths, [b.label for b in bins], bin_of, doc_lines, doc_tokens, first
        )
        clock = time.perf_counter()
        words, matrix = counts.matrix(keys)
        labels = [b.label for b in bins]
        summary = pd.DataFrame(
            {
                "label": labels,
                "start": [day_to_iso(b.start) for b in bins],
                "end": [day_to_iso(b.end) for b in bins],
                "documents": [files.tallies[k].documents for k in keys],
                "tokens": [files.tallies[k].tokens for k in keys],
                "types": (matrix > 0).sum(axis=0).astype(np.int64),
                "dropped": [dropped[k] for k in keys],
            },
            columns=SUMMARY_COLUMNS,
        )
        for b in bins:
            with runfolder.atomic_path(paths.slice_file(b.label)) as tmp:
                os.replace(files.path(b.key), tmp)
    for stale in paths.slices_dir.glob("*.txt"):
        if stale.stem not in labels:
            stale.unlink()
    table = pa.table({"word": words, **{label: matrix[:, i] for i, label in enumerate(labels)}})
    runfolder.write_table(paths.root, "counts", table)
    runfolder.write_table(paths.root, "summary", summary)
    timings["write"] = round(time.perf_counter() - clock, 3)
    summary.attrs.update(
        composition=composition, index_notes=notes + index_notes, reader_notes=feed.notes()
    )
    totals_out = {
        "documents_read": totals.rows,
        "bad_dates_skipped": totals.bad.count,
        "outside_edges": totals.outside,
        "left_out_by_where": totals.where_dropped,
        "empty_documents": totals.empty,
        "replaced_characters": feed.replaced,
        "legacy_characters": feed.legacy,
    }
    return summary, totals_out, timings


def _local_feed(reader: Reader, settings: _Settings, files: _SliceFiles, counts: WordCounts):
    return LocalFeed(reader, settings)
