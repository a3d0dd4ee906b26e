"""Streaming readers: CSV, TSV, JSON Lines, Parquet and folders of .txt files, plain or compressed.

A reader yields :class:`DocBatch` objects (a few MB of documents each: raw time values and texts)
and never holds the whole archive in memory. Compression (gzip, bzip2, xz) is recognised from the
file's first bytes; the table format from the extension, or from ``fmt``. Text is decoded as
UTF-8; undecodable bytes are replaced by U+FFFD and counted (:attr:`Reader.replaced`), never fatal.
A truncated or damaged compressed file is a :class:`~drift.errors.DriftError`.
"""

from __future__ import annotations

import bz2
import codecs
import contextlib
import gzip
import io
import json
import lzma
import re
import shutil
import tempfile
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from drift.errors import DriftError

FORMATS = ("csv", "tsv", "jsonl", "parquet", "txt")
TIME_COLUMN_NAMES = ("date", "time", "year", "timestamp")
TEXT_COLUMN_NAMES = ("text", "body", "content")
FILE_COLUMN_NAMES = ("file", "filename", "file_name", "name", "path")
#: Roughly how many bytes of text one batch holds.
BATCH_BYTES = 1 << 20

_EXTENSIONS = {
    ".csv": "csv",
    ".tsv": "tsv",
    ".tab": "tsv",
    ".jsonl": "jsonl",
    ".ndjson": "jsonl",
    ".json": "jsonl",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".txt": "txt",
}
_COMPRESSION_SUFFIXES = {".gz": "gzip", ".gzip": "gzip", ".bz2": "bzip2", ".xz": "xz"}
_MAGIC = ((b"\x1f\x8b", "gzip"), (b"BZh", "bzip2"), (b"\xfd7zXZ\x00", "xz"))
_TEXT_FILE_RE = re.compile(r"\.txt(\.(gz|bz2|xz))?$", re.IGNORECASE)
_DAMAGED = (EOFError, OSError, zlib.error, lzma.LZMAError)


#: Largest CSV block tried when rows are very long (pyarrow keeps each row inside one block).
MAX_BLOCK_BYTES = 1 << 30


class _RowTooLong(Exception):
    """A CSV row does not fit in one pyarrow block."""


@dataclass
class DocBatch:
    """A batch of documents: raw time values and texts (Arrow arrays of equal length).

    ``continues`` is True when the first text continues the last document of the previous batch
    (a long .txt file is read in pieces); it is then not a new document.
    """

    times: pa.Array
    texts: pa.Array
    continues: bool = False

    def __len__(self) -> int:
        return len(self.texts)


# ------------------------------------------------------------------------ format and compression


def detect_compression(path: Path) -> str | None:
    """'gzip', 'bzip2', 'xz' or None, from the file's first bytes."""
    with open(path, "rb") as handle:
        head = handle.read(6)
    for magic, name in _MAGIC:
        if head.startswith(magic):
            return name
    return None


def _strip_compression_suffix(name: str) -> str:
    lower = name.lower()
    for suffix in _COMPRESSION_SUFFIXES:
        if lower.endswith(suffix):
            return name[: -len(suffix)]
    return name


def detect_format(path: Path, fmt: str | None = None) -> str:
    """The table format of ``path``: ``fmt`` when given, else from the extension (folders: txt)."""
    path = Path(path)
    if fmt is not None:
        fmt = fmt.lower().strip(".")
        if fmt == "ndjson":
            fmt = "jsonl"
        if fmt not in FORMATS:
            raise DriftError(f"Unknown --format '{fmt}'; use one of {', '.join(FORMATS)}.")
        if path.is_dir() and fmt != "txt":
            raise DriftError(
                f"{path} is a folder; only --format txt reads folders (of .txt files)."
            )
        return fmt
    if path.is_dir():
        return "txt"
    suffix = Path(_strip_compression_suffix(path.name)).suffix.lower()
    if suffix in _EXTENSIONS:
        return _EXTENSIONS[suffix]
    raise DriftError(
        f"Cannot tell the format of {path.name} from its extension; name it with --format "
        f"({', '.join(FORMATS)})."
    )


# ---------------------------------------------------------------------------- decoding


