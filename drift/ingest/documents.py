"""The document index and the composition of each slice (written by STAGE slice).

For every document kept, ``documents.parquet`` (and ``documents.csv``) holds a stable id, the
date as written, the metadata columns named with ``--meta``, its slice, where it lies in the
source (``source_row``: the n-th data row, or the n-th .txt file; ``source_file``) and where its
tokenized lines lie in ``slices/<slice>.txt`` (``line``: first line, 1-based, 0 when none is
left; ``lines``; ``tokens``). The index is built while the source streams past: strings go to a
temporary Parquet file batch by batch, and only a few numbers per document stay in memory.

``composition.parquet`` (and ``.csv``) counts documents and tokens per slice and metadata value.
A mix that changes strongly between two slices moves words by itself, so :func:`composition_shifts`
flags pairs of slices whose mix differs by a total variation distance over
:data:`MIX_SHIFT_WARNING` (half the sum of absolute differences of the shares).

``--where`` keeps part of the archive: ``column=value``, ``column!=value``, several values
separated by commas (any of them), several clauses all at once.
"""

from __future__ import annotations

import collections
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from drift import runfolder
from drift.errors import DriftError
from drift.options import WhereClause, parse_where  # noqa: F401  (re-exported)

#: Total variation distance between two slices' mixes above which a warning is given. Common
#: practice (no published threshold): 0.2 means a fifth of one slice's tokens would have to come
#: from other sources to match the other slice's mix.
MIX_SHIFT_WARNING = 0.2
#: Columns of the index that are not metadata (a --meta column may not take these names).
INDEX_COLUMNS = ("document", "date", "slice", "source_row", "source_file", "line", "lines",
                 "tokens")
COMPOSITION_COLUMNS = list(runfolder.COMPOSITION_COLUMNS)
#: Rows per row group of the document index (its files do not depend on how the source was cut
#: into batches, so the local and Dask engines write the same bytes).
INDEX_ROW_GROUP = 1 << 16
#: How a repeated id is made unique: the n-th use of an id (n >= 2) becomes ``id~n``.
DUPLICATE_SUFFIX = "~"
_MISSING = "(none)"


# ---------------------------------------------------------------------------- --where


def where_mask(extra: dict[str, pa.Array] | None, clauses: Sequence[WhereClause], rows: int):
    """True for the rows every clause keeps (a missing value counts as the empty string)."""
    keep = np.ones(rows, dtype=bool)
    for clause in clauses:
        column = pc.fill_null(extra[clause.column], "") if extra else pa.nulls(rows, pa.string())
        hit = pc.is_in(column, value_set=pa.array(clause.values, pa.string()))
        hit = hit.to_numpy(zero_copy_only=False)
        keep &= hit if clause.keep else ~hit
    return keep


def where_error(
    clauses: Sequence[WhereClause], counts: dict[str, collections.Counter]
) -> DriftError:
    """The error for a --where that keeps nothing: how many documents each value has."""
    described = []
    for column, counter in counts.items():
        common = counter.most_common(8)
        listed = ", ".join(f"{v if v else _MISSING}: {n:,}" for v, n in common)
        more = f" and {len(counter) - 8:,} other values" if len(counter) > 8 else ""
        described.append(f"'{column}' has {listed}{more}")
    asked = " ".join(f"--where {c.text()}" for c in clauses)
    return DriftError(
        f"{asked} keeps no document ({'; '.join(described)}); choose values that occur."
    )


# ---------------------------------------------------------------------------- one batch


@dataclass
class BatchDocuments:
    """The documents of one batch that were kept, in input order (built on a worker thread)."""

    rows: np.ndarray  # position in the batch
    keys: np.ndarray  # slice key (the year for even:K)
    days: np.ndarray
    lines: np.ndarray  # lines written to the slice file
    tokens: np.ndarray
    strings: pa.Table  # date as written, id and metadata columns (text)
    continues: bool  # the first kept row continues the previous batch's last document
    source: str | None = None  # the batch's file, when several files are read as one archive


# ---------------------------------------------------------------------------- the index


@dataclass
class IndexSpec:
    """Which source columns the index keeps: the id column, metadata columns, the stratum."""

    id_col: str | None = None
    meta: tuple[str, ...] = ()
    file_names: bool = False  # a folder of .txt files: the id defaults to the file name
    source_name: str = ""
    many_sources: bool = False  # several files: rows are numbered and named per file


