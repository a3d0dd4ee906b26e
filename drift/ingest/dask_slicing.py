"""``drift slice --engine dask``: each source file sliced on a Dask worker, merged in input order.

The archive is split by file: one task per file (a folder of .txt documents is one task). A
worker opens its file with the options the client resolved (format, columns, encoding), dates
and tokenizes every batch exactly as the local engine does
(:func:`drift.ingest.slicing._process_batch`), appends each slice's lines to its own part file
in the run's folder of kept parts (``slices/.dask-parts/<pass>/<task>/<key>.txt``, the task named
by its fingerprint), and returns the rest,
which is small: per batch the row, date and document tallies and the document index entries,
and the word counts of the whole file. The client consumes the results in file order and
replays them through the same first pass as the local engine, appending each part file to its
slice after the files before it. The lines of every slice are therefore in the same order, the
counts are the same sums, and every output of the run folder equals the local engine's (see
DEVELOPERS.md for which files are byte-identical).

Every worker must see the run folder at the same path (a shared file system, as for training).
A task whose worker dies is run again by Dask (its ``distributed.scheduler.allowed-failures``
setting): a task writes only into its own part folder, which it empties first, so running it
again duplicates nothing.

A finished task also keeps its result beside its part files (:mod:`drift.ingest.partstore`, no
pickles). When the pass fails (the scheduler went away, a file was bad, the command was
stopped), the finished tasks stay; the same command run again takes their results instead of
running them, and runs only the others. The kept parts are removed once a pass succeeds, so
until then the archive's text lies on disk twice (parts and slices).

An uncompressed CSV, TSV, JSON Lines or Parquet file larger than :data:`PIECE_BYTES` is split
into pieces (byte ranges that start at a row, runs of row groups;
:meth:`drift.ingest.readers.Reader.pieces`), one task each; a file whose pieces fail or meet
bytes that are not UTF-8 is read again as one task, so that decoding and error messages are the
local engine's. A compressed CSV, TSV or JSON Lines file larger than :data:`INFLATE_BYTES` is
first decompressed once by the client into the kept parts (``.dask-parts/inflated/``, removed
with them) and its copy read in pieces like an uncompressed file; its documents keep the original
file's name, and a piece that fails reads the original file whole. A compressed stream can only
be read from its start, so one process decompresses it (gzip about 140 MB/s on a busy 2-core
machine, several times the speed of tokenizing); the tokenizing is what is spread. Smaller
compressed files, damaged ones, and CSV files whose quoting is not plain
(:func:`drift.ingest.readers.csv_row_starts`), are one task each.
"""

from __future__ import annotations

import contextlib
import logging
import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from drift.cluster import connect_dask, import_distributed, main_module_kept_from_workers
from drift.errors import DriftError
from drift.ingest import partstore, slicing
from drift.ingest.readers import (
    CsvReader,
    JsonLinesReader,
    ParquetReader,
    Reader,
    _strip_compression_suffix,
    decompress_file,
    open_source,
)
from drift.ingest.sources import MultiReader
from drift.progress import note

#: Uncompressed CSV, JSON Lines and Parquet files larger than this are read in pieces of about this
#: size, each a task of its own (other files are one task each).
PIECE_BYTES = 64 << 20
#: Compressed CSV, TSV and JSON Lines files larger than this (compressed) are decompressed once
#: and read in pieces (text compresses three to five times, so such a file holds more than one
#: piece).
INFLATE_BYTES = 16 << 20
#: Folder of the decompressed copies, beside the passes' part folders in the kept parts.
INFLATED = "inflated"


def slice_part(task: dict[str, Any]) -> dict[str, Any]:
    """Slice one source file on a worker: part files of lines per slice key in
    ``task["folder"]``, and the batch outcomes (without their text) and word counts returned.
    A problem with the file comes back as ``{"error": message}`` (not retried)."""
    try:
        return _slice_part(task)
    except DriftError as exc:
        return {"error": str(exc)}
    except (_Stopped, FileNotFoundError):
        if Path(task["folder"]).is_dir():  # not stopped by the client: a real error
            raise
        return {"error": "stopped"}


class _Stopped(Exception):
    """The client removed the work folder: the pass failed elsewhere, so this task stops."""


