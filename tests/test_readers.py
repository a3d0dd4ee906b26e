"""Streaming readers: every format, every compression, bad files."""

from __future__ import annotations

import bz2
import gzip
import json
import lzma
import shutil
from pathlib import Path

import gensim
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

import drift.ingest.readers as readers
from drift.errors import DriftError
from drift.ingest.readers import (
    date_from_name,
    detect_compression,
    detect_format,
    open_source,
    pick_column,
)

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"
ENWIKI_BZ2 = GENSIM_DATA / "enwiki-latest-pages-articles1.xml-p000000010p000030302-shortened.bz2"

RECORDS = [
    {"id": 1, "date": "1990-03-01", "text": 'First, "quoted" text;\nwith a line break.'},
    {"id": 2, "date": "1991", "text": "Zweiter Text: Grüße"},
    {"id": 3, "date": "1992-07", "text": ""},
]
OPENERS = {None: open, "gzip": gzip.open, "bzip2": bz2.open, "xz": lzma.open}
SUFFIXES = {None: "", "gzip": ".gz", "bzip2": ".bz2", "xz": ".xz"}


def read_all(reader) -> tuple[list, list]:
    times, texts = [], []
    for batch in reader.batches():
        times += [None if v is None else str(v) for v in batch.times.to_pylist()]
        texts += batch.texts.to_pylist()
    return times, texts


def write_table(path: Path, fmt: str, compression: str | None = None, records=RECORDS) -> Path:
    path = path.with_name(path.name + SUFFIXES[compression])
    frame = pd.DataFrame(records)
    if fmt == "parquet":
        frame.to_parquet(path.with_suffix(".tmp") if compression else path)
        if compression:
            with (
                open(path.with_suffix(".tmp"), "rb") as src,
                OPENERS[compression](path, "wb") as dst,
            ):
                shutil.copyfileobj(src, dst)
        return path
    if fmt == "jsonl":
        text = "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records)
    else:
        text = frame.to_csv(index=False, sep="\t" if fmt == "tsv" else ",")
    with OPENERS[compression](path, "wt", encoding="utf-8", newline="") as out:
        out.write(text)
    return path


@pytest.mark.parametrize("compression", [None, "gzip", "bzip2", "xz"])
@pytest.mark.parametrize(
    "fmt, suffix", [("csv", ".csv"), ("tsv", ".tsv"), ("jsonl", ".jsonl"), ("parquet", ".parquet")]
)
def test_every_table_format_and_compression(tmp_path, fmt, suffix, compression):
    path = write_table(tmp_path / f"docs{suffix}", fmt, compression)
    reader = open_source(path)
    assert reader.fmt == fmt
    assert reader.compression == compression
    assert (reader.time_col, reader.text_col) == ("date", "text")
    times, texts = read_all(reader)
    assert times == [r["date"] for r in RECORDS]
    assert texts == [r["text"] for r in RECORDS]
    assert reader.replaced == 0


def test_folder_of_text_files_with_dates_from_names_and_index(tmp_path):
    folder = tmp_path / "letters"
    (folder / "1875").mkdir(parents=True)
    (folder / "1875" / "note.txt").write_text("Written in the folder's year.", encoding="utf-8")
    (folder / "diary_1880-05-02.txt").write_text("Dated by the file name.", encoding="utf-8")
    with gzip.open(folder / "letter-a.txt.gz", "wt", encoding="utf-8") as out:
        out.write("Dated by the index, compressed.")
    (folder / "undated.txt").write_text("No date anywhere.", encoding="utf-8")
    (folder / ".hidden.txt").write_text("ignored", encoding="utf-8")
    (folder / "README.md").write_text("ignored", encoding="utf-8")
    (folder / "index.csv").write_text("file,date\nletter-a.txt.gz,1890-01-15\n", encoding="utf-8")
    reader = open_source(folder)
    assert reader.fmt == "txt"
    times, texts = read_all(reader)
    assert times == ["1875", "1880-05-02", "1890-01-15", "(no date in undated.txt)"]
    assert texts[2] == "Dated by the index, compressed."
    assert len(texts) == 4


