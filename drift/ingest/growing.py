"""Growing archives: add newly dated documents to a run folder that is already sliced.

:func:`append_archive` (``drift slice NEW --out RUN --append``) slices only the new source, with
the run's own slicing options, into a private work folder, then merges it into the run:

- a slice the run did not have (a new year) is added;
- a slice the run had, into which new documents are dated, is *redone*: its text is the old text
  followed by the new lines, so its models are trained again (with a note);
- every other slice file is left untouched (same bytes, same modification time), so
  ``drift train`` reuses its models: a model is reused when its slice file and parameters have
  the fingerprint recorded beside it (:mod:`drift.embed.training`).

``counts.parquet``, ``slices/summary.csv``, the document index and the composition are rewritten
to cover old and new documents, exactly as slicing everything at once would write them (ids of
appended documents without ``--id-col`` are ``<file name>:<row>``). ``run.json`` keeps what was
added when in ``stages.slice.history``. The reference slice (the first one, by default) and the
alignment of the old slices onto it do not change, unless the new documents come before the first
slice (a note says so).

Runs cut by ``even:K`` (the cuts depend on every document) or balanced (every slice cut to one
size) cannot grow this way and are refused with a message.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from drift import runfolder
from drift.errors import DriftError
from drift.ingest import documents, slicing
from drift.ingest.sources import common_folder, expand_sources, fingerprint_sources, open_sources
from drift.options import SliceOptions
from drift.progress import note, warn

STAGE = slicing.STAGE
#: Slicing options that stay those of the run when documents are appended (the reader's options,
#: such as --time-col or --encoding, may differ for the new source).
FIXED = ("by", "balance", "keep_case", "pretokenized", "id_col", "meta", "where", "balance_by")
_DEFAULTS = SliceOptions()
_COPY_BLOCK = 1 << 22


def first_entry(
    source: Path, inputs: str, totals: dict[str, Any], labels: Sequence[str]
) -> dict[str, Any]:
    """The history entry of a run's first slicing."""
    return {
        "added": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "action": "slice",
        "source": str(Path(source).resolve()),
        "fingerprint": inputs,
        "documents": int(totals.get("documents_read", 0)),
        "slices": list(labels),
    }


def history(record: dict[str, Any]) -> list[dict[str, Any]]:
    """What was added to a sliced run, oldest first (the first entry is the first slicing)."""
    found = record.get("history")
    if found:
        return [dict(entry) for entry in found]
    return [
        {
            "added": record.get("finished"),
            "action": "slice",
            "source": record.get("source"),
            "fingerprint": record.get("inputs"),
            "documents": (record.get("totals") or {}).get("documents_read"),
            "slices": list(record.get("labels") or []),
        }
    ]


def first_source_is_current(record: dict[str, Any], params: dict[str, Any], inputs: str) -> bool:
    """True when a run that grew by appends was first sliced from a source with fingerprint
    ``inputs`` and with ``params``: slicing that source again changes nothing."""
    entries = record.get("history") or []
    if len(entries) < 2 or entries[0].get("fingerprint") != inputs:
        return False
    recorded = runfolder.fingerprint_params({"params": record.get("params"), "inputs": inputs})
    return recorded == runfolder.fingerprint_params({"params": params, "inputs": inputs})


def combined_inputs(entries: Sequence[dict[str, Any]]) -> str:
    """The slice stage's input fingerprint for a run made of several sources, in order."""
    return runfolder.fingerprint_params(
        {"sources": [entry.get("fingerprint") for entry in entries]}
    )


def _normal(name: str, value: Any) -> Any:
    if name in ("meta", "where"):
        if value is None:
            return []
        items = [value] if isinstance(value, str) else list(value)
        if name == "meta":
            return [m.strip() for item in items for m in str(item).split(",") if m.strip()]
        return [str(item).strip() for item in items]
    if name == "by":
        return str(value).strip().lower()
    if name == "balance":
        return slicing.parse_balance(value)
    return value


