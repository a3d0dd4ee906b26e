"""Many sources read as one archive: paths, globs and folders of table parts.

:func:`expand_sources` turns what the user gave (one path, several paths, glob patterns, folders)
into the list of files and text folders to read, in a fixed order: the items in the order given,
the matches of a glob and the parts of a folder sorted by their path. A folder that holds .txt
files is one source (a folder of text documents, as before); a folder without .txt files is read
as its CSV, TSV, JSON Lines and Parquet parts (compressed or not, sub-folders included).

:func:`open_sources` opens them: one source gives the reader of
:func:`drift.ingest.readers.open_source`, exactly as before; several give a :class:`MultiReader`,
which streams every file's batches in turn, so the slicing stage reads them as one archive. The
formats may differ per file (``--input-format`` then applies to every file); the time and text
columns must have the same names in every file.
"""

from __future__ import annotations

import glob
import os
from collections.abc import Iterator, Sequence
from pathlib import Path

from drift import runfolder
from drift.errors import DriftError
from drift.ingest.readers import (
    _EXTENSIONS,
    _TEXT_FILE_RE,
    DocBatch,
    Reader,
    TextFolderReader,
    _strip_compression_suffix,
    open_source,
    printable,
)

_GLOB_CHARS = frozenset("*?[")
_TABLE_FORMATS = ("csv", "tsv", "jsonl", "parquet")


def is_pattern(text: str) -> bool:
    """True when ``text`` holds a glob character (``*``, ``?`` or ``[``) and names no path."""
    return any(char in _GLOB_CHARS for char in text) and not Path(text).exists()


def _table_parts(folder: Path) -> list[Path]:
    """The CSV/TSV/JSON Lines/Parquet files under ``folder`` (hidden ones left out), by path."""
    parts = []
    for path in folder.rglob("*"):
        if not path.is_file():
            continue
        if any(part.startswith(".") for part in path.relative_to(folder).parts):
            continue
        suffix = Path(_strip_compression_suffix(path.name)).suffix.lower()
        if _EXTENSIONS.get(suffix) in _TABLE_FORMATS:
            parts.append(path)
    return sorted(parts, key=lambda p: p.relative_to(folder).as_posix())


def _holds_text_files(folder: Path, exclude: Path | None = None) -> bool:
    return any(
        p.is_file() and _TEXT_FILE_RE.search(p.name) and not _inside(p, exclude)
        for p in folder.rglob("*")
    )


def _inside(path: Path, folder: Path | None) -> bool:
    return folder is not None and path.resolve().is_relative_to(folder)


def _expand_one(item: str | Path, fmt: str | None, exclude: Path | None = None) -> list[Path]:
    text = str(item)
    if is_pattern(text):
        matches = sorted(Path(m) for m in glob.glob(os.path.expanduser(text), recursive=True))
        found = [m for m in matches if (m.is_file() or m.is_dir()) and not _inside(m, exclude)]
        if not found:
            raise DriftError(
                f"No file matches {printable(text)}; check the pattern (and quote it, so that "
                "the shell does not expand it first)."
            )
        return [p for m in found for p in _expand_one(m, fmt, exclude)]
    path = Path(text).expanduser()
    if not path.is_dir() or fmt == "txt" or _holds_text_files(path, exclude):
        return [path]  # a file, a folder of .txt files, or a missing path (open_source says so)
    parts = [p for p in _table_parts(path) if not _inside(p, exclude)]
    if not parts:
        raise DriftError(
            f"The folder {path} holds no .txt, CSV, TSV, JSON Lines or Parquet files; give a "
            "folder of documents or of table parts."
        )
    return parts


def expand_sources(
    source: str | Path | Sequence[str | Path],
    fmt: str | None = None,
    exclude: str | Path | None = None,
) -> list[Path]:
    """The files and text folders that ``source`` names, in reading order.

    Parameters
    ----------
    source : str, Path or a sequence of them
        Paths, glob patterns (``news/*.csv.gz``, ``parts/**/*.parquet``) and folders.
    fmt : str, optional
        ``--input-format``: ``txt`` makes every folder a folder of .txt documents.
    exclude : str or Path, optional
        A folder whose contents a pattern or a folder never contributes (the run folder, which
        may lie beside the parts: ``data/*`` with ``--out data/run``).

    Returns
    -------
    list of Path
        Each file once, in the order given (glob matches and folder parts sorted by path).

    Raises
    ------
    DriftError
        A pattern that matches nothing, a folder that holds no documents, no source at all.

    Examples
    --------
    >>> from drift.ingest.sources import expand_sources
    >>> [p.name for p in expand_sources([archive])]
    ['letters.csv']
    """
    items = [source] if isinstance(source, str | Path) else list(source)
    if not items:
        raise DriftError("No source given; name at least one file, folder or pattern.")
    found: list[Path] = []
    seen: set[Path] = set()
    skip = Path(exclude).resolve() if exclude is not None else None
    for item in items:
        for path in _expand_one(item, fmt, skip):
            key = path.resolve()
            if key not in seen:
                seen.add(key)
                found.append(path)
    return found


def common_folder(paths: Sequence[Path]) -> Path:
    """The deepest folder that holds every one of ``paths`` (resolved)."""
    resolved = [p.resolve() for p in paths]
    return Path(os.path.commonpath([p if p.is_dir() else p.parent for p in resolved]))