def test_single_text_file_and_empty_text_file(tmp_path):
    path = tmp_path / "1999-12-31 report.txt"
    path.write_text("Last day.", encoding="utf-8")
    assert read_all(open_source(path)) == (["1999-12-31"], ["Last day."])
    empty = tmp_path / "1990.txt"
    empty.write_text("", encoding="utf-8")
    assert read_all(open_source(empty)) == (["1990"], [""])


def test_real_bzip2_dump_in_a_text_folder_streams_in_pieces(tmp_path, monkeypatch):
    # Reference: Python's bz2 module decompressing gensim's bundled enwiki dump in one go.
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 18)
    folder = tmp_path / "wiki"
    folder.mkdir()
    shutil.copy(ENWIKI_BZ2, folder / "2017.txt.bz2")
    reader = open_source(folder)
    batches = list(reader.batches())
    assert len(batches) > 5  # several pieces, never the whole file at once
    assert not batches[0].continues and all(b.continues for b in batches[1:])
    streamed = "".join(t for b in batches for t in b.texts.to_pylist())
    with bz2.open(ENWIKI_BZ2, "rt", encoding="utf-8", errors="replace", newline="") as handle:
        whole = handle.read()
    assert streamed == whole


def test_undecodable_bytes_are_replaced_and_counted(tmp_path):
    path = tmp_path / "latin1.csv"
    path.write_bytes(b"date,text\n1990,caf\xe9 na\xefve\n1991,ok \xef\xbf\xbd kept\n")
    reader = open_source(path)
    times, texts = read_all(reader)
    assert texts == ["caf\ufffd na\ufffdve", "ok \ufffd kept"]
    assert reader.replaced == 2  # the U+FFFD that was in the file is not counted


def test_byte_order_mark_and_quoted_line_breaks(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes('\ufeffdate,text\n1990,"one\ntwo, three"\n'.encode("utf-8"))
    reader = open_source(path)
    assert reader.columns == ["date", "text"]
    assert read_all(reader) == (["1990"], ["one\ntwo, three"])


def awkward_csv(path: Path, rows: int = 600, bom: bool = False) -> Path:
    """A CSV of gensim's Lee news text whose fields hold the delimiter, line breaks (LF and
    CRLF) and doubled quotes, written by pandas (minimal quoting, RFC 4180)."""
    lines = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
    texts = []
    for i in range(rows):
        text = lines[i % len(lines)]
        if i % 3 == 0:
            text = text.replace(" ", "\n", 3)
        if i % 5 == 0:
            text = f'he said "{text[:40]}", then\r\nleft'
        texts.append(text)
    frame = pd.DataFrame({"date": [str(1990 + i % 10) for i in range(rows)], "text": texts})
    frame.to_csv(path, index=False, encoding="utf-8-sig" if bom else "utf-8")
    return path


@pytest.mark.parametrize("bom", [False, True])
def test_csv_row_starts_split_where_pyarrow_sees_rows(tmp_path, bom):
    """Reference: pyarrow's own CSV reader of the whole file. Reading each byte range from
    csv_row_starts on its own (with the header's column names) gives the same rows in order."""
    path = awkward_csv(tmp_path / "awkward.csv", bom=bom)
    whole = pacsv.read_csv(path, parse_options=pacsv.ParseOptions(newlines_in_values=True))
    starts = readers.csv_row_starts(path, b",", 20_000)
    assert starts is not None and len(starts) > 10
    data = path.read_bytes()
    assert all(data[s - 1:s] == b"\n" for s in starts[1:])
    texts = []
    for number, (a, b) in enumerate(zip(starts, [*starts[1:], len(data)], strict=True)):
        names = None if number == 0 else ["date", "text"]
        part = pacsv.read_csv(
            pa.BufferReader(data[a:b]),
            read_options=pacsv.ReadOptions(column_names=names),
            parse_options=pacsv.ParseOptions(newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(column_types={"date": pa.string()}),
        )
        texts += part.column("text").to_pylist()
    assert texts == whole.column("text").to_pylist()


def test_csv_with_stray_quotes_is_not_split(tmp_path):
    path = tmp_path / "stray.csv"
    body = "".join(f'{1990 + i % 10},a 5" disk number {i}\n' for i in range(3000))
    path.write_text("date,text\n" + body, encoding="utf-8")
    assert readers.csv_row_starts(path, b",", 10_000) is None
    reader = open_source(path)
    assert reader.pieces(10_000) == [None]
    odd = tmp_path / "odd.csv"
    odd.write_text('date,text\n1990,"never closed\n' + "1991,x\n" * 3000, encoding="utf-8")
    assert readers.csv_row_starts(odd, b",", 10_000) is None


def test_csv_pieces_read_as_the_whole_file(tmp_path):
    path = awkward_csv(tmp_path / "awkward.csv", rows=900)
    whole = read_all(open_source(path))
    pieces = open_source(path).pieces(30_000)
    assert len(pieces) > 5
    times, texts = [], []
    for piece in pieces:
        reader = open_source(path)
        reader.restrict(piece)
        got = read_all(reader)
        times += got[0]
        texts += got[1]
    assert (times, texts) == whole
    for compressed in ("gz",):
        other = tmp_path / f"awkward.csv.{compressed}"
        other.write_bytes(gzip.compress(path.read_bytes()))
        assert open_source(other).pieces(30_000) == [None]


def test_csv_streams_in_batches(tmp_path, monkeypatch):
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 16)
    records = [{"date": 1900 + i % 100, "text": f"document number {i} " * 20} for i in range(5000)]
    path = write_table(tmp_path / "many.csv", "csv", records=records)
    reader = open_source(path)
    batches = list(reader.batches())
    assert len(batches) > 10
    assert max(b.texts.nbytes for b in batches) < 4 * (1 << 16)
    assert sum(len(b) for b in batches) == 5000
    assert reader.position() == path.stat().st_size


def test_rows_longer_than_a_block_are_read_once_in_order(tmp_path, monkeypatch):
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 12)
    texts = [f"short {i}" for i in range(3000)]
    texts[0] = "first " * 30_000  # longer than the header probe's block
    texts[2000] = "long, " * 100_000  # longer than a batch block, in the middle
    path = write_table(
        tmp_path / "long.csv", "csv", records=[{"date": 1990, "text": t} for t in texts]
    )
    reader = open_source(path)
    times, read = read_all(reader)
    assert read == texts
    assert reader.replaced == 0