class _CountingFile(io.RawIOBase):
    """A raw binary file that remembers how many bytes were read from it (for progress)."""

    def __init__(self, path: Path):
        self._file = open(path, "rb")  # noqa: SIM115 - closed with this object
        self.position = 0

    def readable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        count = self._file.readinto(buffer)
        self.position += count or 0
        return count

    def close(self) -> None:
        self._file.close()
        super().close()


class _Utf8Stream(io.RawIOBase):
    """Valid UTF-8 bytes from a (possibly compressed) file: bad bytes become U+FFFD and are counted.

    Damaged or truncated compressed data raises DriftError (also when read from inside pyarrow).
    """

    def __init__(self, path: Path, compression: str | None):
        self.path = path
        self.compression = compression
        self.counter = _CountingFile(path)
        if compression == "gzip":
            self._source: BinaryIO = gzip.GzipFile(fileobj=self.counter, mode="rb")
        elif compression == "bzip2":
            self._source = bz2.BZ2File(self.counter, mode="rb")
        elif compression == "xz":
            self._source = lzma.LZMAFile(self.counter, mode="rb")
        else:
            self._source = io.BufferedReader(self.counter, 1 << 20)
        self._tail = b""
        self._pending = memoryview(b"")
        self._at_start = True
        self._done = False
        self.replaced = 0
        self.failure: DriftError | None = None

    def readable(self) -> bool:
        return True

    def _read_raw(self, size: int) -> bytes:
        try:
            return self._source.read(size)
        except _DAMAGED as exc:
            kind = self.compression or "data"
            detail = str(exc) or exc.__class__.__name__
            self.failure = DriftError(
                f"{self.path} is truncated or damaged ({kind}: {detail}); copy the file again "
                "or decompress it to see where it breaks."
            )
            raise self.failure from None

    def _fill(self, size: int) -> None:
        """Decode the next chunk: valid UTF-8 passes through as it is; a chunk with bad bytes is
        decoded with U+FFFD replacements (counted) and encoded again."""
        while not self._pending and not self._done:
            raw = self._read_raw(max(size, 1 << 20))
            final = not raw
            data = self._tail + raw if self._tail else raw
            try:
                _, used = codecs.utf_8_decode(data, "strict", final)
                chunk = data[:used]
            except UnicodeDecodeError:
                text, used = codecs.utf_8_decode(data, "replace", final)
                self.replaced += text.count("\ufffd") - data[:used].count(b"\xef\xbf\xbd")
                chunk = text.encode("utf-8")
            self._tail = data[used:]
            self._done = final
            if self._at_start and chunk:
                chunk = chunk.removeprefix(b"\xef\xbb\xbf")
                self._at_start = False
            self._pending = memoryview(chunk)

    def readinto(self, buffer) -> int:
        self._fill(len(buffer))
        count = min(len(buffer), len(self._pending))
        buffer[:count] = self._pending[:count]
        self._pending = self._pending[count:]
        return count

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self._source.close()
        self.counter.close()
        super().close()


# ---------------------------------------------------------------------------- columns


def pick_column(
    columns: list[str],
    given: str | None,
    candidates: tuple[str, ...],
    role: str,
    option: str,
    where: str,
) -> str:
    """The column named ``given``, else the one column whose name is one of ``candidates``."""
    if given is not None:
        if given in columns:
            return given
        folded = [c for c in columns if c.lower() == given.lower()]
        if len(folded) == 1:
            return folded[0]
        raise DriftError(
            f"{where} has no column '{given}' ({option}); its columns are: {', '.join(columns)}."
        )
    found = [c for c in columns if c.lower().strip() in candidates]
    if len(found) == 1:
        return found[0]
    if found:
        problem = f"several columns could hold the {role} ({', '.join(found)})"
    else:
        problem = f"no column is called {', '.join(candidates)}"
    raise DriftError(
        f"Cannot tell which column of {where} holds the {role}: {problem}; name it with {option} "
        f"(columns: {', '.join(columns)})."
    )


# ---------------------------------------------------------------------------- readers


