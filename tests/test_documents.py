"""The document index, --where, --balance-by and the composition of each slice."""

from __future__ import annotations

import datetime as dt
import gzip
from pathlib import Path

import gensim
import numpy as np
import pandas as pd
import pytest

from drift.errors import DriftError
from drift.ingest import documents
from drift.ingest.slicing import slice_archive
from drift.ingest.tokenize import tokenize_lines

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"
LEE = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
SOURCES = ("gazette", "letter", "minutes")


def records() -> pd.DataFrame:
    """gensim's real lee_background.cor documents with dates, ids and a source column; every
    fifth document holds two lines, so documents span several slice-file lines."""
    rows = []
    for i, text in enumerate(LEE):
        date = dt.date(1990 + (i * 7) % 12, 1 + (i * 5) % 12, 1 + (i * 3) % 28)
        body = text if i % 5 else f"{text}\n{LEE[(i + 1) % len(LEE)]}"
        rows.append({"id": f"d{i:03d}", "date": date.isoformat(),
                     "source": SOURCES[(i // 7) % 3], "text": body})
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def source_csv(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("docs") / "lee.csv"
    records().to_csv(path, index=False)
    return path


def slice_lines(run: Path, label: str) -> list[str]:
    return (run / "slices" / f"{label}.txt").read_text(encoding="utf-8").splitlines()


def check_index_points_at_the_text(run: Path, frame: pd.DataFrame, balanced: bool = False):
    """Every document's lines in its slice file are its own tokenized lines (all of them, or
    some of them when balanced), and its source row is its row in the source."""
    index = documents.read_documents(run)
    files = {label: slice_lines(run, label) for label in index["slice"].unique()}
    for row in index.itertuples():
        original = frame.iloc[row.source_row - 1]
        expected = [" ".join(t) for t in tokenize_lines(original["text"])]
        got = files[row.slice][row.line - 1 : row.line - 1 + row.lines] if row.lines else []
        if balanced:
            assert set(got) <= set(expected)
        else:
            assert got == expected, row.document
        assert row.tokens == sum(len(line.split()) for line in got)
    total = sum(len(lines) for lines in files.values())
    assert index["lines"].sum() == total
    return index


@pytest.mark.parametrize("by", ["year", "3y", "even:3"])
def test_index_lines_are_the_documents_own_lines(source_csv, tmp_path, by):
    run = tmp_path / "run"
    slice_archive(source_csv, run, by=by, id_col="id", meta="source", quiet=True)
    index = check_index_points_at_the_text(run, records())
    assert list(index.columns) == ["document", "date", "source", "slice", "source_row",
                                   "source_file", "line", "lines", "tokens"]
    frame = records()
    assert index["document"].tolist() == frame["id"].tolist()
    assert index["date"].tolist() == frame["date"].tolist()  # as written
    csv = pd.read_csv(run / "documents.csv", dtype=str)
    assert csv["document"].tolist() == index["document"].tolist()


def test_balanced_index_counts_only_kept_lines(source_csv, tmp_path):
    run = tmp_path / "run"
    summary = slice_archive(source_csv, run, by="3y", balance="smallest", quiet=True)
    index = check_index_points_at_the_text(run, records(), balanced=True)
    by_slice = index.groupby("slice")["tokens"].sum()
    assert by_slice.to_dict() == dict(zip(summary["label"], summary["tokens"], strict=True))


def test_balance_by_keeps_the_same_mix_in_every_slice(source_csv, tmp_path):
    run = tmp_path / "run"
    slice_archive(source_csv, run, by="3y", balance_by="source", quiet=True)
    check_index_points_at_the_text(run, records(), balanced=True)
    composition = documents.read_composition(run)
    tokens = composition.pivot_table(index="value", columns="slice", values="tokens")
    # lines are kept while they fit, so each value's tokens per slice are within one line of
    # its budget (the smallest slice's tokens of that value)
    longest_line = max(len(line.split()) for text in LEE for line in [text])
    assert (tokens.max(axis=1) - tokens.min(axis=1) <= longest_line).all()
    shares = composition.pivot_table(index="value", columns="slice", values="share")
    assert (shares.max(axis=1) - shares.min(axis=1)).max() < 0.1


def test_without_id_column_the_source_row_is_the_id(source_csv, tmp_path):
    run = tmp_path / "run"
    slice_archive(source_csv, run, by="3y", quiet=True)
    index = documents.read_documents(run)
    assert index["document"].tolist() == [str(r) for r in range(1, len(LEE) + 1)]
    assert (index["source_file"] == "lee.csv").all()


def test_jsonl_and_text_folder_sources(tmp_path):
    frame = records().head(60)
    jsonl = tmp_path / "lee.jsonl.gz"
    with gzip.open(jsonl, "wt", encoding="utf-8") as handle:
        handle.write(frame.to_json(orient="records", lines=True))
    run = tmp_path / "run-jsonl"
    slice_archive(jsonl, run, by="3y", id_col="id", meta=["source"], quiet=True)
    check_index_points_at_the_text(run, frame)

    folder = tmp_path / "letters"
    folder.mkdir()
    for row in frame.itertuples():
        (folder / f"{row.date}_{row.id}.txt").write_text(row.text, encoding="utf-8")
    run = tmp_path / "run-txt"
    slice_archive(folder, run, by="3y", quiet=True)
    index = documents.read_documents(run)
    names = sorted(f"{r.date}_{r.id}.txt" for r in frame.itertuples())
    assert index["document"].tolist() == names
    assert index["source_file"].tolist() == names
    assert index["source_row"].tolist() == list(range(1, len(names) + 1))


def test_duplicate_ids_are_made_unique_with_a_warning(tmp_path):
    frame = records().head(30)
    frame.loc[[3, 7, 9], "id"] = "d000"
    path = tmp_path / "dup.csv"
    frame.to_csv(path, index=False)
    summary = slice_archive(path, tmp_path / "run", by="3y", id_col="id", quiet=True)
    index = documents.read_documents(tmp_path / "run")
    assert index["document"].is_unique
    assert index["document"].iloc[[0, 3, 7, 9]].tolist() == ["d000", "d000~2", "d000~3", "d000~4"]
    warning = [w for w in summary.attrs["warnings"] if "repeat an id" in w]
    assert warning and warning[0].startswith("3 documents") and "'d000'" in warning[0]


@pytest.mark.parametrize("option", ["id_col", "meta", "balance_by"])
def test_missing_column_lists_the_columns(source_csv, tmp_path, option):
    with pytest.raises(DriftError, match=r"no column 'author'.*id, date, source, text"):
        slice_archive(source_csv, tmp_path / "run", by="3y", **{option: "author"}, quiet=True)


def test_where_keeps_part_of_the_archive(source_csv, tmp_path):
    frame = records()
    run = tmp_path / "run"
    summary = slice_archive(source_csv, run, by="3y", meta="source",
                            where=["source!=letter"], quiet=True)
    index = documents.read_documents(run)
    assert set(index["source"]) == {"gazette", "minutes"}
    assert len(index) == (frame["source"] != "letter").sum()
    assert summary.attrs["totals"]["left_out_by_where"] == (frame["source"] == "letter").sum()
    run2 = tmp_path / "run2"
    slice_archive(source_csv, run2, by="3y", where=["source=letter,minutes", "id!=d001"],
                  quiet=True)
    kept = documents.read_documents(run2)
    wanted = frame[frame["source"].isin(["letter", "minutes"]) & (frame["id"] != "d001")]
    assert kept["source_row"].tolist() == [i + 1 for i in wanted.index]


def test_where_that_keeps_nothing_counts_each_value(source_csv, tmp_path):
    counts = records()["source"].value_counts()
    with pytest.raises(DriftError) as caught:
        slice_archive(source_csv, tmp_path / "run", by="3y", where="source=Gazette", quiet=True)
    message = str(caught.value)
    assert "keeps no document" in message
    for value, n in counts.items():
        assert f"{value}: {n:,}" in message


@pytest.mark.parametrize("spec", ["source", "=x", "source=", "source!="])
def test_bad_where_is_explained(spec):
    with pytest.raises(DriftError, match="column=value"):
        documents.parse_where([spec])


def test_total_variation_distance_by_hand():
    # two mixes by hand: (0.5, 0.3, 0.2) and (0.2, 0.3, 0.5): TVD = (0.3 + 0 + 0.3) / 2 = 0.3
    p = pd.Series({"a": 50, "b": 30, "c": 20})
    q = pd.Series({"a": 20, "b": 30, "c": 50})
    assert documents.total_variation(p, q) == pytest.approx(0.3)
    assert documents.total_variation(p, p) == 0
    assert documents.total_variation(pd.Series({"a": 1}), pd.Series({"b": 1})) == 1


def test_composition_warns_when_the_mix_changes(tmp_path):
    frame = records()
    early = frame["date"] < "1996"
    # the later years lose nearly all letters: the mix changes strongly
    frame = frame[early | (frame["source"] != "letter") | (frame.index % 10 == 0)]
    path = tmp_path / "mix.csv"
    frame.to_csv(path, index=False)
    summary = slice_archive(path, tmp_path / "run", by="edges:1990,1996,2002", meta="source",
                            quiet=True)
    composition = documents.read_composition(tmp_path / "run")
    shifts, warnings = documents.composition_shifts(composition, [("1990-1995", "1996-2001")])
    assert shifts["distance"].iloc[0] > documents.MIX_SHIFT_WARNING
    assert warnings and "letter" in warnings[0]
    assert any("mix of 'source'" in w for w in summary.attrs["warnings"])
    table, _, run_warnings = documents.composition(tmp_path / "run")
    assert np.allclose(table.groupby("slice")["share"].sum(), 1)
    assert run_warnings == warnings
