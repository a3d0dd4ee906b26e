"""Streaming readers: CSV, TSV, JSON Lines, Parquet and folders of .txt files, plain or compressed.

A reader yields :class:`DocBatch` objects (a few MB of documents each: raw time values and texts)
and never holds the whole archive in memory. Compression (gzip, bzip2, xz) is recognised from the
file's first bytes; the table format from the extension, or from ``fmt``. Text is decoded as
UTF-8 unless ``encoding`` names another codec. A file that is not UTF-8 and holds no valid UTF-8
beyond ASCII is read as cp1252 (Windows Western European, a superset of Latin-1 for text), and the
characters read that way are counted (:attr:`Reader.legacy`). Bytes that still do not decode are
replaced by U+FFFD and counted (:attr:`Reader.replaced`), never fatal. A truncated or damaged
compressed file, a binary file and a column that holds no text are a
:class:`~drift.errors.DriftError`.
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

import numpy as np
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
#: The codec tried when a file is not UTF-8 (cp1252 decodes Latin-1 text the same, except for
#: the C1 control range 0x80-0x9F, where it holds curly quotes and dashes that archives use).
LEGACY_ENCODING = "cp1252"
_UTF8_NAMES = {"utf-8", "utf8", "utf_8", "u8", "utf-8-sig", "utf_8_sig"}
_DELIMITER_NAMES = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "pipe": "|"}


def _latin1_fallback(error: UnicodeDecodeError) -> tuple[str, int]:
    """The five bytes cp1252 leaves undefined read as Latin-1 (never a failure)."""
    return error.object[error.start : error.end].decode("latin-1"), error.end


codecs.register_error("drift-latin1", _latin1_fallback)


def printable(text: str, limit: int = 160) -> str:
    """``text`` safe to print in one line: control, unprintable and replaced characters escaped
    (``\\x00``, ``\\ufffd``), cut to ``limit`` characters."""
    out = []
    for char in text:
        if char == "\ufffd" or (not char.isprintable() and char != " "):
            code = ord(char)
            out.append(f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}")
        else:
            out.append(char)
    shown = "".join(out)
    return shown if len(shown) <= limit else shown[: limit - 3] + "..."


def check_encoding(encoding: str | None) -> str | None:
    """The codec name to use (None: UTF-8 with detection), or a DriftError for an unknown one."""
    if encoding is None or not str(encoding).strip():
        return None
    try:
        name = codecs.lookup(str(encoding).strip()).name
    except LookupError:
        raise DriftError(
            f"--encoding {printable(str(encoding))} is not a known text encoding; use e.g. "
            "utf-8, cp1252, latin-1 or utf-16."
        ) from None
    return "utf-8" if name in _UTF8_NAMES else name


def check_delimiter(delimiter: str | None) -> str | None:
    """The one-character field delimiter (``tab``, ``\\t``, ``;``, ``|``, ...) or None."""
    if delimiter is None:
        return None
    value = _DELIMITER_NAMES.get(delimiter.strip().lower(), delimiter)
    if len(value) != 1 or value in ('"', "\n", "\r"):
        raise DriftError(
            f"--delimiter {printable(delimiter)!r} must be one character, such as ';', '|' or tab."
        )
    return value


#: Largest CSV block tried when rows are very long (pyarrow keeps each row inside one block).
MAX_BLOCK_BYTES = 1 << 30


class _RowTooLong(Exception):
    """A CSV row does not fit in one pyarrow block."""


@dataclass
class DocBatch:
    """A batch of documents: raw time values and texts (Arrow arrays of equal length).

    ``continues`` is True when the first text continues the last document of the previous batch
    (a long .txt file is read in pieces); it is then not a new document. Documents are numbered
    by their position in the source (the n-th data row, or the n-th .txt file).
    """

    times: pa.Array
    texts: pa.Array
    continues: bool = False
    #: Extra columns asked for with :meth:`Reader.want` (id, metadata; as text), by name.
    extra: dict[str, pa.Array] | None = None
    #: The file the batch comes from, when several files are read as one archive (else None).
    source: str | None = None

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


def decompress_file(path: Path, compression: str, target: Path) -> None:
    """Write the decompressed bytes of ``path`` (``compression``: gzip, bzip2 or xz) to
    ``target``; a truncated or damaged file is a DriftError naming it."""
    opener = {"gzip": gzip.open, "bzip2": bz2.open, "xz": lzma.open}[compression]
    try:
        with opener(path, "rb") as source, open(target, "wb") as out:
            shutil.copyfileobj(source, out, 1 << 20)
    except _DAMAGED as exc:
        raise DriftError(
            f"{path} is truncated or damaged ({compression}: {printable(str(exc))}); copy the "
            "file again."
        ) from None


def detect_format(path: Path, fmt: str | None = None) -> str:
    """The table format of ``path``: ``fmt`` when given, else from the extension (folders: txt)."""
    path = Path(path)
    if fmt is not None:
        fmt = fmt.lower().strip(".")
        if fmt == "ndjson":
            fmt = "jsonl"
        if fmt not in FORMATS:
            raise DriftError(f"Unknown --input-format '{fmt}'; use one of {', '.join(FORMATS)}.")
        if path.is_dir() and fmt != "txt":
            raise DriftError(
                f"{path} is a folder; only --input-format txt reads folders (of .txt files)."
            )
        return fmt
    if path.is_dir():
        return "txt"
    suffix = Path(_strip_compression_suffix(path.name)).suffix.lower()
    if suffix in _EXTENSIONS:
        return _EXTENSIONS[suffix]
    raise DriftError(
        f"Cannot tell the format of {path.name} from its extension; name it with --input-format "
        f"({', '.join(FORMATS)})."
    )


# ---------------------------------------------------------------------------- decoding


class _CountingFile(io.RawIOBase):
    """A raw binary file that remembers how many bytes were read from it (for progress)."""

    def __init__(self, path: Path, byte_range: tuple[int, int] | None = None):
        self._file = open(path, "rb")  # noqa: SIM115 - closed with this object
        self.position = 0
        self._left = None  # bytes left to read in ``byte_range`` (None: to the end)
        if byte_range is not None:
            self._file.seek(byte_range[0])
            self._left = byte_range[1] - byte_range[0]

    def readable(self) -> bool:
        return True

    def readinto(self, buffer) -> int:
        if self._left is not None:
            buffer = memoryview(buffer)[: max(0, self._left)]
        count = self._file.readinto(buffer)
        self.position += count or 0
        if self._left is not None:
            self._left -= count or 0
        return count

    def close(self) -> None:
        self._file.close()
        super().close()


class _Utf8Stream(io.RawIOBase):
    """Valid UTF-8 bytes from a (possibly compressed) file in any encoding.

    ``encoding`` None: UTF-8, except that a file whose first undecodable chunk comes before any
    valid non-ASCII UTF-8 is read as :data:`LEGACY_ENCODING` from there on (``legacy`` counts
    the non-ASCII characters read so); a UTF-16 byte order mark selects UTF-16. Bytes that do not
    decode become U+FFFD and are counted (``replaced``). Damaged or truncated compressed data
    raises DriftError (also when read from inside pyarrow).
    """

    def __init__(
        self,
        path: Path,
        compression: str | None,
        encoding: str | None = None,
        byte_range: tuple[int, int] | None = None,
    ):
        self.path = path
        self.compression = compression
        self.counter = _CountingFile(path, byte_range)
        if compression == "gzip":
            self._source: BinaryIO = gzip.GzipFile(fileobj=self.counter, mode="rb")
        elif compression == "bzip2":
            self._source = bz2.BZ2File(self.counter, mode="rb")
        elif compression == "xz":
            self._source = lzma.LZMAFile(self.counter, mode="rb")
        else:
            self._source = io.BufferedReader(self.counter, 1 << 20)
        self.encoding = encoding
        self._detect = encoding is None
        self._decoder = None if encoding in (None, "utf-8") else self._decoder_for(encoding)
        self._tail = b""
        self._pending = memoryview(b"")
        self._at_start = True
        self._done = False
        self._saw_utf8 = False  # valid non-ASCII UTF-8 seen: the file is UTF-8 after all
        self.replaced = 0
        self.legacy = 0
        self.failure: DriftError | None = None

    @staticmethod
    def _decoder_for(encoding: str):
        errors = "drift-latin1" if encoding == LEGACY_ENCODING else "replace"
        return codecs.getincrementaldecoder(encoding)(errors=errors)

    def readable(self) -> bool:
        return True

    def _read_raw(self, size: int) -> bytes:
        try:
            return self._source.read(size)
        except _DAMAGED as exc:
            kind = self.compression or "data"
            detail = str(exc) or exc.__class__.__name__
            self.failure = DriftError(
                f"{self.path} is truncated or damaged ({kind}: {printable(detail)}); copy the "
                "file again or decompress it to see where it breaks."
            )
            raise self.failure from None

    def _decode_utf8(self, data: bytes, final: bool) -> tuple[bytes, int]:
        """Pass valid UTF-8 through as it is; on bad bytes switch to the legacy codec (when
        detecting and no valid non-ASCII UTF-8 came first) or replace them (counted)."""
        try:
            _, used = codecs.utf_8_decode(data, "strict", final)
            chunk = data[:used]
            if not self._saw_utf8 and not chunk.isascii():
                self._saw_utf8 = True
            return chunk, used
        except UnicodeDecodeError:
            pass
        text, used = codecs.utf_8_decode(data, "replace", final)
        genuine = data[:used].count(b"\xef\xbf\xbd")
        bad = text.count("\ufffd") - genuine
        valid_non_ascii = sum(1 for c in text if c >= "\x80") - bad
        if self._detect and not self._saw_utf8 and valid_non_ascii == 0:
            self.encoding = LEGACY_ENCODING
            self._decoder = self._decoder_for(LEGACY_ENCODING)
            return self._decode_other(data, final), len(data)
        self._saw_utf8 = self._saw_utf8 or valid_non_ascii > 0
        self.replaced += bad
        return text.encode("utf-8"), used

    def _decode_other(self, data: bytes, final: bool) -> bytes:
        text = self._decoder.decode(data, final)
        if self.encoding == LEGACY_ENCODING:
            self.legacy += sum(1 for c in text if c >= "\x80")
        else:
            self.replaced += text.count("\ufffd")
        return text.encode("utf-8")

    def _fill(self, size: int) -> None:
        """Decode the next chunk into UTF-8 bytes."""
        while not self._pending and not self._done:
            raw = self._read_raw(max(size, 1 << 20))
            final = not raw
            data = self._tail + raw if self._tail else raw
            if self._at_start and self._detect and data[:2] in (b"\xff\xfe", b"\xfe\xff"):
                self.encoding = "utf-16"
                self._decoder = self._decoder_for("utf-16")
            if self._decoder is not None:
                chunk, used = self._decode_other(data, final), len(data)
            else:
                chunk, used = self._decode_utf8(data, final)
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
            f"{where} has no column '{printable(given)}' ({option}); its columns are: "
            f"{printable(', '.join(columns), limit=200)}{delimiter_hint(columns)}."
        )
    found = [c for c in columns if c.lower().strip() in candidates]
    if len(found) == 1:
        return found[0]
    if found:
        problem = f"several columns could hold the {role} ({', '.join(found)})"
    else:
        problem = f"no column is called {', '.join(candidates)}"
    shown = printable(", ".join(columns), limit=200)
    raise DriftError(
        f"Cannot tell which column of {where} holds the {role}: {problem}; name it with {option} "
        f"(columns: {shown}){delimiter_hint(columns)}."
    )


def delimiter_hint(columns: list[str]) -> str:
    """A hint to give --delimiter when the header was read as one column holding ';', '|' or a
    tab (the file is separated by that character)."""
    if len(columns) != 1:
        return ""
    for char, name in ((";", "';'"), ("|", "'|'"), ("\t", "tab")):
        if char in columns[0]:
            return (
                f"; the one column name holds {name}, so the file is probably separated by "
                f"{name}: add --delimiter {name}"
            )
    return ""


def check_text_type(kind: pa.DataType, column: str, role: str, where: str) -> None:
    """Refuse a column whose values are lists, records or raw bytes (not one value per cell)."""
    if pa.types.is_dictionary(kind):
        kind = kind.value_type
    nested = (
        pa.types.is_list(kind)
        or pa.types.is_large_list(kind)
        or pa.types.is_fixed_size_list(kind)
        or pa.types.is_struct(kind)
        or pa.types.is_map(kind)
        or pa.types.is_binary(kind)
        or pa.types.is_large_binary(kind)
    )
    if not nested:
        return
    raw = pa.types.is_binary(kind) or pa.types.is_large_binary(kind)
    if raw:
        option = "--text-col" if role == "text" else "--time-col"
        fix = f"store it as text (UTF-8 strings), or name another column with {option}"
    elif role == "text":
        fix = (
            "join each list into one string per document (tokens joined by spaces can be read "
            "with --pretokenized), or name another column with --text-col"
        )
    else:
        fix = "store one date per document, or name another column with --time-col"
    raise DriftError(f"The {role} column '{column}' of {where} holds {kind} values; {fix}.")


# ---------------------------------------------------------------------------- readers


def _as_text(values: pa.Array) -> pa.Array:
    """An Arrow array as strings (ids and metadata are kept as written)."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    return values if pa.types.is_string(values.type) else values.cast(pa.string())