def _check_fixed(params: dict[str, Any], given: dict[str, Any]) -> None:
    """Refuse a slicing option given with a value other than the run's."""
    for name in FIXED:
        value = given.get(name)
        if value is None or _normal(name, value) == _normal(name, getattr(_DEFAULTS, name)):
            continue  # not given: the run's value holds
        recorded = params.get(name)
        if name == "meta":
            if _normal(name, value) == _normal(name, recorded):
                continue
        elif _normal(name, value) == (_normal(name, recorded) if name != "balance" else recorded):
            continue
        flag = "--" + name.replace("_", "-")
        raise DriftError(
            f"{flag} {value} differs from the run's {recorded!r}; --append slices the new "
            f"documents as the run was sliced, so leave {flag} out (or slice everything anew "
            "into another folder)."
        )
    if str(params.get("by", "")).startswith("even:"):
        raise DriftError(
            f"The run was cut with --by {params['by']}, whose cuts depend on every document; "
            "documents cannot be appended to it. Slice the whole archive again, or use --by year, "
            "decade, Ny or edges."
        )
    if params.get("balance") is not None:
        raise DriftError(
            "The run's slices were balanced to one size (--balance), which new documents would "
            "break; documents cannot be appended to it. Slice the whole archive again."
        )


def _count_lines_and_copy(source: Path, handle: Any) -> int:
    """Copy ``source`` into ``handle``; return how many lines it holds."""
    lines = 0
    with source.open("rb") as old:
        while block := old.read(_COPY_BLOCK):
            handle.write(block)
            lines += block.count(b"\n")
    return lines


def _merge_counts(old: pd.DataFrame, new: pd.DataFrame, labels: list[str]) -> pd.DataFrame:
    """Word x slice counts of old and new documents; rows by total (descending), then word.

    Each table lists a word once, so its rows are added in place at the word's code (a pandas
    ``add`` aligning both tables' string indexes took about three times as long)."""
    words = pd.concat([old["word"], new["word"]], ignore_index=True)
    codes, uniques = pd.factorize(words)
    merged = np.zeros((len(uniques), len(labels)), dtype=np.int64)
    for frame, rows in ((old, codes[: len(old)]), (new, codes[len(old):])):
        for column, label in enumerate(labels):
            if label in frame.columns:
                merged[rows, column] += frame[label].to_numpy(dtype=np.int64)
    total = merged.sum(axis=1)
    kept = np.flatnonzero(total > 0)
    vocabulary = np.asarray(uniques, dtype=object)[kept]
    order = pd.DataFrame({"total": total[kept], "word": vocabulary})
    order = order.sort_values(["total", "word"], ascending=[False, True], kind="stable")
    picked = order.index.to_numpy()
    table = pd.DataFrame(merged[kept[picked]], columns=labels)
    table.insert(0, "word", vocabulary[picked])
    return table


def _merge_composition(
    old: pd.DataFrame, new: pd.DataFrame, labels: list[str]
) -> pd.DataFrame:
    tallies: dict[tuple[str, str, str], list[int]] = {}
    for frame in (old, new):
        for row in frame.itertuples(index=False):
            entry = tallies.setdefault((row.slice, row.column, row.value), [0, 0])
            entry[0] += int(row.documents)
            entry[1] += int(row.tokens)
    return documents._composition_frame(tallies, labels)