@dataclass
class DocumentIndex:
    """Collects the documents of a slice run while the source streams past."""

    spec: IndexSpec
    work: Path
    keys: list[np.ndarray] = field(default_factory=list)
    days: list[np.ndarray] = field(default_factory=list)
    lines: list[np.ndarray] = field(default_factory=list)
    tokens: list[np.ndarray] = field(default_factory=list)
    source_rows: list[np.ndarray] = field(default_factory=list)
    next_row: int = 1
    source: str | None = None  # the file being read (several sources)
    _writer: pq.ParquetWriter | None = None
    _pending: list[pa.Table] = field(default_factory=list)
    _pending_rows: int = 0

    @property
    def path(self) -> Path:
        return self.work / "documents.parquet"

    def add(self, docs: BatchDocuments, batch_rows: int, batch_continues: bool) -> None:
        """Append one batch's documents (in input order, from the main thread). With several
        sources, rows are numbered within each file and the file is kept (``source:``)."""
        if docs.source != self.source:
            self.source, self.next_row = docs.source, 1
        first_row = self.next_row - (1 if batch_continues else 0)
        self.next_row = first_row + batch_rows
        rows = docs.rows.astype(np.int64) + first_row
        lines, tokens = docs.lines.astype(np.int64), docs.tokens.astype(np.int64)
        strings = docs.strings
        if docs.continues and len(rows) and self.lines:
            for chunk in range(len(self.lines) - 1, -1, -1):  # the last document so far
                if len(self.lines[chunk]):
                    self.lines[chunk][-1] += lines[0]
                    self.tokens[chunk][-1] += tokens[0]
                    break
            rows, lines, tokens = rows[1:], lines[1:], tokens[1:]
            keys, days, strings = docs.keys[1:], docs.days[1:], strings.slice(1)
        else:
            keys, days = docs.keys, docs.days
        self.keys.append(keys.astype(np.int64))
        self.days.append(days.astype(np.int64))
        self.lines.append(lines)
        self.tokens.append(tokens)
        self.source_rows.append(rows)
        if self.spec.many_sources:
            strings = strings.append_column(
                "source:", pa.array([docs.source] * strings.num_rows, pa.string())
            )
        self._pending.append(strings)
        self._pending_rows += strings.num_rows
        if self._pending_rows >= INDEX_ROW_GROUP:
            self._write(final=False)

    def _write(self, final: bool) -> None:
        """Write the strings kept so far in row groups of :data:`INDEX_ROW_GROUP` rows (the
        rest waits, unless ``final``), so the files do not depend on how batches were cut."""
        if not self._pending:
            return
        table = pa.concat_tables(self._pending)
        if self._writer is None:
            self.work.mkdir(parents=True, exist_ok=True)
            self._writer = pq.ParquetWriter(self.path, table.schema)
        whole = table.num_rows if final else table.num_rows - table.num_rows % INDEX_ROW_GROUP
        for start in range(0, whole, INDEX_ROW_GROUP):
            self._writer.write_table(
                table.slice(start, min(INDEX_ROW_GROUP, whole - start)),
                row_group_size=INDEX_ROW_GROUP,
            )
        rest = table.slice(whole)
        self._pending = [rest] if rest.num_rows else []
        self._pending_rows = rest.num_rows

    def close(self) -> None:
        self._write(final=True)
        if self._writer is not None:
            self._writer.close()
            self._writer = None

    def numbers(self) -> dict[str, np.ndarray]:
        """The per-document numbers, concatenated (input order)."""

        def cat(parts: list[np.ndarray]) -> np.ndarray:
            return np.concatenate(parts) if parts else np.zeros(0, np.int64)

        return {
            "keys": cat(self.keys), "days": cat(self.days), "lines": cat(self.lines),
            "tokens": cat(self.tokens), "source_rows": cat(self.source_rows),
        }

    def column_values(self, column: str) -> pa.Array:
        """One string column of every document (for the strata of --balance-by)."""
        table = pq.read_table(self.path, columns=[column]) if self.path.exists() else None
        if table is None:
            return pa.array([], pa.string())
        return pc.fill_null(table.column(0).combine_chunks(), "")


def slice_order(bin_of: np.ndarray, keys: np.ndarray, even: bool) -> np.ndarray:
    """Documents in the order their lines appear in the slice files: by slice, then (for
    even:K, whose slices are cut from per-year files) by year, then in input order."""
    position = np.arange(len(bin_of))
    if even:
        return np.lexsort((position, keys, bin_of))
    return np.lexsort((position, bin_of))