class Reader:
    """Base of the readers: the source, its resolved columns, progress and replaced characters."""

    fmt = ""

    def __init__(self, path: Path, compression: str | None):
        self.path = path
        self.compression = compression
        self.time_col = ""
        self.text_col = ""
        self.columns: list[str] = []
        self._streams: list[_Utf8Stream] = []
        self._done_bytes = 0

    @property
    def total_bytes(self) -> int:
        return self.path.stat().st_size

    def position(self) -> int:
        """Bytes of the source read so far (for progress)."""
        return self._done_bytes + sum(s.counter.position for s in self._streams if not s.closed)

    @property
    def replaced(self) -> int:
        """Undecodable bytes replaced by U+FFFD so far."""
        return sum(s.replaced for s in self._streams)

    def _open_text_stream(
        self, path: Path | None = None, compression: str | None = None, probe: bool = False
    ) -> _Utf8Stream:
        """A decoded stream of the source (or of ``path``); a ``probe`` (reading the header) is
        not counted in progress or replaced characters."""
        stream = _Utf8Stream(path or self.path, compression if path else self.compression)
        if not probe:
            self._streams.append(stream)
        return stream

    def batches(self) -> Iterator[DocBatch]:  # pragma: no cover - overridden
        raise NotImplementedError


class CsvReader(Reader):
    """CSV or TSV through pyarrow's streaming CSV reader (quoted fields may hold line breaks)."""

    def __init__(self, path: Path, compression: str | None, delimiter: str, time_col, text_col):
        super().__init__(path, compression)
        self.fmt = "tsv" if delimiter == "\t" else "csv"
        self._parse = pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=True)
        self.columns = self._header()
        self.time_col = pick_column(
            self.columns, time_col, TIME_COLUMN_NAMES, "time", "--time-col", self.path.name
        )
        self.text_col = pick_column(
            self.columns, text_col, TEXT_COLUMN_NAMES, "text", "--text-col", self.path.name
        )

    def _open(self, block_size: int, columns: list[str] | None):
        stream = self._open_text_stream(probe=columns is None)
        convert = pacsv.ConvertOptions(
            include_columns=columns,
            column_types={c: pa.string() for c in columns} if columns else None,
        )
        try:
            return pacsv.open_csv(
                io.BufferedReader(stream, 1 << 20),
                read_options=pacsv.ReadOptions(block_size=block_size),
                parse_options=self._parse,
                convert_options=convert,
            ), stream
        except pa.ArrowInvalid as exc:
            stream.close()
            if stream in self._streams:
                self._streams.remove(stream)
            raise self._error(exc, stream) from None

    def _error(self, exc: Exception, stream: _Utf8Stream) -> Exception:
        if stream.failure is not None:
            return stream.failure
        message = str(exc).strip().splitlines()[0] if str(exc).strip() else exc.__class__.__name__
        if "straddl" in message:
            return _RowTooLong(message)
        if "Empty CSV file" in message:
            return DriftError(
                f"{self.path} is empty; give a {self.fmt.upper()} file with a header row and "
                "documents."
            )
        if len(message) > 160:
            message = message[:157] + "..."
        return DriftError(
            f"{self.path} is not a well-formed {self.fmt.upper()} file ({message}); check its "
            "delimiter and quoting, or name the format with --format."
        )

    def _header(self) -> list[str]:
        block = 1 << 16
        while True:
            try:
                reader, stream = self._open(block, None)
            except _RowTooLong:
                block = self._larger(block)
                continue
            try:
                return list(reader.schema.names)
            finally:
                stream.close()

    def _larger(self, block: int) -> int:
        """A block size 8 times larger (pyarrow needs every row inside one block)."""
        if block >= MAX_BLOCK_BYTES:
            raise DriftError(
                f"{self.path} has a row longer than {MAX_BLOCK_BYTES >> 20} MB; split such "
                "documents into smaller rows."
            )
        return block * 8

    def batches(self) -> Iterator[DocBatch]:
        """Record batches of the time and text columns; a row longer than a block makes the read
        start again with larger blocks, skipping the rows already delivered."""
        block, delivered = BATCH_BYTES, 0
        while True:
            try:
                reader, stream = self._open(block, [self.time_col, self.text_col])
            except _RowTooLong:
                block = self._larger(block)
                continue
            skip = delivered
            try:
                while True:
                    try:
                        batch = reader.read_next_batch()
                    except StopIteration:
                        self._done_bytes += stream.counter.position
                        return
                    except (pa.ArrowInvalid, OSError) as exc:
                        raise self._error(exc, stream) from None
                    if skip >= batch.num_rows:
                        skip -= batch.num_rows
                        continue
                    batch, skip = batch.slice(skip), 0
                    delivered += batch.num_rows
                    yield DocBatch(batch.column(self.time_col), batch.column(self.text_col))
            except _RowTooLong:
                self._streams.remove(stream)  # read again from the start; count its bytes once
                block = self._larger(block)
            finally:
                stream.close()