class Reader:
    """Base of the readers: the source, its resolved columns, progress and replaced characters."""

    fmt = ""

    def __init__(self, path: Path, compression: str | None, encoding: str | None = None):
        self.path = path
        self.compression = compression
        self.encoding = encoding
        self.time_col = ""
        self.text_col = ""
        self.columns: list[str] = []
        self.extra_cols: list[str] = []
        self._streams: list[_Utf8Stream] = []
        self._done_bytes = 0
        #: Only this part of the file is read (set by :meth:`restrict`; Dask slicing).
        self.byte_range: tuple[int, int] | None = None

    def want(self, column: str, option: str) -> str:
        """Also read ``column`` (named with ``option``) into :attr:`DocBatch.extra`; returns its
        name as the source spells it (a missing column is a DriftError listing the columns)."""
        found = pick_column(self.columns, column, (), column, option, self.path.name)
        if found not in self.extra_cols:
            self.extra_cols.append(found)
        return found

    def _read_cols(self) -> list[str]:
        """Time, text and extra columns, each once."""
        return list(dict.fromkeys([self.time_col, self.text_col, *self.extra_cols]))

    def _extra_of(self, batch) -> dict[str, pa.Array] | None:
        if not self.extra_cols:
            return None
        return {c: _as_text(batch.column(c)) for c in self.extra_cols}

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

    @property
    def legacy(self) -> int:
        """Characters read as :data:`LEGACY_ENCODING` because the file is not UTF-8."""
        return sum(s.legacy for s in self._streams)

    @property
    def encoding_used(self) -> str:
        """The codec the text was read with (after detection)."""
        found = {s.encoding for s in self._streams if s.encoding}
        return self.encoding or (found.pop() if len(found) == 1 else "utf-8")

    def notes(self) -> list[str]:
        """Warnings about how the source was read (call after reading it)."""
        if not self.legacy:
            return []
        return [
            f"{self.path.name} is not UTF-8: {self.legacy:,} non-ASCII characters were read as "
            f"{LEGACY_ENCODING} (Windows Western European, which covers Latin-1 text); if they "
            "look wrong, name the file's encoding with --encoding."
        ]

    def _open_text_stream(
        self, path: Path | None = None, compression: str | None = None, probe: bool = False
    ) -> _Utf8Stream:
        """A decoded stream of the source (or of ``path``); a ``probe`` (reading the header) is
        not counted in progress or replaced characters."""
        stream = _Utf8Stream(
            path or self.path, compression if path else self.compression, self.encoding,
            None if (path or probe) else self.byte_range,
        )
        if not probe:
            self._streams.append(stream)
        return stream

    def _check_not_binary(self) -> None:
        """Refuse a file whose first bytes (after decompression) hold NUL bytes, unless they are
        expected in its encoding (UTF-16)."""
        stream = _Utf8Stream(self.path, self.compression, self.encoding)
        try:
            head = stream._read_raw(1 << 13)
        finally:
            stream.close()
        utf16 = head[:2] in (b"\xff\xfe", b"\xfe\xff") or "16" in (self.encoding or "")
        utf32 = "32" in (self.encoding or "")
        offset = head.find(b"\x00")
        if offset >= 0 and not (utf16 or utf32):
            raise DriftError(
                f"{self.path} looks like a binary file, not text (a NUL byte at offset "
                f"{offset}); check the path, or name the format with --input-format."
            )

    def pieces(self, size: int) -> list[tuple[int, int] | None]:
        """Parts of the file that can be read on their own (:meth:`restrict`), of about
        ``size`` bytes, in order; ``[None]`` (the whole file) when it cannot be split."""
        return [None]

    def restrict(self, piece: tuple[int, int] | None) -> None:
        """Read only ``piece``, one of :meth:`pieces` (after the columns are resolved)."""
        if piece is not None:
            raise ValueError(f"{self.path.name} cannot be read in parts")

    def _byte_ranges_possible(self, size: int) -> bool:
        """Whether the file can be read in byte ranges of about ``size``: larger than that,
        uncompressed, and in UTF-8 or detected but not UTF-16 (a range must start at a whole
        character that means the same wherever it stands)."""
        if self.compression or self.encoding not in (None, "utf-8") or self.total_bytes <= size:
            return False
        with open(self.path, "rb") as handle:
            return handle.read(2) not in (b"\xff\xfe", b"\xfe\xff")

    def _byte_ranges(self, starts: list[int]) -> list[tuple[int, int] | None]:
        """The ranges from each start to the next (the last to the end of the file)."""
        if len(starts) == 1:
            return [None]
        return list(zip(starts, [*starts[1:], self.total_bytes], strict=True))

    def batches(self) -> Iterator[DocBatch]:  # pragma: no cover - overridden
        raise NotImplementedError