def _merge_documents(
    paths: runfolder.RunPaths,
    work: runfolder.RunPaths,
    line_offset: dict[str, int],
    id_prefix: str | None,
    target_parquet: Path,
    target_csv: Path,
) -> int:
    """The old index followed by the new one (lines shifted, ids kept unique); returns how many
    appended ids had to be renamed."""
    old = pq.ParquetFile(paths.documents_parquet)
    new = pq.read_table(work.documents_parquet)
    seen: dict[str, int] = {}
    for group in range(old.num_row_groups):
        for value in old.read_row_group(group, columns=["document"]).column(0).to_pylist():
            seen[value] = 1
    schema = old.schema_arrow
    raw = new.column("document").to_pylist()
    if id_prefix is not None:
        raw = [f"{id_prefix}:{value}" for value in raw]
    ids, repeated = documents.unique_ids(raw, seen)
    offsets = pa.array(
        [line_offset.get(label, 0) for label in new.column("slice").to_pylist()], pa.int64()
    )
    line = new.column("line")
    shifted = pc.if_else(pc.greater(line, 0), pc.add(line, offsets), line)
    new = new.set_column(new.schema.get_field_index("document"), "document", pa.array(ids))
    new = new.set_column(new.schema.get_field_index("line"), "line", shifted)
    new = new.select(schema.names).cast(schema)
    with pq.ParquetWriter(target_parquet, schema) as writer, open(target_csv, "wb") as handle:
        csv_writer = pacsv.CSVWriter(handle, schema)
        for group in range(old.num_row_groups):
            table = old.read_row_group(group)
            writer.write_table(table)
            csv_writer.write_table(table)
        writer.write_table(new)
        csv_writer.write_table(new)
        csv_writer.close()
    return len(repeated)