def _slice_part(task: dict[str, Any]) -> dict[str, Any]:
    folder = Path(task["folder"])
    shutil.rmtree(folder, ignore_errors=True)  # a task run again after a lost worker starts afresh
    try:
        folder.mkdir()  # not its parents: a work folder the client has removed stays removed
    except FileNotFoundError:
        return {"error": "stopped"}
    reader = open_source(
        Path(task["path"]), task["fmt"], task["time_col"], task["text_col"],
        encoding=task["encoding"], delimiter=task["delimiter"],
    )
    for column in task["extra_cols"]:
        reader.want(column, "--meta")
    reader.restrict(task["piece"])
    settings = task["settings"]
    files = slicing._SliceFiles(folder, keep_lines=False)
    counts = slicing.WordCounts()
    outcomes = []

    def process(batch):
        if not folder.is_dir():
            raise _Stopped
        batch.source = task["source"]
        return slicing._process_batch(batch, settings), batch.continues

    for outcome, continues in slicing._ordered_map(process, reader.batches(), task["threads"]):
        for part in outcome.parts:
            files.append(part)
            part.text = None
        if outcome.counts is not None:
            counts.add(outcome.counts)
            outcome.counts = None
        outcomes.append((outcome, continues))
    files.close()
    keys = sorted(files.tallies)
    result = {
        "outcomes": outcomes,
        "counts": counts.as_batch(),
        "keys": keys,
        "replaced": reader.replaced,
        "legacy": reader.legacy,
        "notes": reader.notes(),
    }
    partstore.save_result(folder, task["fingerprint"], result)  # a rerun need not redo it
    return result


class _Kept:
    """A task's result kept by an earlier run, standing in for its future."""

    def __init__(self, result: dict[str, Any]):
        self._result = result

    def result(self) -> dict[str, Any]:
        return self._result

    def done(self) -> bool:
        return True

    def release(self) -> None:
        pass


class DaskFeed:
    """A first pass's batch outcomes, computed on Dask workers (a file or a piece per task),
    taken in file order; each task's part files are appended to the slices once its outcomes
    are in."""

    def __init__(
        self,
        client: Any,
        tasks: list[dict[str, Any]],
        files: slicing._SliceFiles,
        counts: slicing.WordCounts,
        quiet: bool = True,
    ):
        self.client, self.tasks, self.files, self.counts = client, tasks, files, counts
        self.work = Path(tasks[0]["folder"]).parent if tasks else None
        self.quiet = quiet
        self.resumed = 0  # tasks whose result an earlier run kept
        self.done_bytes = 0
        self.replaced = 0
        self.legacy = 0
        self._notes: list[str] = []

    def _submit(self, task: dict[str, Any]) -> Any:
        return self.client.submit(
            slice_part, task, key=f"drift-slice-{task['number']}-{os.urandom(4).hex()}",
            pure=False,
        )

    def _file_results(
        self, tasks: list[dict[str, Any]], futures: list[Any]
    ) -> list[tuple[dict[str, Any], dict[str, Any]]]:
        """The results of one file's tasks, in order. A file read in pieces is read again as
        one task when a piece failed (so that the error names the right line) or met bytes
        that are not UTF-8 (whose reading depends on what came before)."""
        if len(tasks) == 1:
            return [(tasks[0], _result(futures[0], tasks[0]))]
        results = []
        for task, future in zip(tasks, futures, strict=True):
            try:
                results.append(_result(future, task))
            except DriftError:
                results.append({"error": True})
        if all("error" not in r and not r["replaced"] and not r["legacy"] for r in results):
            return list(zip(tasks, results, strict=True))
        for task in tasks:
            shutil.rmtree(task["folder"], ignore_errors=True)
        whole = {**tasks[0], "piece": None, "bytes": sum(t["bytes"] for t in tasks),
                 "path": tasks[0].get("original", tasks[0]["path"])}
        whole.pop("original", None)
        whole = _with_folder(whole, Path(tasks[0]["folder"]).parent)
        return [(whole, _result(self._start(whole), whole))]

    def _start(self, task: dict[str, Any]) -> Any:
        """The task's result kept by an earlier run (see :mod:`drift.ingest.partstore`), or
        a future of it running now."""
        kept = partstore.load_result(Path(task["folder"]), task["fingerprint"])
        if kept is not None:
            self.resumed += 1
            return _Kept(kept)
        return self._submit(task)

    def outcomes(self) -> Iterator[tuple[Any, bool]]:
        futures = [self._start(task) for task in self.tasks]
        if self.resumed:
            note(f"resuming: {self.resumed} of {len(self.tasks)} slicing tasks were finished by "
                 "an earlier run and are not run again.", self.quiet)
        files: dict[int, list[int]] = {}  # file -> its tasks, in order
        for position, task in enumerate(self.tasks):
            files.setdefault(task["file"], []).append(position)
        finished = False
        try:
            for positions in files.values():
                tasks = [self.tasks[i] for i in positions]
                results = self._file_results(tasks, [futures[i] for i in positions])
                for i in positions:
                    futures[i].release()  # the worker may drop the result now
                for task, result in results:
                    yield from result["outcomes"]
                    for key in result["keys"]:
                        self.files.append_file(key, Path(task["folder"]) / f"{key}.txt")
                    if result["counts"] is not None:
                        self.counts.add(result["counts"])
                    self.replaced += result["replaced"]
                    self.legacy += result["legacy"]
                    self._notes += result["notes"]
                    self.done_bytes += task["bytes"] if len(results) > 1 else sum(
                        t["bytes"] for t in tasks
                    )
            finished = True
        finally:
            self.client.cancel([f for f in futures if not f.done()])
            if self.work is not None and finished:
                shutil.rmtree(self.work, ignore_errors=True)
            elif self.work is not None:  # finished tasks are kept for a rerun; tasks still
                partstore.remove_unfinished(self.work)  # running stop when their folder goes

    def position(self) -> int:
        return self.done_bytes

    def notes(self) -> list[str]:
        return list(self._notes)