#: Bytes read at a time while looking for the rows at which a large CSV file can be split.
_SCAN_BYTES = 16 << 20


def csv_row_starts(path: Path, delimiter: bytes, size: int) -> list[int] | None:
    """Offsets at which rows of the CSV file ``path`` begin, about ``size`` bytes apart (the
    first is 0), or None when its quoting is not plain enough to tell rows apart without
    parsing.

    Plain quoting (RFC 4180, and how pyarrow reads it): a double quote opens a quoted field only
    at the start of a field, and inside one a quote is written twice. A line break then ends a
    row exactly when an even number of quotes came before it, so one pass that counts quotes
    finds row starts. The pass also checks that every quote at an even count stands at the
    start of a field (after the delimiter, a line break or the second quote of a pair) and
    that the count ends even; a file where that fails (a stray quote in an unquoted field) is
    not split.
    """
    total = path.stat().st_size
    quote, allowed = ord('"'), np.frombuffer(delimiter + b'\n\r"', np.uint8)
    starts, wanted = [0], size
    count, offset, before = 0, 0, ord("\n")  # quotes so far; the byte before the chunk
    with open(path, "rb") as handle:
        while chunk := handle.read(_SCAN_BYTES):
            data = np.frombuffer(chunk, np.uint8)
            quotes = np.flatnonzero(data == quote)
            opening = quotes[(count + np.arange(len(quotes))) % 2 == 0]
            previous = np.where(opening > 0, data[np.maximum(opening - 1, 0)], before)
            if offset == 0 and chunk.startswith(codecs.BOM_UTF8):
                previous[opening == len(codecs.BOM_UTF8)] = ord("\n")  # a quote after the BOM
            if not np.isin(previous, allowed).all():
                return None
            while wanted < offset + len(data):
                breaks = np.flatnonzero(data[max(wanted - offset, 0):] == ord("\n"))
                breaks += max(wanted - offset, 0)
                even = (count + np.searchsorted(quotes, breaks)) % 2 == 0
                if not even.any():
                    wanted = offset + len(data)  # look on in the next chunk
                    break
                start = offset + int(breaks[np.argmax(even)]) + 1
                if start < total:
                    starts.append(start)
                wanted = start + size
            count += len(quotes)
            offset += len(data)
            before = int(data[-1])
    return starts if count % 2 == 0 else None