def first_lines(bin_of: np.ndarray, lines: np.ndarray, order: np.ndarray) -> np.ndarray:
    """The first line of each document in its slice file (1-based; 0 when it has none)."""
    first = np.zeros(len(lines), dtype=np.int64)
    ordered_bins, ordered_lines = bin_of[order], lines[order]
    ends = np.cumsum(ordered_lines)
    starts_of_bin = np.searchsorted(ordered_bins, ordered_bins, side="left")
    before_bin = np.where(starts_of_bin > 0, ends[np.maximum(starts_of_bin - 1, 0)], 0)
    value = ends - ordered_lines - before_bin + 1
    first[order] = np.where(ordered_lines > 0, value, 0)
    return first


def unique_ids(ids: Iterable[str], seen: dict[str, int]) -> tuple[list[str], list[str]]:
    """Ids made unique in input order (the n-th use of X becomes X~n); also the repeated ids."""
    out, repeated = [], []
    for raw in ids:
        if raw not in seen:
            seen[raw] = 1
            out.append(raw)
            continue
        repeated.append(raw)
        n = seen[raw]
        while True:
            n += 1
            candidate = f"{raw}{DUPLICATE_SUFFIX}{n}"
            if candidate not in seen:
                break
        seen[raw] = n
        seen[candidate] = 1
        out.append(candidate)
    return out, repeated


def write_index(
    index: DocumentIndex,
    paths: runfolder.RunPaths,
    labels: Sequence[str],
    bin_of: np.ndarray,
    lines: np.ndarray,
    tokens: np.ndarray,
    first: np.ndarray,
) -> tuple[pd.DataFrame, list[str]]:
    """Write documents.parquet/.csv and composition.parquet/.csv; return the composition and
    warnings (duplicate ids). Streams the temporary string columns row group by row group."""
    numbers = index.numbers()
    spec = index.spec
    label_array = np.asarray(labels, dtype=object)
    seen: dict[str, int] = {}
    repeated: list[str] = []
    repeated_count = 0
    tallies: dict[tuple[str, str, str], list[int]] = {}
    schema = _index_schema(spec)
    offset = 0
    source = pq.ParquetFile(index.path) if index.path.exists() else None
    with runfolder.atomic_path(paths.documents_parquet) as tmp_parquet, \
            runfolder.atomic_path(paths.documents_csv) as tmp_csv:
        writer = pq.ParquetWriter(tmp_parquet, schema)
        with open(tmp_csv, "wb") as csv_handle:
            csv_writer = pacsv.CSVWriter(csv_handle, schema)
            groups = range(source.num_row_groups) if source is not None else range(0)
            for group in groups:
                strings = source.read_row_group(group)
                n = strings.num_rows
                span = slice(offset, offset + n)
                offset += n
                rows = numbers["source_rows"][span]
                if spec.id_col:
                    raw_ids = pc.fill_null(strings.column(f"id:{spec.id_col}"), "").to_pylist()
                elif spec.file_names:
                    raw_ids = strings.column("file:").to_pylist()
                elif spec.many_sources:
                    raw_ids = [f"{name}:{row}" for name, row in
                               zip(strings.column("source:").to_pylist(), rows, strict=True)]
                else:
                    raw_ids = [str(r) for r in rows]
                ids, again = unique_ids(raw_ids, seen)
                repeated_count += len(again)
                repeated.extend(again[: max(0, 3 - len(repeated))])
                slices = label_array[bin_of[span]]
                columns = {
                    "document": pa.array(ids, pa.string()),
                    "date": strings.column("date:").combine_chunks(),
                }
                for name in spec.meta:
                    columns[name] = strings.column(f"meta:{name}").combine_chunks()
                columns.update(
                    slice=pa.array(slices, pa.string()),
                    source_row=pa.array(rows, pa.int64()),
                    source_file=_source_files(strings, spec, n),
                    line=pa.array(first[span], pa.int64()),
                    lines=pa.array(lines[span], pa.int64()),
                    tokens=pa.array(tokens[span], pa.int64()),
                )
                table = pa.table(columns, schema=schema)
                writer.write_table(table)
                csv_writer.write_table(table)
                _tally(tallies, spec.meta, slices, table, tokens[span])
            csv_writer.close()
        writer.close()
    composition = _composition_frame(tallies, labels)
    write_composition(paths, composition)
    warnings = []
    if repeated_count:
        examples = ", ".join(f"'{r}'" for r in dict.fromkeys(repeated))
        warnings.append(
            f"{repeated_count:,} document{'s' if repeated_count != 1 else ''} repeat an id "
            f"already used (e.g. {examples}); each later use of an id X is renamed "
            f"X{DUPLICATE_SUFFIX}2, X{DUPLICATE_SUFFIX}3, ... in input order."
        )
    return composition, warnings