def append_archive(
    source: Path | str | Sequence[Path | str],
    run: Path | str,
    *,
    fmt: str | None = None,
    time_col: str | None = None,
    text_col: str | None = None,
    date_format: str | None = None,
    skip_bad_dates: bool = False,
    encoding: str | None = None,
    delimiter: str | None = None,
    quiet: bool = False,
    **given: Any,
) -> pd.DataFrame:
    """Add the documents of ``source`` to the sliced run ``run``; return the new slice summary.

    The new documents are sliced with the run's options (``given`` slicing options must match
    them); slices that gain documents are redone, new ones are added, the others are left as
    they are, so their models stay current. Reader options (``fmt``, ``time_col``, ``text_col``,
    ``date_format``, ``encoding``, ``delimiter``) default to the run's.

    Parameters
    ----------
    source : str, Path, or a sequence of them
        The new documents (any format ``drift slice`` reads); several paths, glob patterns and
        folders of table parts are added together as one batch (see
        :func:`drift.ingest.sources.expand_sources`).
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.

    Returns
    -------
    pandas.DataFrame
        The slice summary of the grown run. ``summary.attrs`` holds ``reused`` (the source was
        added before), ``added`` (``{"new": [...], "redone": [...]}``), ``warnings`` and
        ``totals``.

    Raises
    ------
    DriftError
        A run without slices, one cut by ``even:K`` or balanced, a slicing option that differs
        from the run's, and every error of :func:`drift.slice_archive` about the source.

    Examples
    --------
    >>> import drift
    >>> _ = drift.slice_archive(archive, workdir / "grow", by="decade", quiet=True)
    >>> import pandas as pd
    >>> later = workdir / "later.csv"
    >>> pd.DataFrame({"date": ["2011-05-01"], "text": ["the harbour grew"]}).to_csv(later)
    >>> summary = drift.slice_archive(later, workdir / "grow", append=True, quiet=True)
    >>> summary["label"].tolist()[-2:], summary.attrs["added"]
    (['2000s', '2010s'], {'new': ['2010s'], 'redone': []})
    """
    started = time.perf_counter()
    if not (Path(run) / runfolder.MANIFEST_NAME).is_file():
        raise DriftError(
            f"--append adds to a sliced run, and {run} holds no slices; slice the first part of "
            f"the archive with 'drift slice SOURCE --out {run}' (without --append)."
        )
    paths = runfolder.existing_run(Path(run), needs="slices")
    with runfolder.run_lock(paths.root):
        record = runfolder.read_manifest(paths.root).get("stages", {}).get(STAGE)
        if not record or not record.get("labels"):
            raise DriftError(
                f"{paths.root} has no finished slices to add to; slice the first part of the "
                f"archive with 'drift slice SOURCE --out {paths.root}' (without --append)."
            )
        params = dict(record["params"])
        _check_fixed(params, given)
        entries = history(record)
        files = expand_sources(source, fmt, exclude=paths.root)
        name = _batch_name(files)
        present = all(f.exists() for f in files)  # a missing one: open_sources says so below
        fingerprint = fingerprint_sources(files) if present else None
        if fingerprint is not None and fingerprint in [e.get("fingerprint") for e in entries]:
            if not quiet:
                note(
                    f"{name} {'was' if len(files) == 1 else 'were'} added to {paths.root} "
                    "before (same content); nothing to add.",
                    quiet,
                )
            summary = slicing.read_summary(paths.root)
            summary.attrs.update(reused=True, added={"new": [], "redone": []},
                                 appended=_short_name(files), warnings=[],
                                 totals=record.get("totals", {}))
            return summary
        same_format = fmt is None or fmt == params.get("format")
        reader, _ = open_sources(
            files,
            fmt,
            time_col or (params.get("time_col") if same_format else None),
            text_col or (params.get("text_col") if same_format else None),
            encoding=encoding or params.get("encoding"),
            delimiter=delimiter or params.get("delimiter"),
        )
        # one file's ids are prefixed with its name here; several files' ids carry theirs already
        id_prefix = None if params.get("id_col") or len(files) > 1 else files[0].name
        spec, _ = slicing._resolve_columns(
            reader, params.get("id_col"), params.get("meta"), params.get("where"), None
        )
        new_params = {
            **params,
            "date_format": date_format or params.get("date_format"),
            "skip_bad_dates": bool(skip_bad_dates or params.get("skip_bad_dates")),
        }
        rule = slicing.parse_by(params["by"])
        slicing._clean_leftovers(paths)
        work_dir = Path(tempfile.mkdtemp(prefix=".work-append-", dir=paths.slices_dir))
        try:
            work = runfolder.RunPaths(work_dir)
            added, totals, _ = slicing._run(
                reader, work, rule, None, new_params, int(params.get("seed", 1)), quiet, spec,
                check_edges=False,
            )
            summary, notes = _merge(paths, work, work_dir, added, name, id_prefix)
        finally:
            shutil.rmtree(work_dir, ignore_errors=True)
        old_totals = record.get("totals") or {}
        merged_totals = {
            key: int(old_totals.get(key, 0) or 0) + int(totals.get(key, 0) or 0)
            for key in dict.fromkeys([*old_totals, *totals])
        }
        labels = summary["label"].tolist()
        entry = {
            "added": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "action": "append",
            "source": str((files[0] if len(files) == 1 else common_folder(files)).resolve()),
            **({"sources": [str(f.resolve()) for f in files]} if len(files) > 1 else {}),
            "fingerprint": fingerprint,
            "documents": int(added["documents"].sum()),
            "tokens": int(added["tokens"].sum()),
            "new_slices": summary.attrs["added"]["new"],
            "redone_slices": summary.attrs["added"]["redone"],
        }
        entries.append(entry)
        runfolder.record_stage(
            paths.root,
            STAGE,
            params,
            combined_inputs(entries),
            time.perf_counter() - started,
            extra={
                "labels": labels,
                "source": record.get("source"),
                "totals": merged_totals,
                "timings": record.get("timings", {}),
                "history": entries,
            },
        )
    messages = notes + slicing.slice_warnings(summary) + reader.notes()
    if totals.get("outside_edges"):
        messages.append(
            f"{slicing._count(totals['outside_edges'], 'document')} of {name} outside the "
            "--by edges left out."
        )
    if totals.get("bad_dates_skipped"):
        messages.append(
            f"{slicing._count(totals['bad_dates_skipped'], 'document')} of {name} whose "
            "date does not parse left out (--skip-bad-dates)."
        )
    for message in messages:
        warn(message)
    summary.attrs.update(reused=False, warnings=messages, totals=merged_totals,
                         appended=_short_name(files))
    return summary


def _batch_name(files: Sequence[Path]) -> str:
    """How notes name an appended batch: its file, or how many files and where."""
    if len(files) == 1:
        return files[0].name
    return f"the {len(files)} files in {common_folder(files)}"


def _short_name(files: Sequence[Path]) -> str:
    """The appended batch in a table title: its file, or how many files."""
    return files[0].name if len(files) == 1 else f"{len(files)} files"