class CsvReader(Reader):
    """CSV or TSV through pyarrow's streaming CSV reader (quoted fields may hold line breaks)."""

    def __init__(
        self,
        path: Path,
        compression: str | None,
        delimiter: str,
        time_col,
        text_col,
        encoding: str | None = None,
    ):
        super().__init__(path, compression, encoding)
        self.fmt = "tsv" if delimiter == "\t" else "csv"
        self._check_not_binary()
        self._parse = pacsv.ParseOptions(delimiter=delimiter, newlines_in_values=True)
        self.columns = self._header()
        self.time_col = pick_column(
            self.columns, time_col, TIME_COLUMN_NAMES, "time", "--time-col", self.path.name
        )
        self.text_col = pick_column(
            self.columns, text_col, TEXT_COLUMN_NAMES, "text", "--text-col", self.path.name
        )

    def pieces(self, size: int) -> list[tuple[int, int] | None]:
        """Byte ranges that start at a row (after a line break outside every quoted field), for
        uncompressed files in UTF-8 or detected (not UTF-16) whose quoting is plain (see
        :func:`csv_row_starts`); other files are read whole."""
        delimiter = self._parse.delimiter
        if (not self._byte_ranges_possible(size) or len(delimiter.encode("utf-8")) != 1
                or delimiter == '"'):
            return [None]
        starts = csv_row_starts(self.path, delimiter.encode("utf-8"), size)
        return [None] if starts is None else self._byte_ranges(starts)

    def restrict(self, piece: tuple[int, int] | None) -> None:
        self.byte_range = piece

    def _open(self, block_size: int, columns: list[str] | None):
        stream = self._open_text_stream(probe=columns is None)
        convert = pacsv.ConvertOptions(
            include_columns=columns,
            column_types={c: pa.string() for c in columns} if columns else None,
        )
        # a piece after the first has no header row: its columns are the file's
        headless = columns is not None and self.byte_range is not None and self.byte_range[0] > 0
        try:
            return pacsv.open_csv(
                io.BufferedReader(stream, 1 << 20),
                read_options=pacsv.ReadOptions(
                    block_size=block_size, column_names=self.columns if headless else None
                ),
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
        return DriftError(
            f"{self.path} is not a well-formed {self.fmt.upper()} file ({printable(message)}); "
            "check its delimiter (--delimiter) and quoting, or name the format with --input-format."
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
                reader, stream = self._open(block, self._read_cols())
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
                    except (pa.ArrowException, OSError) as exc:
                        raise self._error(exc, stream) from None
                    if skip >= batch.num_rows:
                        skip -= batch.num_rows
                        continue
                    batch, skip = batch.slice(skip), 0
                    delivered += batch.num_rows
                    yield DocBatch(
                        batch.column(self.time_col),
                        batch.column(self.text_col),
                        extra=self._extra_of(batch),
                    )
            except _RowTooLong:
                self._streams.remove(stream)  # read again from the start; count its bytes once
                block = self._larger(block)
            finally:
                stream.close()


class JsonLinesReader(Reader):
    """JSON Lines: one JSON object per line, read line by line."""

    fmt = "jsonl"

    def __init__(
        self, path: Path, compression: str | None, time_col, text_col, encoding: str | None = None
    ):
        super().__init__(path, compression, encoding)
        self._check_not_binary()
        self.columns = self._first_keys()
        self.time_col = pick_column(
            self.columns, time_col, TIME_COLUMN_NAMES, "time", "--time-col", self.path.name
        )
        self.text_col = pick_column(
            self.columns, text_col, TEXT_COLUMN_NAMES, "text", "--text-col", self.path.name
        )

    def pieces(self, size: int) -> list[tuple[int, int] | None]:
        """Byte ranges that start at the beginning of a line (a line break never occurs inside
        a JSON string or a UTF-8 character), for uncompressed files in UTF-8 or detected."""
        if not self._byte_ranges_possible(size):
            return [None]
        total, starts = self.total_bytes, [0]
        with open(self.path, "rb") as handle:
            for guess in range(size, total, size):
                if guess <= starts[-1]:
                    continue
                handle.seek(guess)
                handle.readline()  # to the start of the next line
                if handle.tell() < total:
                    starts.append(handle.tell())
        return self._byte_ranges(starts)

    def restrict(self, piece: tuple[int, int] | None) -> None:
        self.byte_range = piece

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
                f"Line {number} of {self.path} is not valid JSON ({printable(exc.msg)}); fix or "
                "remove that line."
            ) from None
        if isinstance(record, list) and number == 1:
            raise array
        if not isinstance(record, dict):
            raise DriftError(
                f"Line {number} of {self.path} is not a JSON object; write one object per line."
            )
        return record

    def _nested(self, number: int, value: object, column: str, role: str) -> DriftError:
        kind = "a list" if isinstance(value, list) else "an object"
        fix = " (tokens joined by spaces for --pretokenized)" if role == "text" else ""
        return DriftError(
            f"Line {number} of {self.path}: the {role} field '{column}' holds {kind}, not one "
            f"value; store one {role} string per document{fix}."
        )

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

    def _batch(self, times: list, texts: list, extra: dict[str, list]) -> DocBatch:
        return DocBatch(
            pa.array(times, pa.string()),
            pa.array(texts, pa.string()),
            extra={c: pa.array(v, pa.string()) for c, v in extra.items()} or None,
        )

    def batches(self) -> Iterator[DocBatch]:
        times: list = []
        texts: list = []
        extra: dict[str, list] = {c: [] for c in self.extra_cols}
        size = 0
        for number, line in self._lines():
            record = self._record(number, line)
            when = record.get(self.time_col)
            text = record.get(self.text_col)
            for value, column, role in (
                (text, self.text_col, "text"),
                (when, self.time_col, "time"),
            ):
                if isinstance(value, list | dict):
                    raise self._nested(number, value, column, role)
            times.append(None if when is None else str(when))
            texts.append("" if text is None else text if isinstance(text, str) else str(text))
            for column, values in extra.items():
                value = record.get(column)
                values.append(None if value is None else str(value))
            size += len(line)
            if size >= BATCH_BYTES:
                yield self._batch(times, texts, extra)
                times, texts, size = [], [], 0
                extra = {c: [] for c in self.extra_cols}
        if texts:
            yield self._batch(times, texts, extra)


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
        schema = self._file.schema_arrow
        for column, role in ((self.text_col, "text"), (self.time_col, "time")):
            check_text_type(schema.field(column).type, column, role, self.path.name)
        self._rows_done = 0
        self._groups: list[int] | None = None  # row groups to read (None: all)

    def _open(self) -> pq.ParquetFile:
        target = self.path
        if self.compression:
            self._tmpdir = tempfile.TemporaryDirectory(prefix="drift-parquet-")
            target = Path(self._tmpdir.name) / "source.parquet"
            decompress_file(self.path, self.compression, target)
        if target.stat().st_size == 0:
            raise DriftError(f"{self.path} is empty; give a Parquet file with documents.")
        try:
            return pq.ParquetFile(target)
        except (pa.ArrowException, OSError) as exc:
            raise DriftError(
                f"{self.path} is not a readable Parquet file ({printable(str(exc))}); check the "
                "file or --input-format."
            ) from None

    def position(self) -> int:
        rows = max(self._file.metadata.num_rows, 1)
        return int(self.total_bytes * self._rows_done / rows)

    def pieces(self, size: int) -> list[tuple[int, int] | None]:
        """Runs of whole row groups, of about ``size`` bytes of the file each (uncompressed
        files; a piece is (first row group, end row group))."""
        metadata = self._file.metadata
        groups = metadata.num_row_groups
        if self.compression or groups < 2 or self.total_bytes <= size:
            return [None]
        sizes = []  # bytes of each row group in the file
        for i in range(groups):
            group = metadata.row_group(i)
            sizes.append(sum(group.column(c).total_compressed_size
                             for c in range(group.num_columns)))
        pieces, first, held = [], 0, 0
        for group, group_size in enumerate(sizes):
            held += group_size
            if held >= size and group + 1 < groups:
                pieces.append((first, group + 1))
                first, held = group + 1, 0
        pieces.append((first, groups))
        return [None] if len(pieces) == 1 else pieces

    def restrict(self, piece: tuple[int, int] | None) -> None:
        self._groups = None if piece is None else list(range(*piece))

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
                batch_size=rows, columns=self._read_cols(), row_groups=self._groups
            ):
                self._rows_done += batch.num_rows
                yield DocBatch(
                    batch.column(self.time_col),
                    batch.column(self.text_col),
                    extra=self._extra_of(batch),
                )
        except (pa.ArrowException, OSError) as exc:
            raise DriftError(
                f"{self.path} is not a readable Parquet file ({printable(str(exc))}); check the "
                "file."
            ) from None
        finally:
            if self._tmpdir is not None:
                self._tmpdir.cleanup()


