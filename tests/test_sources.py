"""Many sources read as one archive: paths, globs and folders of CSV/JSON Lines/Parquet parts.

The reference is the same text in one file: gensim's bundled news corpus (``lee_background.cor``)
split into parts of different formats must slice into the very same slice files and counts as the
whole corpus in one CSV.
"""

from __future__ import annotations

import filecmp
import gzip
import json
from pathlib import Path

import gensim
import pandas as pd
import pytest

from drift.cli import main
from drift.errors import DriftError
from drift.ingest.documents import read_documents
from drift.ingest.slicing import read_counts, read_summary, slice_archive
from drift.ingest.sources import MultiReader, expand_sources, open_sources
from drift.publish.evidence import source_problem

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"


def lee_frame() -> pd.DataFrame:
    """gensim's lee_background.cor, one document per line, dated 1990 to 1999, with a source."""
    lines = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
    return pd.DataFrame({
        "date": [f"{1990 + i % 10}-06-01" for i in range(len(lines))],
        "text": lines,
        "desk": [("home", "world", "sport")[i % 3] for i in range(len(lines))],
    })


def write_parts(frame: pd.DataFrame, folder: Path) -> list[Path]:
    """The frame in four consecutive parts: gzipped CSV, JSON Lines, Parquet, TSV."""
    folder.mkdir(parents=True, exist_ok=True)
    bounds = [0, 80, 170, 240, len(frame)]
    paths = []
    for number, (a, b) in enumerate(zip(bounds, bounds[1:], strict=False)):
        part = frame.iloc[a:b]
        if number == 0:
            path = folder / "p0.csv.gz"
            part.to_csv(path, index=False, compression="gzip")
        elif number == 1:
            path = folder / "p1.jsonl"
            with path.open("w", encoding="utf-8") as handle:
                for record in part.to_dict("records"):
                    handle.write(json.dumps(record) + "\n")
        elif number == 2:
            path = folder / "p2.parquet"
            part.to_parquet(path, index=False)
        else:
            path = folder / "p3.tsv"
            part.to_csv(path, index=False, sep="\t")
        paths.append(path)
    return paths


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("sources")
    frame = lee_frame()
    whole = root / "whole.csv"
    frame.to_csv(whole, index=False)
    write_parts(frame, root / "parts")
    return {"root": root, "whole": whole, "parts": root / "parts"}


def run_cli(args: list, capsys) -> tuple[int, str]:
    with pytest.raises(SystemExit) as exit_info:
        main(["slice", *map(str, args)])
    return exit_info.value.code, capsys.readouterr().err


def assert_one_sentence(err: str, *fragments: str) -> None:
    assert err.startswith("drift: ") and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1, err
    for fragment in fragments:
        assert fragment in err, err


def test_expand_sources_orders_globs_and_folders(corpus):
    parts = corpus["parts"]
    names = ["p0.csv.gz", "p1.jsonl", "p2.parquet", "p3.tsv"]
    assert [p.name for p in expand_sources(str(parts / "p*"))] == names
    assert [p.name for p in expand_sources(parts)] == names
    # items keep the order given; a file named twice is read once
    given = [parts / "p3.tsv", str(parts / "p[01]*"), parts / "p3.tsv"]
    assert [p.name for p in expand_sources(given)] == ["p3.tsv", "p0.csv.gz", "p1.jsonl"]
    with pytest.raises(DriftError, match="No file matches"):
        expand_sources(str(parts / "*.xml"))


def test_parts_of_mixed_formats_slice_like_the_whole_file(corpus, tmp_path):
    whole = slice_archive(corpus["whole"], tmp_path / "whole", by="5y", quiet=True)
    parts = slice_archive(str(corpus["parts"] / "*"), tmp_path / "parts", by="5y", quiet=True)
    pd.testing.assert_frame_equal(whole, parts)
    for label in whole["label"]:
        assert filecmp.cmp(tmp_path / "whole" / "slices" / f"{label}.txt",
                           tmp_path / "parts" / "slices" / f"{label}.txt", shallow=False)
    pd.testing.assert_frame_equal(read_counts(tmp_path / "whole"), read_counts(tmp_path / "parts"))
    # the folder of parts reads the same
    slice_archive(corpus["parts"], tmp_path / "folder", by="5y", quiet=True)
    pd.testing.assert_frame_equal(read_summary(tmp_path / "folder"), whole)