def fingerprint_sources(paths: Sequence[Path]) -> str:
    """One fingerprint of one source (as before), or of several in order (names included)."""
    if len(paths) == 1:
        return runfolder.fingerprint_path(paths[0])
    root = common_folder(paths)
    return runfolder.fingerprint_params(
        {"sources": [[p.resolve().relative_to(root).as_posix(), runfolder.fingerprint_path(p)]
                     for p in paths]}
    )


class MultiReader(Reader):
    """Several files read one after another as one archive.

    Each batch carries the name of its file (relative to :attr:`path`, the common folder) in
    :attr:`DocBatch.source`, so the document index numbers rows within each file and names it.
    """

    def __init__(self, readers: Sequence[Reader]):
        self.readers = list(readers)
        self.root = common_folder([r.path for r in self.readers])
        super().__init__(self.root, None, self.readers[0].encoding)
        self.names = [r.path.resolve().relative_to(self.root).as_posix() for r in self.readers]
        formats = list(dict.fromkeys(r.fmt for r in self.readers))
        self.fmt = formats[0] if len(formats) == 1 else "+".join(formats)
        first = self.readers[0]
        self.columns = list(first.columns)
        self.time_col, self.text_col = first.time_col, first.text_col
        for reader, name in zip(self.readers[1:], self.names[1:], strict=True):
            if (reader.time_col, reader.text_col) != (first.time_col, first.text_col):
                raise DriftError(
                    f"{printable(name)} ({reader.fmt}) has its dates and text in columns "
                    f"'{printable(reader.time_col)}' and '{printable(reader.text_col)}', but "
                    f"{printable(self.names[0])} ({first.fmt}) in '{printable(first.time_col)}' "
                    f"and '{printable(first.text_col)}'; give every file the same column names "
                    "(or name them with --time-col and --text-col)."
                )

    def want(self, column: str, option: str) -> str:
        """Ask every file for ``column``; a file that lacks it is named in the error."""
        found = [reader.want(column, option) for reader in self.readers]
        for name, spelled in zip(self.names, found, strict=True):
            if spelled != found[0]:
                raise DriftError(
                    f"{printable(name)} spells column {option} '{printable(spelled)}' where "
                    f"{printable(self.names[0])} has '{printable(found[0])}'; give every file the "
                    "same column names."
                )
        if found[0] not in self.extra_cols:
            self.extra_cols.append(found[0])
        return found[0]

    @property
    def total_bytes(self) -> int:
        return sum(reader.total_bytes for reader in self.readers)

    def position(self) -> int:
        return sum(reader.position() for reader in self.readers)

    @property
    def replaced(self) -> int:
        return sum(reader.replaced for reader in self.readers)

    @property
    def legacy(self) -> int:
        return sum(reader.legacy for reader in self.readers)

    @property
    def encoding_used(self) -> str:
        used = {reader.encoding_used for reader in self.readers}
        return used.pop() if len(used) == 1 else ", ".join(sorted(used))

    def notes(self) -> list[str]:
        return [note for reader in self.readers for note in reader.notes()]

    def batches(self) -> Iterator[DocBatch]:
        for reader, name in zip(self.readers, self.names, strict=True):
            try:
                for batch in reader.batches():
                    batch.source = name
                    yield batch
            except DriftError as exc:
                raise _naming(exc, reader.path, name) from None


def _naming(exc: DriftError, path: Path, name: str) -> DriftError:
    """The error as it is when it names the file, else with the file's name in front."""
    text = str(exc)
    if str(path) in text or path.name in text:
        return exc
    return DriftError(f"{printable(name)}: {text}")


def open_sources(
    source: str | Path | Sequence[str | Path],
    fmt: str | None = None,
    time_col: str | None = None,
    text_col: str | None = None,
    *,
    encoding: str | None = None,
    delimiter: str | None = None,
    exclude: str | Path | None = None,
) -> tuple[Reader, list[Path]]:
    """A reader for every file that ``source`` names (see :func:`expand_sources`), and the files.

    One file or text folder gives :func:`drift.ingest.readers.open_source`'s reader; several give
    a :class:`MultiReader`. A file that cannot be opened is named in the error.

    Parameters
    ----------
    source : str, Path or a sequence of them
        As for :func:`expand_sources`.
    fmt, time_col, text_col, encoding, delimiter
        As for :func:`drift.ingest.readers.open_source`; they apply to every file.
    exclude : str or Path, optional
        As for :func:`expand_sources`.

    Returns
    -------
    (Reader, list of Path)
        The reader and the files it reads, in order.

    Raises
    ------
    DriftError
        A source that is missing or unreadable (named), files whose time and text columns have
        other names (named, with the columns), a folder of .txt files among several sources.

    Examples
    --------
    >>> from drift.ingest.sources import open_sources
    >>> reader, paths = open_sources([archive, archive])
    >>> type(reader).__name__, len(paths)
    ('CsvReader', 1)
    """
    paths = expand_sources(source, fmt, exclude)
    if len(paths) == 1:
        return open_source(
            paths[0], fmt, time_col, text_col, encoding=encoding, delimiter=delimiter
        ), paths
    readers = []
    for path in paths:
        try:
            reader = open_source(
                path, fmt, time_col, text_col, encoding=encoding, delimiter=delimiter
            )
        except DriftError as exc:
            raise _naming(exc, path, str(path)) from None
        if isinstance(reader, TextFolderReader):
            raise DriftError(
                f"{printable(str(path))} is a folder of .txt files; several sources must be "
                "tables (CSV, TSV, JSON Lines, Parquet), so give .txt documents as one folder "
                "on their own."
            )
        readers.append(reader)
    return MultiReader(readers), paths