def _source_files(strings: pa.Table, spec: IndexSpec, n: int) -> pa.Array:
    """The ``source_file`` column: the .txt file, the file of several, or the one source."""
    if spec.file_names:
        return strings.column("file:").combine_chunks()
    if spec.many_sources:
        return strings.column("source:").combine_chunks()
    return pa.array([spec.source_name] * n, pa.string())


def _index_schema(spec: IndexSpec) -> pa.Schema:
    fields = [("document", pa.string()), ("date", pa.string())]
    fields += [(name, pa.string()) for name in spec.meta]
    fields += [("slice", pa.string()), ("source_row", pa.int64()), ("source_file", pa.string()),
               ("line", pa.int64()), ("lines", pa.int64()), ("tokens", pa.int64())]
    return pa.schema(fields)


def _tally(tallies, meta: Sequence[str], slices: np.ndarray, table: pa.Table, tokens) -> None:
    for name in meta:
        values = pc.fill_null(table.column(name), _MISSING).to_numpy(zero_copy_only=False)
        frame = pd.DataFrame({"slice": slices, "value": values, "tokens": tokens})
        grouped = frame.groupby(["slice", "value"], sort=False)["tokens"].agg(["size", "sum"])
        for (label, value), row in grouped.iterrows():
            entry = tallies.setdefault((label, name, value), [0, 0])
            entry[0] += int(row["size"])
            entry[1] += int(row["sum"])


def _composition_frame(tallies, labels: Sequence[str]) -> pd.DataFrame:
    rows = [
        {"slice": label, "column": column, "value": value, "documents": d, "tokens": t}
        for (label, column, value), (d, t) in tallies.items()
    ]
    frame = pd.DataFrame(rows, columns=COMPOSITION_COLUMNS[:-1])
    frame["documents"] = frame["documents"].astype(np.int64)
    frame["tokens"] = frame["tokens"].astype(np.int64)
    totals = frame.groupby(["slice", "column"])["tokens"].transform("sum")
    frame["share"] = (frame["tokens"] / totals.where(totals > 0)).astype(float)
    position = {label: i for i, label in enumerate(labels)}
    frame["_order"] = frame["slice"].map(position)
    frame = frame.sort_values(["column", "_order", "value"], kind="stable")
    return frame.drop(columns="_order").reset_index(drop=True)[COMPOSITION_COLUMNS]


def write_composition(paths: runfolder.RunPaths, composition: pd.DataFrame) -> None:
    """composition.parquet and composition.csv."""
    runfolder.write_table(paths.root, "composition", composition)


# ---------------------------------------------------------------------------- reading


def read_documents(run: str | Path, columns: Sequence[str] | None = None) -> pd.DataFrame:
    """The document index of a sliced run (``documents.parquet``).

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.
    columns : sequence of str, optional
        Read only these columns.

    Returns
    -------
    pandas.DataFrame
        One row per document kept, in input order: ``document, date``, the ``--meta`` columns,
        ``slice, source_row, source_file, line, lines, tokens``.

    Raises
    ------
    DriftError
        The folder holds no slices, or was sliced before the index existed.

    Examples
    --------
    >>> import drift
    >>> index = drift.read_documents(run)
    >>> list(index.columns)
    ['document', 'date', 'source', 'slice', 'source_row', 'source_file', 'line', 'lines', 'tokens']
    >>> index["document"].iloc[0]
    'pm-00001'
    """
    paths = runfolder.existing_run(Path(run), needs="slices")
    if not paths.documents_parquet.exists():
        raise DriftError(
            f"{paths.root} has no document index (documents.parquet); slice it again with "
            "'drift slice' to make one."
        )
    return runfolder.read_table(paths.root, "documents", list(columns) if columns else None)


def has_index(run: str | Path) -> bool:
    return runfolder.RunPaths(Path(run)).documents_parquet.exists()


def meta_columns(run: str | Path) -> list[str]:
    """The metadata columns the run's index keeps (``--meta``)."""
    params = runfolder.read_manifest(Path(run)).get("stages", {}).get("slice", {}).get("params", {})
    return list(params.get("meta") or [])


def total_variation(p: pd.Series, q: pd.Series) -> float:
    """Half the sum of absolute differences of two distributions (shares, aligned by index).

    Examples
    --------
    >>> round(total_variation(pd.Series({"a": 50, "b": 50}), pd.Series({"a": 80, "b": 20})), 6)
    0.3
    """
    p, q = p.align(q, fill_value=0.0)
    p = p / p.sum() if p.sum() > 0 else p
    q = q / q.sum() if q.sum() > 0 else q
    return float(0.5 * (p - q).abs().sum())