def _result(future: Any, task: dict[str, Any]) -> dict[str, Any]:
    """A task's result; a problem with the file, or a lost worker or scheduler, becomes a
    DriftError naming the file."""
    try:
        result = future.result()
        if "error" in result:
            raise DriftError(result["error"])
        return result
    except DriftError:
        raise
    except Exception as exc:  # noqa: BLE001 - a cluster failure of any kind
        if exc.__class__.__name__ in ("KilledWorker", "CommClosedError", "CancelledError",
                                      "TimeoutError", "OSError", "FutureCancelledError"):
            raise DriftError(
                f"The Dask cluster lost the task slicing {task.get('original', task['path'])} "
                f"({exc.__class__.__name__}); check the workers (memory, shared file system) "
                "and rerun the same command, which keeps the files sliced so far."
            ) from None
        raise


@contextlib.contextmanager
def dask_client(scheduler: str | None, workers: int) -> Iterator[Any]:
    """A client of the scheduler at ``scheduler``, or of a LocalCluster of ``workers``
    single-threaded processes; closed on leaving."""
    distributed = import_distributed()
    if scheduler is None:
        with main_module_kept_from_workers():
            cluster = distributed.LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None,
                silence_logs=logging.ERROR,
            )
        client = distributed.Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
            cluster.close()
        return
    client = connect_dask(scheduler)
    try:
        yield client
    finally:
        client.close()


def plan_tasks(
    reader: Reader, work: Path, settings: Any, *, fmt: str | None,
    encoding: str | None, delimiter: str | None, threads: int = 1,
    piece_bytes: int | None = None,
) -> list[dict[str, Any]]:
    """Tasks in reading order: one per source file (a folder of .txt documents is one), and one
    per piece of an uncompressed CSV, JSON Lines or Parquet file larger than ``piece_bytes``
    (default :data:`PIECE_BYTES`): byte ranges that start at a row, runs of row groups. A
    compressed CSV or JSON Lines file over :data:`INFLATE_BYTES` is decompressed into
    ``work.parent / INFLATED`` first and its copy split (see :func:`_inflated`)."""
    readers = reader.readers if isinstance(reader, MultiReader) else [reader]
    names = reader.names if isinstance(reader, MultiReader) else [None]
    size = PIECE_BYTES if piece_bytes is None else piece_bytes
    tasks = []
    for file, (one, name) in enumerate(zip(readers, names, strict=True)):
        copy = _inflated(one, work.parent / INFLATED, fmt, encoding, delimiter)
        pieces = (copy or one).pieces(size)
        for piece in pieces:
            tasks.append({
                "number": len(tasks),
                "file": file,
                "piece": piece,
                "bytes": one.total_bytes // len(pieces),
                "path": str(Path((copy or one).path).resolve()),
                "fmt": fmt,
                "time_col": one.time_col,
                "text_col": one.text_col,
                "encoding": encoding,
                "delimiter": delimiter,
                "extra_cols": list(one.extra_cols),
                "settings": settings,
                "source": name,
                "threads": threads,
            })
            if copy is not None:  # the file itself, read whole if a piece of the copy fails
                tasks[-1]["original"] = str(Path(one.path).resolve())
            _with_folder(tasks[-1], work)
    return tasks