# ---------------------------------------------------------------------------- folders of text files

#: A date in a name must be a whole token: no letter or digit right before or after it (``_``,
#: ``-``, ``.``, spaces and brackets separate tokens), so ``note1002`` or ``scan2048`` hold none.
_EDGE_BEFORE = r"(?<![^\W_])"
_EDGE_AFTER = r"(?![^\W_])"
_NAME_DATE_PATTERNS = tuple(
    re.compile(_EDGE_BEFORE + body + _EDGE_AFTER)
    for body in (
        r"(\d{4})[-_.](\d{2})[-_.](\d{2})",
        r"(\d{4})(\d{2})(\d{2})",
        r"(\d{4})[-_.](\d{2})",
        r"(\d{4})",
    )
)


def date_in_name(name: str) -> str | None:
    """The first whole-token date in one file or folder name (years 1000 to 2999), or None:
    ``1990-03-01`` / ``19900301`` / ``1990_03`` / ``1990``."""
    for pattern in _NAME_DATE_PATTERNS:
        for match in pattern.finditer(name):
            numbers = [int(g) for g in match.groups()]
            if not 1000 <= numbers[0] <= 2999:
                continue
            if len(numbers) > 1 and not 1 <= numbers[1] <= 12:
                continue
            if len(numbers) > 2 and not 1 <= numbers[2] <= 31:
                continue
            return "-".join(match.groups())
    return None