class JsonLinesReader(Reader):
    """JSON Lines: one JSON object per line, read line by line."""

    fmt = "jsonl"

    def __init__(self, path: Path, compression: str | None, time_col, text_col):
        super().__init__(path, compression)
        self.columns = self._first_keys()
        self.time_col = pick_column(
            self.columns, time_col, TIME_COLUMN_NAMES, "time", "--time-col", self.path.name
        )
        self.text_col = pick_column(
            self.columns, text_col, TEXT_COLUMN_NAMES, "text", "--text-col", self.path.name
        )

    def _lines(self, probe: bool = False) -> Iterator[tuple[int, bytes]]:
        stream = self._open_text_stream(probe=probe)
        try:
            for number, line in enumerate(io.BufferedReader(stream, 1 << 20), start=1):
                if line.strip():
                    yield number, line
        finally:
            if not probe:
                self._done_bytes += stream.counter.position
            stream.close()

    def _record(self, number: int, line: bytes) -> dict:
        array = DriftError(
            f"{self.path} holds a JSON array, not JSON Lines; write one JSON object per line."
        )
        try:
            record = json.loads(line)
        except json.JSONDecodeError as exc:
            if number == 1 and line.lstrip().startswith(b"["):
                raise array from None
            raise DriftError(
                f"Line {number} of {self.path} is not valid JSON ({exc.msg}); fix or remove that "
                "line."
            ) from None
        if isinstance(record, list) and number == 1:
            raise array
        if not isinstance(record, dict):
            raise DriftError(
                f"Line {number} of {self.path} is not a JSON object; write one object per line."
            )
        return record

    def _first_keys(self) -> list[str]:
        lines = self._lines(probe=True)
        try:
            for number, line in lines:
                return [str(key) for key in self._record(number, line)]
        finally:
            lines.close()
        raise DriftError(
            f"{self.path} is empty; give a JSON Lines file with one document per line."
        )

    def batches(self) -> Iterator[DocBatch]:
        times: list = []
        texts: list = []
        size = 0
        for number, line in self._lines():
            record = self._record(number, line)
            when = record.get(self.time_col)
            text = record.get(self.text_col)
            times.append(None if when is None else str(when))
            texts.append("" if text is None else text if isinstance(text, str) else str(text))
            size += len(line)
            if size >= BATCH_BYTES:
                yield DocBatch(pa.array(times, pa.string()), pa.array(texts, pa.string()))
                times, texts, size = [], [], 0
        if texts:
            yield DocBatch(pa.array(times, pa.string()), pa.array(texts, pa.string()))