def _merge(
    paths: runfolder.RunPaths,
    work: runfolder.RunPaths,
    work_dir: Path,
    added: pd.DataFrame,
    name: str,
    id_prefix: str | None,
) -> tuple[pd.DataFrame, list[str]]:
    """Write the grown run's files (each renamed into place); return the summary and notes.

    ``name`` names the appended source in notes; ``id_prefix`` (the file's name, or None)
    prefixes appended document ids that carry no source name of their own."""
    old = slicing.read_summary(paths.root)
    known = set(old["label"])
    new_labels = [label for label in added["label"] if label not in known]
    redone = [label for label in added["label"] if label in known]
    summary = pd.concat([old, added], ignore_index=True)
    summary = (
        summary.groupby(["label", "start", "end"], as_index=False, sort=False)[
            ["documents", "tokens", "dropped"]
        ].sum()
    )
    summary = summary.sort_values("start", kind="stable").reset_index(drop=True)
    labels = summary["label"].tolist()
    counts = _merge_counts(
        runfolder.read_table(paths.root, "counts"), runfolder.read_table(work.root, "counts"),
        labels,
    )
    summary["types"] = (counts[labels].to_numpy() > 0).sum(axis=0).astype(np.int64)
    summary = summary[slicing.SUMMARY_COLUMNS]

    # every file is prepared in the work folder first, then renamed into place
    ready: list[tuple[Path, Path]] = []
    line_offset: dict[str, int] = {}
    for label in redone:
        joined = work_dir / f"joined-{label}.txt"
        with joined.open("wb") as handle:
            line_offset[label] = _count_lines_and_copy(paths.slice_file(label), handle)
            with work.slice_file(label).open("rb") as extra:
                shutil.copyfileobj(extra, handle, _COPY_BLOCK)
        ready.append((joined, paths.slice_file(label)))
    for label in new_labels:
        ready.append((work.slice_file(label), paths.slice_file(label)))
    merged = work_dir / "merged"  # the merged tables, written by the run folder's writers
    runfolder.write_table(merged, "counts", counts)
    runfolder.write_table(merged, "summary", summary)
    staged = runfolder.RunPaths(merged)
    ready += [(staged.counts, paths.counts), (staged.slice_summary, paths.slice_summary)]
    docs_parquet, docs_csv = work_dir / "documents.parquet.new", work_dir / "documents.csv.new"
    renamed = _merge_documents(
        paths, work, line_offset, id_prefix, docs_parquet, docs_csv,
    )
    ready += [(docs_parquet, paths.documents_parquet), (docs_csv, paths.documents_csv)]
    composition = _merge_composition(
        runfolder.read_table(paths.root, "composition"),
        runfolder.read_table(work.root, "composition"), labels,
    )
    runfolder.write_table(merged, "composition", composition)
    ready += [(staged.composition_parquet, paths.composition_parquet),
              (staged.composition_csv, paths.composition_csv)]
    for prepared, target in ready:
        os.replace(prepared, target)

    notes = []
    if redone:
        moved = added.set_index("label").loc[redone, "documents"]
        listed = ", ".join(f"{label}: {int(n):,}" for label, n in moved.items())
        several = len(redone) > 1
        notes.append(
            f"documents of {name} are dated inside {'slices' if several else 'a slice'} "
            f"the run already had ({listed} documents); "
            f"{'those slices were' if several else 'it was'} redone, so "
            f"'drift train {paths.root}' trains {'their' if several else 'its'} models again."
        )
    first_old, first_now = old["label"].iloc[0], summary["label"].iloc[0]
    if first_now != first_old:
        notes.append(
            f"{name} adds slice {first_now} before the first slice {first_old}; the "
            f"reference slice (by default the first) is now {first_now}, so every slice is "
            f"aligned anew. Rank with --reference {first_old} to keep the old reference."
        )
    if renamed:
        notes.append(
            f"{renamed:,} appended document id{'s' if renamed != 1 else ''} were already used "
            f"in the run; each was renamed id{documents.DUPLICATE_SUFFIX}2, ... ."
        )
    summary.attrs["added"] = {"new": new_labels, "redone": redone}
    return summary, notes