def _inflated(
    one: Reader, folder: Path, fmt: str | None, encoding: str | None, delimiter: str | None
) -> Reader | None:
    """A decompressed copy of ``one`` in ``folder``, opened as ``one`` is, when ``one`` is a
    compressed CSV, TSV or JSON Lines file larger than :data:`INFLATE_BYTES`; else None (also
    when the file is damaged: read whole, its error is the local engine's)."""
    if (not one.compression or one.total_bytes <= INFLATE_BYTES
            or not isinstance(one, CsvReader | JsonLinesReader)):
        return None
    from drift.runfolder import atomic_path, fingerprint_file

    target = folder / f"{fingerprint_file(one.path)}-{_strip_compression_suffix(one.path.name)}"
    if not target.exists():  # a rerun after a failed pass finds it
        try:
            with atomic_path(target) as tmp:
                decompress_file(one.path, one.compression, tmp)
        except DriftError:
            return None
    copy = open_source(target, fmt, one.time_col, one.text_col, encoding=encoding,
                       delimiter=delimiter)
    for column in one.extra_cols:
        copy.want(column, "--meta")
    return copy


def most_tasks(reader: Reader) -> int:
    """How many tasks :func:`plan_tasks` can make of ``reader`` at most, before any file is
    split or decompressed: one per file, and for a file that may be read in pieces one per
    :data:`PIECE_BYTES` (a packed file counted at five times its size, more than text usually
    packs), so that a LocalCluster has no more workers than tasks and no fewer."""
    readers = reader.readers if isinstance(reader, MultiReader) else [reader]
    total = 0
    for one in readers:
        table = isinstance(one, CsvReader | JsonLinesReader | ParquetReader)
        inflated = isinstance(one, CsvReader | JsonLinesReader) and one.total_bytes > INFLATE_BYTES
        if table and (not one.compression or inflated):  # may be read in pieces
            size = one.total_bytes * (5 if one.compression else 1)
            total += max(1, -(-size // PIECE_BYTES))
        else:
            total += 1
    return total


def _with_folder(task: dict[str, Any], work: Path) -> dict[str, Any]:
    """``task`` with its fingerprint and its part folder under ``work`` named by it."""
    task["fingerprint"] = partstore.task_fingerprint(task)
    task["folder"] = str(work / task["fingerprint"])
    return task


@contextlib.contextmanager
def feeds(
    reader: Reader,
    *,
    fmt: str | None,
    encoding: str | None,
    delimiter: str | None,
    scheduler: str | None = None,
    workers: int | None = None,
    quiet: bool = True,
) -> Iterator[Any]:
    """A feed maker for :func:`drift.ingest.slicing._run` that slices on a Dask cluster: the
    scheduler at ``scheduler``, or a LocalCluster of ``workers`` processes (default: the cores;
    at most one per task the archive can have, :func:`most_tasks`)."""
    parts = most_tasks(reader)
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    size = max(1, min(workers or cores or 1, parts))
    with dask_client(scheduler, size) as client:

        def make_feed(reader_, settings, slice_files, counts):
            # beside the run's temporary work folder, kept when the pass fails (a rerun resumes)
            work = slice_files.folder.parent.parent / slicing.KEPT_PARTS / slice_files.folder.name
            work.mkdir(parents=True, exist_ok=True)
            tasks = plan_tasks(
                reader_, work, settings, fmt=fmt, encoding=encoding, delimiter=delimiter
            )
            return DaskFeed(client, tasks, slice_files, counts, quiet)

        yield make_feed