def mix_pairs(labels: Sequence[str], between: Sequence[str] | None = None) -> list[tuple[str, str]]:
    """The pairs of slices whose mix is compared: the compared pair (default: the first and the
    last slice), then each pair of neighbouring slices that is not it."""
    pair = tuple(between) if between else (labels[0], labels[-1])
    return [pair] + [
        (a, b) for a, b in zip(labels, labels[1:], strict=False) if (a, b) != pair
    ]


def composition_shifts(
    composition: pd.DataFrame,
    pairs: Iterable[tuple[str, str]],
    threshold: float = MIX_SHIFT_WARNING,
) -> tuple[pd.DataFrame, list[str]]:
    """Total variation distance of the token mix for each pair of slices and metadata column,
    and a warning for each over ``threshold``."""
    rows, warnings = [], []
    for column, part in composition.groupby("column", sort=False):
        shares = part.pivot_table(index="value", columns="slice", values="tokens",
                                  aggfunc="sum", fill_value=0)
        for a, b in pairs:
            if a not in shares.columns or b not in shares.columns:
                continue
            distance = total_variation(shares[a], shares[b])
            rows.append({"column": column, "from": a, "to": b, "distance": distance})
            if distance > threshold:
                share_a = shares[a] / max(shares[a].sum(), 1)
                share_b = shares[b] / max(shares[b].sum(), 1)
                moved = (share_b - share_a).abs().sort_values(ascending=False).head(3)
                detail = ", ".join(
                    f"{value} {share_a[value]:.0%} → {share_b[value]:.0%}" for value in moved.index
                )
                warnings.append(
                    f"the mix of '{column}' changes strongly between {a} and {b} (total variation "
                    f"distance {distance:.2f} > {threshold}: {detail}); words tied to one {column} "
                    f"may look shifted for that reason alone; consider --where or --balance-by "
                    f"{column}."
                )
    return pd.DataFrame(rows, columns=["column", "from", "to", "distance"]), warnings


def read_composition(run: str | Path) -> pd.DataFrame:
    """The composition of each slice (``composition.parquet``).

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.

    Returns
    -------
    pandas.DataFrame
        ``slice, column, value, documents, tokens, share`` (the share of the slice's tokens);
        empty when the run was sliced without ``--meta``.

    Raises
    ------
    DriftError
        The folder holds no slices or no composition table.

    Examples
    --------
    >>> import drift
    >>> table = drift.read_composition(run)
    >>> sorted(table["value"].unique())
    ['gazette', 'letter', 'minutes']
    """
    paths = runfolder.existing_run(Path(run), needs="slices")
    if not paths.composition_parquet.exists():
        raise DriftError(
            f"{paths.root} has no composition table; slice it again with 'drift slice --meta "
            "COLUMN' to make one."
        )
    return runfolder.read_table(paths.root, "composition")


def composition(
    run: str | Path, between: Sequence[str] | None = None
) -> tuple[pd.DataFrame, pd.DataFrame, list[str]]:
    """The composition of each slice and how much the mix changes between slices.

    Parameters
    ----------
    run : str or Path
        A run folder sliced with ``--meta``.
    between : two slice labels, optional
        The compared pair (default: the rank stage's pair, else the first and last slice).

    Returns
    -------
    table : pandas.DataFrame
        ``slice, column, value, documents, tokens, share`` (see :func:`read_composition`).
    shifts : pandas.DataFrame
        ``column, from, to, distance``: the total variation distance of the token mix for the
        compared pair and for each pair of neighbouring slices.
    warnings : list of str
        One sentence per distance over :data:`MIX_SHIFT_WARNING`.

    Raises
    ------
    DriftError
        The run has no composition table.

    Examples
    --------
    >>> import drift
    >>> table, shifts, warnings = drift.composition(run)
    >>> list(shifts.columns), bool((shifts["distance"] <= 1).all())
    (['column', 'from', 'to', 'distance'], True)
    """
    from drift.ingest.slicing import slice_labels

    table = read_composition(run)
    labels = slice_labels(run)
    if between is None:
        rank = runfolder.read_manifest(Path(run)).get("stages", {}).get("rank", {})
        between = rank.get("params", {}).get("between") or [labels[0], labels[-1]]
    shifts, warnings = composition_shifts(table, mix_pairs(labels, between))
    return table, shifts, warnings