def test_document_index_numbers_rows_within_each_file(corpus, tmp_path):
    slice_archive(corpus["parts"], tmp_path / "run", by="5y", meta=["desk"], quiet=True)
    index = read_documents(tmp_path / "run")
    assert len(index) == len(lee_frame())
    first = index.groupby("source_file", sort=False).first()
    assert list(first.index) == ["p0.csv.gz", "p1.jsonl", "p2.parquet", "p3.tsv"]
    assert (first["source_row"] == 1).all()
    assert index["document"].iloc[0] == "p0.csv.gz:1"
    assert index["document"].is_unique
    sizes = index.groupby("source_file", sort=False).size().tolist()
    assert sizes == [80, 90, 70, len(lee_frame()) - 240]
    record = json.loads((tmp_path / "run" / "run.json").read_text())["stages"]["slice"]
    assert [Path(p).name for p in record["sources"]] == list(first.index)
    assert record["params"]["format"] == "csv+jsonl+parquet+tsv"
    # example passages are then quoted from the slice files, not the originals
    assert source_problem(tmp_path / "run") == "the run was sliced from several files"


def test_a_changed_part_makes_the_slices_stale(corpus, tmp_path):
    parts = tmp_path / "parts"
    write_parts(lee_frame(), parts)
    slice_archive(parts, tmp_path / "run", by="5y", quiet=True)
    again = slice_archive(parts, tmp_path / "run", by="5y", quiet=True)
    assert again.attrs["reused"]
    lee_frame().iloc[240:250].to_csv(parts / "p3.tsv", index=False, sep="\t")
    redone = slice_archive(parts, tmp_path / "run", by="5y", quiet=True)
    assert not redone.attrs["reused"]
    assert redone["documents"].sum() == 250


def test_glob_that_matches_nothing_exits_2(corpus, tmp_path, capsys):
    code, err = run_cli([str(corpus["parts"] / "*.csv.bz2"), "--out", tmp_path / "r"], capsys)
    assert code == 2
    assert_one_sentence(err, "No file matches", "*.csv.bz2")


def test_mixed_formats_with_other_column_names_exit_2(corpus, tmp_path, capsys):
    folder = tmp_path / "mixed"
    folder.mkdir()
    frame = lee_frame().head(40)
    frame.to_csv(folder / "a.csv", index=False)
    with (folder / "b.jsonl").open("w", encoding="utf-8") as handle:
        for record in frame.rename(columns={"date": "year", "text": "body"}).to_dict("records"):
            handle.write(json.dumps(record) + "\n")
    code, err = run_cli([folder / "a.csv", folder / "b.jsonl", "--out", tmp_path / "r"], capsys)
    assert code == 2
    assert_one_sentence(err, "b.jsonl", "'year'", "'body'", "a.csv", "'date'", "'text'")


def test_a_file_that_fails_is_named(corpus, tmp_path, capsys):
    folder = tmp_path / "broken"
    write_parts(lee_frame(), folder)
    data = gzip.compress(b"date,text\n" + b"1990,some words here\n" * 5000)
    (folder / "p4.csv.gz").write_bytes(data[: len(data) // 2])  # truncated
    code, err = run_cli([folder, "--out", tmp_path / "r"], capsys)
    assert code == 2
    assert_one_sentence(err, "p4.csv.gz", "truncated")
    code, err = run_cli([folder / "p0.csv.gz", folder / "p1.jsonl", "--id-col", "ident",
                         "--out", tmp_path / "r2"], capsys)
    assert code == 2
    assert_one_sentence(err, "p0.csv.gz", "ident")


def test_cli_takes_several_sources_and_a_balance_number(corpus, tmp_path, capsys):
    parts = sorted(corpus["parts"].iterdir())
    code, _ = run_cli([*parts, "--out", tmp_path / "r", "--by", "5y", "--balance", "3000", "-q"],
                      capsys)
    assert code == 0
    summary = read_summary(tmp_path / "r")
    assert (summary["tokens"] <= 3000).all() and len(summary) == 2


def test_text_folders_stay_single(corpus, tmp_path):
    texts = tmp_path / "texts"
    texts.mkdir()
    (texts / "letter_1990.txt").write_text("a few words", encoding="utf-8")
    with pytest.raises(DriftError, match="folder of .txt files"):
        open_sources([texts, corpus["whole"]])
    reader, paths = open_sources([corpus["whole"]])
    assert not isinstance(reader, MultiReader) and paths == [corpus["whole"]]


def test_a_pattern_beside_the_run_folder_skips_it(corpus, tmp_path):
    folder = tmp_path / "data"
    write_parts(lee_frame(), folder)
    first = slice_archive(str(folder / "*"), folder / "run", by="5y", quiet=True)
    again = slice_archive(str(folder / "*"), folder / "run", by="5y", quiet=True)
    assert again.attrs["reused"]
    pd.testing.assert_frame_equal(first, again)


def test_scheduler_needs_the_dask_engine(corpus, tmp_path):
    with pytest.raises(DriftError, match="--scheduler only applies with --engine dask"):
        slice_archive(corpus["whole"], tmp_path / "run", scheduler="tcp://127.0.0.1:8786",
                      quiet=True)