def name_and_folder_dates(relative: str) -> tuple[str | None, str | None]:
    """The date in a file's own name and the date of its innermost dated folder."""
    parts = Path(relative).parts
    own = date_in_name(_TEXT_FILE_RE.sub("", parts[-1]))
    folder = next((d for d in map(date_in_name, reversed(parts[:-1])) if d), None)
    return own, folder


def date_from_name(relative: str) -> str | None:
    """A file's date from its path: the date in its own name, else its innermost dated folder's.

    Only whole tokens count (see :func:`date_in_name`); None when neither holds a date.
    """
    own, folder = name_and_folder_dates(relative)
    return own or folder


def dates_disagree(own: str | None, folder: str | None) -> bool:
    """True when a file's name and its folder give different dates (``1905`` and
    ``1905-03-02`` agree: the folder's date is a prefix of the file's)."""
    if not own or not folder:
        return False
    return not (own.startswith(folder) or folder.startswith(own))


class TextFolderReader(Reader):
    """A folder of .txt files (also .txt.gz/.bz2/.xz), one document per file.

    A file's date, first rule that gives one: (1) a small CSV index in the folder (``index.csv``,
    or the only .csv file at its top level: a file-name column and a date column) that lists the
    file; (2) a date in the file's own name; (3) a date in its innermost dated folder's name. Only
    whole tokens count as dates in names (``1905``, ``1905-03-02``, ``letter_1905.txt``; not
    ``note1002.txt``). Files whose name and folder give different dates are listed in
    :meth:`notes` (the name wins). A single .txt file is read the same way.
    """

    fmt = "txt"

    def __init__(self, path: Path, time_col, text_col, encoding: str | None = None):
        super().__init__(path, None, encoding)
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
        self._legacy_done = 0
        self.legacy_files: list[str] = []
        self.disagreements: list[tuple[str, str, str]] = []  # (file, name date, folder date)
        self.dates = {file: self._date_for(file) for file in self.files}

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
        own, folder = name_and_folder_dates(relative)
        if dates_disagree(own, folder):
            self.disagreements.append((relative, str(own), str(folder)))
        return own or folder or f"(no date in {relative})"

    @property
    def legacy(self) -> int:
        return self._legacy_done + sum(s.legacy for s in self._streams)

    def notes(self) -> list[str]:
        """Files whose name and folder disagree on the date, and files read as cp1252."""
        messages = []
        if self.disagreements:
            shown = "; ".join(
                f"{printable(f)} dated {own}, folder says {folder}"
                for f, own, folder in self.disagreements[:5]
            )
            more = len(self.disagreements) - 5
            messages.append(
                f"{len(self.disagreements):,} file{'s' if len(self.disagreements) > 1 else ''} "
                f"whose name and folder give different dates were dated by the file name "
                f"({shown}{f'; and {more:,} more' if more > 0 else ''}); to date them otherwise, "
                "list them in an index.csv (file, date)."
            )
        if self.legacy_files:
            shown = ", ".join(printable(f) for f in self.legacy_files[:5])
            more = len(self.legacy_files) - 5
            messages.append(
                f"{len(self.legacy_files):,} text file{'s' if len(self.legacy_files) > 1 else ''} "
                f"not in UTF-8 ({shown}{f' and {more:,} more' if more > 0 else ''}): "
                f"{self.legacy:,} non-ASCII characters were read as {LEGACY_ENCODING} (Windows "
                "Western European, which covers Latin-1 text); if they look wrong, name the "
                "files' encoding with --encoding."
            )
        return messages

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
            self._legacy_done += stream.legacy
            if stream.legacy:
                self.legacy_files.append(file.relative_to(self.root).as_posix())
            self._streams.remove(stream)
            stream.close()

    @property
    def replaced(self) -> int:
        return self._replaced_done + sum(s.replaced for s in self._streams)

    def relative_name(self, file: Path) -> str:
        """The file's name relative to the folder (the ``file`` column and default id)."""
        return file.relative_to(self.root).as_posix()

    def batches(self) -> Iterator[DocBatch]:
        times: list[str] = []
        texts: list[str] = []
        names: list[str] = []
        size = 0
        continues = False
        self._replaced_done = self._legacy_done = 0  # each pass counts afresh
        self.legacy_files = []

        def batch() -> DocBatch:
            columns = {"file": names, "date": times}
            extra = {c: pa.array(columns[c], pa.string()) for c in self.extra_cols} or None
            return DocBatch(
                pa.array(times, pa.string()), pa.array(texts, pa.string()), continues, extra
            )

        for file in self.files:
            when = self.dates[file]
            name = self.relative_name(file)
            pieces = 0
            for piece in self._pieces(file):
                if pieces > 0 and not texts:
                    continues = True
                pieces += 1
                times.append(when)
                texts.append(piece)
                names.append(name)
                size += len(piece)
                if size >= BATCH_BYTES:
                    yield batch()
                    times, texts, names, size, continues = [], [], [], 0, False
            if pieces == 0:  # an empty file is an empty document
                times.append(when)
                texts.append("")
                names.append(name)
        if texts:
            yield batch()