class ParquetReader(Reader):
    """Parquet through ``ParquetFile.iter_batches``.

    A compressed Parquet file (.parquet.gz) is first unpacked to a temporary file.
    """

    fmt = "parquet"

    def __init__(self, path: Path, compression: str | None, time_col, text_col):
        super().__init__(path, compression)
        self._tmpdir: tempfile.TemporaryDirectory | None = None
        self._file = self._open()
        self.columns = list(self._file.schema_arrow.names)
        self.time_col = pick_column(
            self.columns, time_col, TIME_COLUMN_NAMES, "time", "--time-col", self.path.name
        )
        self.text_col = pick_column(
            self.columns, text_col, TEXT_COLUMN_NAMES, "text", "--text-col", self.path.name
        )
        self._rows_done = 0

    def _open(self) -> pq.ParquetFile:
        target = self.path
        if self.compression:
            self._tmpdir = tempfile.TemporaryDirectory(prefix="drift-parquet-")
            target = Path(self._tmpdir.name) / "source.parquet"
            opener = {"gzip": gzip.open, "bzip2": bz2.open, "xz": lzma.open}[self.compression]
            try:
                with opener(self.path, "rb") as source, open(target, "wb") as out:
                    shutil.copyfileobj(source, out, 1 << 20)
            except _DAMAGED as exc:
                raise DriftError(
                    f"{self.path} is truncated or damaged ({self.compression}: {exc}); copy the "
                    "file again."
                ) from None
        if target.stat().st_size == 0:
            raise DriftError(f"{self.path} is empty; give a Parquet file with documents.")
        try:
            return pq.ParquetFile(target)
        except (pa.ArrowInvalid, OSError) as exc:
            raise DriftError(
                f"{self.path} is not a readable Parquet file ({exc}); check the file or --format."
            ) from None

    def position(self) -> int:
        rows = max(self._file.metadata.num_rows, 1)
        return int(self.total_bytes * self._rows_done / rows)

    def batches(self) -> Iterator[DocBatch]:
        metadata = self._file.metadata
        row_bytes = max(
            1,
            sum(metadata.row_group(i).total_byte_size for i in range(metadata.num_row_groups))
            // max(metadata.num_rows, 1),
        )
        rows = int(min(max(BATCH_BYTES // row_bytes, 1_000), 1_000_000))
        try:
            for batch in self._file.iter_batches(
                batch_size=rows, columns=[self.time_col, self.text_col]
            ):
                self._rows_done += batch.num_rows
                yield DocBatch(batch.column(0), batch.column(1))
        except (pa.ArrowInvalid, OSError) as exc:
            raise DriftError(
                f"{self.path} is not a readable Parquet file ({exc}); check the file."
            ) from None
        finally:
            if self._tmpdir is not None:
                self._tmpdir.cleanup()


# ---------------------------------------------------------------------------- folders of text files

_NAME_DATE_PATTERNS = (
    re.compile(r"(?<!\d)(\d{4})[-_.](\d{2})[-_.](\d{2})(?!\d)"),
    re.compile(r"(?<!\d)(\d{4})(\d{2})(\d{2})(?!\d)"),
    re.compile(r"(?<!\d)(\d{4})[-_.](\d{2})(?!\d)"),
    re.compile(r"(?<!\d)(\d{4})(?!\d)"),
)


def date_from_name(relative: str) -> str | None:
    """A date found in a file's name, else in its folders' names (innermost first).

    ``1990-03-01`` / ``19900301`` / ``1990_03`` / ``1990`` (years 1000 to 2999); None if none.
    """
    parts = Path(relative).parts
    names = [_TEXT_FILE_RE.sub("", parts[-1])] + list(reversed(parts[:-1]))
    for name in names:
        for pattern in _NAME_DATE_PATTERNS:
            for match in pattern.finditer(name):
                numbers = [int(g) for g in match.groups()]
                if not 1000 <= numbers[0] <= 2999:
                    continue
                if len(numbers) > 1 and not 1 <= numbers[1] <= 12:
                    continue
                if len(numbers) > 2 and not 1 <= numbers[2] <= 31:
                    continue
                return "-".join(g for g in match.groups())
    return None


class TextFolderReader(Reader):
    """A folder of .txt files (also .txt.gz/.bz2/.xz), one document per file.

    A file's date comes from a small CSV index in the folder (``index.csv``, or the only .csv file
    at its top level: a file-name column and a date column) when it lists the file, else from a
    date in the file's name or its folders' names. A single .txt file is read the same way.
    """

    fmt = "txt"

    def __init__(self, path: Path, time_col, text_col):
        super().__init__(path, None)
        root = path if path.is_dir() else path.parent
        self.root = root
        if path.is_dir():
            files = [p for p in path.rglob("*") if p.is_file() and _TEXT_FILE_RE.search(p.name)]
            files = [
                p
                for p in files
                if not any(part.startswith(".") for part in p.relative_to(root).parts)
            ]
        else:
            files = [path]
        if not files:
            raise DriftError(
                f"The folder {path} holds no .txt files; put one document per .txt file in it."
            )
        self.files = sorted(files, key=lambda p: p.relative_to(root).as_posix())
        self.columns = ["file", "date"]
        self.time_col, self.text_col = "date", "text"
        self.index = self._read_index(time_col) if path.is_dir() else {}
        self._total = sum(p.stat().st_size for p in self.files)
        self._replaced_done = 0

    @property
    def total_bytes(self) -> int:
        return self._total

    def _read_index(self, time_col: str | None) -> dict[str, str]:
        candidates = sorted(self.root.glob("*.csv"))
        chosen = [p for p in candidates if p.name.lower() == "index.csv"] or (
            candidates if len(candidates) == 1 else []
        )
        if not chosen:
            return {}
        import pandas as pd

        try:
            table = pd.read_csv(chosen[0], dtype=str, keep_default_na=False)
        except (ValueError, pd.errors.ParserError) as exc:
            raise DriftError(
                f"The index {chosen[0]} is not a readable CSV ({exc}); fix it or remove it."
            ) from None
        columns = [str(c) for c in table.columns]
        where = f"the index {chosen[0].name}"
        file_col = pick_column(
            columns, None, FILE_COLUMN_NAMES, "file names", "a column named file", where
        )
        date_col = pick_column(columns, time_col, TIME_COLUMN_NAMES, "dates", "--time-col", where)
        return {
            str(name).strip().replace("\\", "/"): str(date)
            for name, date in zip(table[file_col], table[date_col], strict=False)
        }

    def _date_for(self, file: Path) -> str:
        relative = file.relative_to(self.root).as_posix()
        for key in (relative, file.name, _TEXT_FILE_RE.sub("", file.name)):
            if key in self.index:
                return self.index[key]
        return date_from_name(relative) or f"(no date in {relative})"

    def _pieces(self, file: Path) -> Iterator[str]:
        """The file's text in pieces of about BATCH_BYTES, cut after a line break."""
        stream = self._open_text_stream(file, detect_compression(file))
        try:
            reader = io.TextIOWrapper(
                io.BufferedReader(stream, 1 << 20), encoding="utf-8", newline=""
            )
            while True:
                piece = reader.read(BATCH_BYTES)
                if not piece:
                    break
                yield piece + reader.readline()
        finally:
            self._done_bytes += file.stat().st_size
            self._replaced_done += stream.replaced
            self._streams.remove(stream)
            stream.close()

    @property
    def replaced(self) -> int:
        return self._replaced_done + sum(s.replaced for s in self._streams)

    def batches(self) -> Iterator[DocBatch]:
        times: list[str] = []
        texts: list[str] = []
        size = 0
        continues = False
        for file in self.files:
            when = self._date_for(file)
            pieces = 0
            for piece in self._pieces(file):
                if pieces > 0 and not texts:
                    continues = True
                pieces += 1
                times.append(when)
                texts.append(piece)
                size += len(piece)
                if size >= BATCH_BYTES:
                    yield DocBatch(
                        pa.array(times, pa.string()), pa.array(texts, pa.string()), continues
                    )
                    times, texts, size, continues = [], [], 0, False
            if pieces == 0:  # an empty file is an empty document
                times.append(when)
                texts.append("")
        if texts:
            yield DocBatch(pa.array(times, pa.string()), pa.array(texts, pa.string()), continues)


# ---------------------------------------------------------------------------- entry point


def open_source(
    path: Path | str,
    fmt: str | None = None,
    time_col: str | None = None,
    text_col: str | None = None,
) -> Reader:
    """A reader for ``path`` with its format, compression and time/text columns resolved."""
    path = Path(path)
    if not path.exists():
        raise DriftError(f"There is no file or folder at {path}; check the path.")
    fmt = detect_format(path, fmt)
    if fmt == "txt":
        return TextFolderReader(path, time_col, text_col)
    if path.stat().st_size == 0:
        raise DriftError(f"{path} is empty; give a file that holds documents.")
    compression = detect_compression(path)
    if fmt in ("csv", "tsv"):
        return CsvReader(path, compression, "\t" if fmt == "tsv" else ",", time_col, text_col)
    if fmt == "jsonl":
        return JsonLinesReader(path, compression, time_col, text_col)
    return ParquetReader(path, compression, time_col, text_col)