@pytest.mark.parametrize("compression", ["gzip", "bzip2", "xz"])
def test_truncated_compressed_file_is_a_clear_error(tmp_path, compression):
    records = [{"date": 1990, "text": f"text {i} " * 50} for i in range(3000)]
    path = write_table(tmp_path / "cut.csv", "csv", compression, records)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(DriftError, match="truncated or damaged"):
        read_all(open_source(path))


def test_truncated_compressed_jsonl_and_parquet(tmp_path):
    records = [{"date": 1990, "text": f"text {i} " * 50} for i in range(3000)]
    for fmt in ("jsonl", "parquet"):
        path = write_table(tmp_path / f"cut.{fmt}", fmt, "gzip", records)
        data = path.read_bytes()
        path.write_bytes(data[: len(data) // 2])
        with pytest.raises(DriftError, match="truncated or damaged"):
            read_all(open_source(path))


def test_format_detection_and_override(tmp_path):
    assert detect_format(Path("a.CSV")) == "csv"
    assert detect_format(Path("a.tsv.gz")) == "tsv"
    assert detect_format(Path("a.ndjson.xz")) == "jsonl"
    assert detect_format(Path("a.pq")) == "parquet"
    assert detect_format(Path("a.dat"), "CSV") == "csv"
    assert detect_format(tmp_path) == "txt"
    with pytest.raises(DriftError, match="Cannot tell the format"):
        detect_format(Path("a.dat"))
    with pytest.raises(DriftError, match="Unknown --input-format 'xls'"):
        detect_format(Path("a.csv"), "xls")
    with pytest.raises(DriftError, match="only --input-format txt reads folders"):
        detect_format(tmp_path, "csv")
    # compression is recognised from the content, whatever the name says
    path = tmp_path / "plain-name.dat"
    with gzip.open(path, "wt") as out:
        out.write("date,text\n1990,x\n")
    assert detect_compression(path) == "gzip"
    assert read_all(open_source(path, fmt="csv")) == (["1990"], ["x"])


def test_column_choice():
    assert (
        pick_column(
            ["id", "Date", "body"], None, readers.TIME_COLUMN_NAMES, "time", "--time-col", "f"
        )
        == "Date"
    )
    assert (
        pick_column(["id", "when"], "WHEN", readers.TIME_COLUMN_NAMES, "time", "--time-col", "f")
        == "when"
    )
    with pytest.raises(
        DriftError,
        match=r"several columns could hold the time \(date, year\).*columns: date, year, text",
    ):
        pick_column(
            ["date", "year", "text"], None, readers.TIME_COLUMN_NAMES, "time", "--time-col", "f"
        )
    with pytest.raises(DriftError, match="no column 'stamp' .*its columns are: id, when"):
        pick_column(["id", "when"], "stamp", readers.TIME_COLUMN_NAMES, "time", "--time-col", "f")
    with pytest.raises(
        DriftError, match="no column is called date, time, year, timestamp.*columns: id, when"
    ):
        pick_column(["id", "when"], None, readers.TIME_COLUMN_NAMES, "time", "--time-col", "f")


def test_named_columns_in_each_format(tmp_path):
    records = [{"when": "1990", "words": "hello"}]
    for fmt in ("csv", "jsonl", "parquet"):
        path = write_table(tmp_path / f"named.{fmt}", fmt, records=records)
        with pytest.raises(DriftError, match="Cannot tell which column"):
            open_source(path)
        reader = open_source(path, time_col="when", text_col="words")
        assert read_all(reader) == (["1990"], ["hello"])


def test_typed_parquet_times_are_passed_through(tmp_path):
    path = tmp_path / "typed.parquet"
    pq.write_table(
        pa.table({"year": pa.array([1990, 1991], pa.int32()), "content": ["a", "b"]}), path
    )
    reader = open_source(path)
    batch = next(reader.batches())
    assert pa.types.is_integer(batch.times.type)


@pytest.mark.parametrize("name", ["empty.csv", "empty.jsonl", "empty.parquet", "empty.csv.gz"])
def test_empty_files(tmp_path, name):
    path = tmp_path / name
    if name.endswith(".gz"):
        with gzip.open(path, "wb"):
            pass
    else:
        path.write_bytes(b"")
    with pytest.raises(DriftError, match="is empty"):
        read_all(open_source(path))


def test_header_only_csv_has_no_batches(tmp_path):
    path = tmp_path / "header.csv"
    path.write_text("date,text\n", encoding="utf-8")
    assert read_all(open_source(path)) == ([], [])


def test_bad_json_lines(tmp_path):
    array = tmp_path / "array.jsonl"
    array.write_text('[{"date": 1990, "text": "x"}]\n', encoding="utf-8")
    with pytest.raises(DriftError, match="JSON array, not JSON Lines"):
        open_source(array)
    broken = tmp_path / "broken.jsonl"
    broken.write_text(
        '{"date": 1990, "text": "x"}\n\n{"date": 1991, "text": "y"\n', encoding="utf-8"
    )
    with pytest.raises(DriftError, match="Line 3 of .* is not valid JSON"):
        read_all(open_source(broken))
    scalar = tmp_path / "scalar.jsonl"
    scalar.write_text('{"date": 1990, "text": "x"}\n42\n', encoding="utf-8")
    with pytest.raises(DriftError, match="Line 2 .* not a JSON object"):
        read_all(open_source(scalar))


def test_json_lines_with_missing_keys_and_numbers(tmp_path):
    path = tmp_path / "loose.jsonl"
    path.write_text(
        '{"year": 1990, "text": "x"}\n{"text": "no year"}\n{"year": "1992", "text": null}\n',
        encoding="utf-8",
    )
    assert read_all(open_source(path)) == (["1990", None, "1992"], ["x", "no year", ""])


def test_malformed_csv_and_unreadable_parquet(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("date,text\n1990,a\n1991,b,c,d\n", encoding="utf-8")
    with pytest.raises(DriftError, match="not a well-formed CSV"):
        read_all(open_source(bad))
    fake = tmp_path / "fake.parquet"
    fake.write_text("date,text\n1990,a\n", encoding="utf-8")
    with pytest.raises(DriftError, match="not a readable Parquet file"):
        open_source(fake)


def test_missing_source_and_folder_without_text_files(tmp_path):
    with pytest.raises(DriftError, match="There is no file or folder at"):
        open_source(tmp_path / "nothere.csv")
    (tmp_path / "docs").mkdir()
    (tmp_path / "docs" / "a.md").write_text("x", encoding="utf-8")
    with pytest.raises(DriftError, match="holds no .txt files"):
        open_source(tmp_path / "docs")


@pytest.mark.parametrize(
    "relative, expected",
    [
        ("1990/a.txt", "1990"),
        ("news-1991-04-05.txt", "1991-04-05"),
        ("19910405_x.txt.gz", "1991-04-05"),
        ("1850s/1852_07_letter.txt", "1852-07"),
        ("vol_0003/chapter_0001.txt", None),
        ("2001/chapter_0001.txt", "2001"),
        ("1990-13-45.txt", "1990"),
        ("notes.txt", None),
        # digits inside a longer token are never a date; the folder decides
        ("1905/note1002.txt", "1905"),
        ("1905/scan2048.txt", "1905"),
        ("1905/1907-03-02.txt", "1907-03-02"),
        ("box 12/letter (1907).txt", "1907"),
        ("x1905y/a.txt", None),
        ("1905s/a.txt", None),
    ],
)
def test_date_from_name(relative, expected):
    assert date_from_name(relative) == expected


def test_folder_dates_precedence_and_disagreement_warning(tmp_path):
    folder = tmp_path / "papers"
    (folder / "1905").mkdir(parents=True)
    for name in ("note1002.txt", "scan2048.txt", "1907-03-02.txt", "1905-06-01 minutes.txt"):
        (folder / "1905" / name).write_text(f"text of {name}", encoding="utf-8")
    (folder / "1905" / "indexed1907.txt").write_text("by the index", encoding="utf-8")
    (folder / "index.csv").write_text("file,date\n1905/indexed1907.txt,1911\n", encoding="utf-8")
    reader = open_source(folder)
    dated = {f.name: d for f, d in reader.dates.items()}
    assert dated == {
        "note1002.txt": "1905",  # not 1002
        "scan2048.txt": "1905",  # not 2048
        "1907-03-02.txt": "1907-03-02",  # the name wins over the folder ...
        "1905-06-01 minutes.txt": "1905-06-01",
        "indexed1907.txt": "1911",  # ... and the index over both
    }
    notes = reader.notes()
    assert len(notes) == 1
    assert "1 file whose name and folder give different dates" in notes[0]
    assert "1905/1907-03-02.txt dated 1907-03-02, folder says 1905" in notes[0]


def test_text_folder_of_latin1_files_lists_them(tmp_path):
    folder = tmp_path / "letters"
    folder.mkdir()
    (folder / "1901.txt").write_bytes("Grüße aus Köln".encode("latin-1"))
    (folder / "1902.txt").write_text("Grüße aus Köln", encoding="utf-8")
    reader = open_source(folder)
    _, texts = read_all(reader)
    assert texts == ["Grüße aus Köln", "Grüße aus Köln"]
    (note,) = reader.notes()
    assert note.startswith("1 text file not in UTF-8 (1901.txt)") and "3 non-ASCII" in note


def test_utf16_with_a_byte_order_mark_and_explicit_encodings(tmp_path):
    path = tmp_path / "wide.csv"
    path.write_bytes("date,text\n1990,Grüße\n".encode("utf-16"))
    assert read_all(open_source(path)) == (["1990"], ["Grüße"])
    path = tmp_path / "cyr.csv"
    path.write_bytes("date,text\n1990,привет\n".encode("cp1251"))
    assert read_all(open_source(path, encoding="cp1251")) == (["1990"], ["привет"])
    with pytest.raises(DriftError, match="not a known text encoding"):
        open_source(path, encoding="nope")
    with pytest.raises(DriftError, match="--delimiter applies to CSV"):
        open_source(write_table(tmp_path / "d.jsonl", "jsonl"), delimiter=";")


def test_jsonl_text_field_holding_a_list_is_a_clear_error(tmp_path):
    path = tmp_path / "tok.jsonl"
    path.write_text('{"date": "1990", "text": ["a", "b"]}\n', encoding="utf-8")
    with pytest.raises(DriftError, match="Line 1 .* the text field 'text' holds a list"):
        read_all(open_source(path))


def test_printable_escapes_control_and_replaced_characters():
    assert readers.printable("a\x00b\x1b\ufffdc\u200bd") == "a\\x00b\\x1b\\ufffdc\\u200bd"
    assert readers.printable("x" * 300, limit=10) == "xxxxxxx..."