# ---------------------------------------------------------------------------- entry point


def open_source(
    path: Path | str,
    fmt: str | None = None,
    time_col: str | None = None,
    text_col: str | None = None,
    *,
    encoding: str | None = None,
    delimiter: str | None = None,
) -> Reader:
    """A reader for ``path`` with its format, compression and time/text columns resolved.

    ``encoding``: the text's codec (default: UTF-8, with cp1252 detected when a file is not
    UTF-8); ``delimiter``: the field separator of CSV files (default ``,``; tab for TSV).
    """
    path = Path(path)
    if not path.exists():
        raise DriftError(f"There is no file or folder at {path}; check the path.")
    fmt = detect_format(path, fmt)
    encoding = check_encoding(encoding)
    delimiter = check_delimiter(delimiter)
    if delimiter is not None and fmt not in ("csv", "tsv"):
        raise DriftError(
            f"--delimiter applies to CSV and TSV files, not {fmt}; leave it out for {path.name}."
        )
    if fmt == "txt":
        return TextFolderReader(path, time_col, text_col, encoding)
    if path.stat().st_size == 0:
        raise DriftError(f"{path} is empty; give a file that holds documents.")
    try:
        compression = detect_compression(path)
    except OSError as exc:
        raise DriftError(
            f"{path} cannot be read ({exc.strerror or exc.__class__.__name__}); check its "
            "permissions."
        ) from None
    if fmt in ("csv", "tsv"):
        sep = delimiter or ("\t" if fmt == "tsv" else ",")
        return CsvReader(path, compression, sep, time_col, text_col, encoding)
    if encoding is not None:
        if fmt == "parquet":
            raise DriftError("--encoding does not apply to Parquet files (they store UTF-8).")
    if fmt == "jsonl":
        return JsonLinesReader(path, compression, time_col, text_col, encoding)
    return ParquetReader(path, compression, time_col, text_col)
