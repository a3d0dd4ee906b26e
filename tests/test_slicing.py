"""The slice stage: every --by form, balancing, the run-folder contract, reuse and bad input."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
from collections import Counter
from pathlib import Path

import gensim
import numpy as np
import pandas as pd
import pytest
from gensim.models.word2vec import LineSentence

import drift.ingest.readers as readers
import drift.ingest.slicing as slicing
from drift import runfolder
from drift.errors import DriftError
from drift.ingest.slicing import (
    even_bins,
    label_for_range,
    parse_balance,
    parse_by,
    read_counts,
    read_summary,
    slice_archive,
    slice_labels,
    slice_warnings,
)
from drift.ingest.timeparse import iso_to_day
from drift.ingest.tokenize import MAX_LINE_TOKENS, tokenize

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"
LEE = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()


def lee_records() -> pd.DataFrame:
    """The real news documents of gensim's lee_background.cor, given dates from 1990 to 2009."""
    dates = [
        dt.date(1990 + (i * 7) % 20, 1 + (i * 5) % 12, 1 + (i * 3) % 28) for i in range(len(LEE))
    ]
    return pd.DataFrame(
        {"id": range(len(LEE)), "date": [d.isoformat() for d in dates], "text": LEE}
    )


@pytest.fixture(scope="module")
def lee_csv(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("source") / "lee.csv"
    lee_records().to_csv(path, index=False)
    return path


def expected_counts(frame: pd.DataFrame, slice_of) -> dict[str, Counter]:
    """Reference counts: tokenize() of every document, summed per slice label."""
    result: dict[str, Counter] = {}
    for date, text in zip(frame["date"], frame["text"], strict=False):
        label = slice_of(dt.date.fromisoformat(date))
        if label is not None:
            result.setdefault(label, Counter()).update(tokenize(text))
    return result


def counts_as_counters(run: Path) -> dict[str, Counter]:
    counts = read_counts(run)
    return {
        label: Counter({w: int(n) for w, n in counts[label].items() if n})
        for label in counts.columns
    }


def slice_file_counts(run: Path, label: str) -> Counter:
    text = (run / "slices" / f"{label}.txt").read_text(encoding="utf-8")
    return Counter(text.split())


# ---------------------------------------------------------------------------- rules and labels


def test_parse_by():
    assert parse_by("year") == slicing.SliceRule("years", 1)
    assert parse_by("Decade") == slicing.SliceRule("years", 10, decade=True)
    assert parse_by("5y") == slicing.SliceRule("years", 5)
    assert parse_by("edges:1990,2000-06-01").edges == (iso_to_day("1990"), iso_to_day("2000-06-01"))
    assert parse_by("even:4") == slicing.SliceRule("even", count=4)
    for bad, message in [
        ("month", "Unknown --by"),
        ("0y", "Unknown --by"),
        ("edges:1990", "at least two edges"),
        ("edges:2000,1990", "must increase"),
        ("edges:1990,soon", "not a year or an ISO date"),
        ("even:x", "whole number"),
        ("even:0", "whole number"),
    ]:
        with pytest.raises(DriftError, match=message):
            parse_by(bad)


def test_parse_balance():
    assert parse_balance(None) is None
    assert parse_balance("smallest") == "smallest" and parse_balance(True) == "smallest"
    assert (
        parse_balance("1_000_000") == 1_000_000
        and parse_balance(5000) == 5000
        and parse_balance("2e6") == 2_000_000
    )
    for bad in ("-5", "0", "lots"):
        with pytest.raises(DriftError, match="not a token count"):
            parse_balance(bad)


def test_labels():
    assert label_for_range(iso_to_day("1990"), iso_to_day("1990-12-31")) == "1990"
    assert label_for_range(iso_to_day("1990"), iso_to_day("1994-12-31")) == "1990-1994"
    assert (
        label_for_range(iso_to_day("1990-03-01"), iso_to_day("1994-12-31"))
        == "1990-03-01_1994-12-31"
    )
    assert slicing.bin_for_key(parse_by("decade"), 199).label == "1990s"
    assert slicing.bin_for_key(parse_by("5y"), 1990 // 5).label == "1990-1994"
    assert slicing.bin_for_key(parse_by("year"), 850).label == "0850"


def test_even_bins_cut_at_the_coarsest_unit():
    years = np.array([iso_to_day(str(y)) for y in range(2000, 2010)])
    bins = even_bins(years, np.full(10, 100), 2)
    assert [b.label for b in bins] == ["2000-2004", "2005-2009"]
    days = np.array([iso_to_day("2000-01-05"), iso_to_day("2000-01-09"), iso_to_day("2000-03-01")])
    bins = even_bins(days, np.array([10, 10, 20]), 2)
    assert [b.label for b in bins] == ["2000-01-05_2000-02-29", "2000-03-01_2000-03-01"]
    with pytest.raises(DriftError, match="even:5 needs at least 5 distinct years"):
        even_bins(years[:3], np.ones(3), 5)


# ---------------------------------------------------------------------------- every --by form


def year_label(date: dt.date) -> str:
    return str(date.year)


@pytest.mark.parametrize(
    "by, slice_of",
    [
        ("year", year_label),
        ("decade", lambda d: f"{d.year // 10 * 10}s"),
        ("5y", lambda d: f"{d.year // 5 * 5}-{d.year // 5 * 5 + 4}"),
        (
            "edges:1992,1995-07-01,2005",
            lambda d: (
                None
                if d < dt.date(1992, 1, 1) or d >= dt.date(2005, 1, 1)
                else "1992-01-01_1995-06-30"
                if d < dt.date(1995, 7, 1)
                else "1995-07-01_2004-12-31"
            ),
        ),
    ],
)
def test_every_fixed_slicing_counts_what_the_documents_hold(lee_csv, tmp_path, by, slice_of):
    frame = lee_records()
    run = tmp_path / "run"
    summary = slice_archive(lee_csv, run, by=by, quiet=True)
    expected = expected_counts(frame, slice_of)
    assert summary["label"].tolist() == sorted(expected)
    assert counts_as_counters(run) == expected
    for label in expected:
        assert slice_file_counts(run, label) == expected[label]
    row = summary.set_index("label")
    for label, counter in expected.items():
        assert row.loc[label, "tokens"] == sum(counter.values())
        assert row.loc[label, "types"] == len(counter)
    assert summary["documents"].sum() == sum(
        1 for d in frame["date"] if slice_of(dt.date.fromisoformat(d))
    )
    if by.startswith("edges"):
        assert summary.attrs["totals"]["outside_edges"] == sum(
            1 for d in frame["date"] if slice_of(dt.date.fromisoformat(d)) is None
        )


def test_even_slices_hold_about_equal_token_counts(lee_csv, tmp_path):
    frame = lee_records()
    summary = slice_archive(lee_csv, tmp_path / "run", by="even:4", quiet=True)
    assert len(summary) == 4
    tokens_per_day = Counter()
    for date, text in zip(frame["date"], frame["text"], strict=False):
        tokens_per_day[date] += len(tokenize(text))
    total = sum(tokens_per_day.values())
    assert summary["tokens"].sum() == total
    # each slice is within the largest day's tokens of an equal share
    assert (abs(summary["tokens"] - total / 4) <= max(tokens_per_day.values())).all()
    starts = pd.to_datetime(summary["start"])
    ends = pd.to_datetime(summary["end"])
    assert (starts.iloc[1:].to_numpy() == (ends.iloc[:-1] + pd.Timedelta(days=1)).to_numpy()).all()
    assert summary["start"].iloc[0] == min(frame["date"]) and summary["end"].iloc[-1] == max(
        frame["date"]
    )
    labels = summary["label"].tolist()

    def slice_of(date: dt.date):
        for label, start, end in zip(labels, summary["start"], summary["end"], strict=False):
            if start <= date.isoformat() <= end:
                return label

    assert counts_as_counters(tmp_path / "run") == expected_counts(frame, slice_of)


def test_run_folder_contract(lee_csv, tmp_path):
    run = tmp_path / "run"
    summary = slice_archive(lee_csv, run, by="decade", quiet=True)
    on_disk = pd.read_csv(run / "slices" / "summary.csv", dtype={"label": str})
    assert list(on_disk.columns) == [
        "label",
        "start",
        "end",
        "documents",
        "tokens",
        "types",
        "dropped",
    ]
    pd.testing.assert_frame_equal(on_disk, read_summary(run))
    assert summary["label"].tolist() == ["1990s", "2000s"]
    assert summary[["start", "end"]].values.tolist() == [
        ["1990-01-01", "1999-12-31"],
        ["2000-01-01", "2009-12-31"],
    ]
    counts = pd.read_parquet(run / "counts.parquet")
    assert list(counts.columns) == ["word", "1990s", "2000s"]
    assert all(str(t) == "int64" for t in counts.dtypes.iloc[1:])
    totals = counts[["1990s", "2000s"]].sum(axis=1).to_numpy()
    assert (np.diff(totals) <= 0).all()
    manifest = json.loads((run / "run.json").read_text())
    stage = manifest["stages"]["slice"]
    assert stage["labels"] == ["1990s", "2000s"] == slice_labels(run)
    assert stage["params"]["by"] == "decade" and stage["params"]["text_col"] == "text"
    assert stage["inputs"] == runfolder.fingerprint_path(lee_csv)
    assert set(stage["timings"]) >= {"read", "write", "total"}
    for label in summary["label"]:
        for line in (run / "slices" / f"{label}.txt").read_text(encoding="utf-8").splitlines():
            tokens = line.split(" ")
            assert 0 < len(tokens) <= MAX_LINE_TOKENS and all(tokens)
    assert not list((run / "slices").glob(".*"))  # no work files left behind
    assert not (run / ".lock").exists()


def test_long_documents_are_cut_into_lines(tmp_path):
    path = tmp_path / "long.csv"
    long_text = " ".join(LEE)  # about 60,000 tokens in one document
    pd.DataFrame({"year": [2001], "text": [long_text]}).to_csv(path, index=False)
    slice_archive(path, tmp_path / "run", quiet=True)
    lines = (tmp_path / "run" / "slices" / "2001.txt").read_text(encoding="utf-8").splitlines()
    assert len(lines) > 1 and all(len(line.split()) <= MAX_LINE_TOKENS for line in lines)
    assert sum(len(line.split()) for line in lines) == len(tokenize(long_text))


def test_pretokenized_counts_match_gensim_line_sentence(tmp_path):
    # Reference: gensim's LineSentence over its bundled head500.noblanks.cor (real, pre-tokenized).
    corpus = GENSIM_DATA / "head500.noblanks.cor"
    lines = corpus.read_text(encoding="utf-8").splitlines()
    path = tmp_path / "head500.tsv"
    pd.DataFrame({"year": [2000 + i % 3 for i in range(len(lines))], "text": lines}).to_csv(
        path, sep="\t", index=False
    )
    slice_archive(path, tmp_path / "run", pretokenized=True, keep_case=True, quiet=True)
    expected: dict[str, Counter] = {}
    for i, sentence in enumerate(LineSentence(str(corpus))):
        expected.setdefault(str(2000 + i % 3), Counter()).update(sentence)
    assert counts_as_counters(tmp_path / "run") == expected


# ---------------------------------------------------------------------------- balancing


def test_balance_to_the_smallest_slice(lee_csv, tmp_path):
    plain = slice_archive(lee_csv, tmp_path / "plain", by="5y", quiet=True)
    run = tmp_path / "balanced"
    summary = slice_archive(lee_csv, run, by="5y", balance="smallest", seed=3, quiet=True)
    smallest = plain["tokens"].min()
    longest_line = max(len(tokenize(t)) for t in LEE)
    assert (summary["tokens"] <= smallest).all()
    assert (summary["tokens"] >= smallest - longest_line).all()
    assert (summary["dropped"] == plain["tokens"] - summary["tokens"]).all()
    assert (summary["documents"] <= plain["documents"]).all()
    for label in summary["label"]:
        assert slice_file_counts(run, label) == counts_as_counters(run)[label]
        assert (
            sum(slice_file_counts(run, label).values())
            == summary.set_index("label").loc[label, "tokens"]
        )
    slice_archive(lee_csv, tmp_path / "again", by="5y", balance="smallest", seed=3, quiet=True)
    slice_archive(lee_csv, tmp_path / "other", by="5y", balance="smallest", seed=4, quiet=True)
    label = summary.loc[summary["dropped"].idxmax(), "label"]
    text = (run / "slices" / f"{label}.txt").read_text()
    assert (tmp_path / "again" / "slices" / f"{label}.txt").read_text() == text
    assert (tmp_path / "other" / "slices" / f"{label}.txt").read_text() != text


def test_balance_to_a_token_budget_and_too_large_a_budget(lee_csv, tmp_path):
    summary = slice_archive(lee_csv, tmp_path / "run", by="decade", balance=20_000, quiet=True)
    assert (summary["tokens"] <= 20_000).all() and (summary["tokens"] > 19_000).all()
    with pytest.raises(DriftError, match="asks for more tokens than slice"):
        slice_archive(lee_csv, tmp_path / "big", by="decade", balance=10**9, quiet=True)


def test_balance_with_even_slices(lee_csv, tmp_path):
    summary = slice_archive(lee_csv, tmp_path / "run", by="even:3", balance="smallest", quiet=True)
    assert summary["tokens"].max() - summary["tokens"].min() <= max(len(tokenize(t)) for t in LEE)


# ---------------------------------------------------------------------------- reuse, lock, folder


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_rerun_reuses_and_changed_parameters_recompute(lee_csv, tmp_path):
    run = tmp_path / "run"
    before = digest(lee_csv), lee_csv.stat().st_mtime_ns
    first = slice_archive(lee_csv, run, by="decade", quiet=True)
    assert first.attrs["reused"] is False
    stamp = (run / "slices" / "1990s.txt").stat().st_mtime_ns
    second = slice_archive(lee_csv, run, by="decade", quiet=True)
    assert second.attrs["reused"] is True
    pd.testing.assert_frame_equal(first, second, check_dtype=False)
    assert (run / "slices" / "1990s.txt").stat().st_mtime_ns == stamp
    third = slice_archive(lee_csv, run, by="5y", quiet=True)
    assert third.attrs["reused"] is False
    assert sorted(p.stem for p in (run / "slices").glob("*.txt")) == sorted(
        third["label"]
    )  # stale slices removed
    assert (digest(lee_csv), lee_csv.stat().st_mtime_ns) == before  # the input is never modified


def test_a_held_run_folder_is_refused(lee_csv, tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    (run / ".lock").write_text(str(os.getppid()))  # a live process that is not this one
    with pytest.raises(DriftError, match="in use by another drift process"):
        slice_archive(lee_csv, run, quiet=True)


def test_out_is_a_file_or_a_run_from_another_version(lee_csv, tmp_path):
    target = tmp_path / "file.txt"
    target.write_text("x")
    with pytest.raises(DriftError, match="is a file, not a folder"):
        slice_archive(lee_csv, target, quiet=True)
    old = tmp_path / "old"
    old.mkdir()
    (old / "run.json").write_text(json.dumps({"format_version": 0, "stages": {}}))
    with pytest.raises(DriftError, match="made by another version of drift"):
        slice_archive(lee_csv, old, quiet=True)


def test_failed_run_keeps_the_previous_slices(lee_csv, tmp_path):
    run = tmp_path / "run"
    slice_archive(lee_csv, run, by="decade", quiet=True)
    before = digest(run / "slices" / "1990s.txt")
    with pytest.raises(DriftError, match="hold no documents"):
        slice_archive(lee_csv, run, by="edges:1980,1985,2010", quiet=True)
    assert digest(run / "slices" / "1990s.txt") == before
    assert not list((run / "slices").glob(".*"))


def test_threads_do_not_change_the_result(lee_csv, tmp_path, monkeypatch):
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 14)  # many small batches
    slice_archive(lee_csv, tmp_path / "two", by="5y", quiet=True)
    monkeypatch.setattr(slicing, "WORKERS", 1)
    original = slicing._ordered_map
    monkeypatch.setattr(
        slicing, "_ordered_map", lambda fn, items, workers=1: original(fn, items, 1)
    )
    slice_archive(lee_csv, tmp_path / "one", by="5y", quiet=True)
    for name in ["slices/1990-1994.txt", "slices/2005-2009.txt", "slices/summary.csv"]:
        assert digest(tmp_path / "two" / name) == digest(tmp_path / "one" / name)
    pd.testing.assert_frame_equal(read_counts(tmp_path / "two"), read_counts(tmp_path / "one"))


# ---------------------------------------------------------------------------- dates and bad input


def write_csv(path: Path, dates, texts) -> Path:
    pd.DataFrame({"date": dates, "text": texts}).to_csv(path, index=False)
    return path


def test_bad_dates_are_an_error_with_count_and_examples(tmp_path):
    path = write_csv(
        tmp_path / "d.csv", ["1990", "soon", "1991", "31/12/1990", "", "1992"], ["a b"] * 6
    )
    with pytest.raises(
        DriftError,
        match=r"3 of 6 values in the time column 'date' are not dates "
        r"\(e.g. 'soon', '31/12/1990', \(empty\)\)",
    ):
        slice_archive(path, tmp_path / "run", quiet=True)
    summary = slice_archive(path, tmp_path / "run", skip_bad_dates=True, quiet=True)
    assert summary.attrs["totals"]["bad_dates_skipped"] == 3
    assert any("3 documents whose date does not parse" in w for w in summary.attrs["warnings"])
    assert summary["label"].tolist() == ["1990", "1991", "1992"]


def test_date_format_option(tmp_path):
    path = write_csv(tmp_path / "d.csv", ["01/03/1990", "31/12/1991"], ["a", "b"])
    summary = slice_archive(path, tmp_path / "run", date_format="%d/%m/%Y", quiet=True)
    assert summary["label"].tolist() == ["1990", "1991"]


def test_a_column_that_holds_no_dates_fails_at_once(tmp_path, monkeypatch):
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 12)
    path = tmp_path / "swapped.csv"
    pd.DataFrame({"date": ["some words here"] * 2000, "text": ["1990"] * 2000}).to_csv(
        path, index=False
    )
    with pytest.raises(
        DriftError,
        match=r"None of the first [\d,]+ values in the time column 'date' is a date",
    ):
        slice_archive(path, tmp_path / "run", quiet=True)
    with pytest.raises(
        DriftError, match="None of the 2,000 values .* so --skip-bad-dates would leave nothing"
    ):
        slice_archive(path, tmp_path / "run", skip_bad_dates=True, quiet=True)


def test_empty_input_cases(tmp_path):
    header = tmp_path / "header.csv"
    header.write_text("date,text\n")
    with pytest.raises(DriftError, match="has no documents \\(only a header row\\)"):
        slice_archive(header, tmp_path / "r1", quiet=True)
    blank = write_csv(tmp_path / "blank.csv", ["1990", "1991"], ["", "?!"])
    with pytest.raises(DriftError, match="has 2 documents but no words in them"):
        slice_archive(blank, tmp_path / "r2", quiet=True)
    assert not (tmp_path / "r1" / "slices" / "summary.csv").exists()


def test_undecodable_bytes_are_counted_in_the_run(tmp_path):
    path = tmp_path / "bytes.csv"  # UTF-8 (the first e-acute) with one stray Latin-1 byte
    path.write_bytes(b"date,text\n1990,caf\xc3\xa9 ok\n1991,caf\xe9 fine\n")
    summary = slice_archive(path, tmp_path / "run", quiet=True)
    assert summary.attrs["totals"]["replaced_characters"] == 1
    assert any("1 undecodable byte sequence in" in w for w in summary.attrs["warnings"])
    assert counts_as_counters(tmp_path / "run")["1991"] == Counter({"caf": 1, "fine": 1})


def test_a_latin1_archive_keeps_its_words_whole(tmp_path):
    path = tmp_path / "bytes.csv"
    path.write_bytes(b"date,text\n1990,caf\xe9 \xe9tait ok\n1991,fine\n")
    summary = slice_archive(path, tmp_path / "run", quiet=True)
    assert summary.attrs["totals"]["replaced_characters"] == 0
    assert summary.attrs["totals"]["legacy_characters"] == 2
    assert any("read as cp1252" in w for w in summary.attrs["warnings"])
    assert counts_as_counters(tmp_path / "run")["1990"] == Counter({"café": 1, "était": 1, "ok": 1})


def test_every_source_format_gives_the_same_slices(tmp_path):
    frame = lee_records().head(60)
    paths = {
        "csv": tmp_path / "a.csv.gz",
        "tsv": tmp_path / "a.tsv.bz2",
        "jsonl": tmp_path / "a.jsonl.xz",
        "parquet": tmp_path / "a.parquet",
    }
    frame.to_csv(paths["csv"], index=False)
    frame.to_csv(paths["tsv"], sep="\t", index=False)
    frame.to_json(paths["jsonl"], orient="records", lines=True)
    frame.to_parquet(paths["parquet"])
    folder = tmp_path / "folder"
    for i, (date, text) in enumerate(zip(frame["date"], frame["text"], strict=False)):
        (folder / date[:4]).mkdir(parents=True, exist_ok=True)
        (folder / date[:4] / f"{date}_{i}.txt").write_text(text, encoding="utf-8")
    paths["txt"] = folder
    results = {}
    for fmt, path in paths.items():
        results[fmt] = slice_archive(path, tmp_path / f"run-{fmt}", by="decade", quiet=True)
        assert results[fmt].attrs["totals"]["documents_read"] == 60
    for fmt in paths:
        pd.testing.assert_frame_equal(results[fmt], results["csv"], check_dtype=False)
        pd.testing.assert_frame_equal(
            read_counts(tmp_path / f"run-{fmt}"), read_counts(tmp_path / "run-csv")
        )


def test_size_warnings():
    summary = pd.DataFrame({"label": ["a", "b"], "tokens": [100, 5_000_000]})
    messages = slice_warnings(summary)
    assert "slice a has under a million tokens" in messages[0]
    assert "differ more than tenfold" in messages[1] and "--balance" in messages[1]
    assert (
        slice_warnings(pd.DataFrame({"label": ["a", "b"], "tokens": [2_000_000, 3_000_000]})) == []
    )


def test_text_files_without_dates(tmp_path):
    folder = tmp_path / "notes"
    folder.mkdir()
    (folder / "1990-05-01.txt").write_text("dated note", encoding="utf-8")
    (folder / "misc.txt").write_text("undated note", encoding="utf-8")
    with pytest.raises(DriftError, match=r"1 of 2 text files have no date that parses .*misc.txt"):
        slice_archive(folder, tmp_path / "run", quiet=True)
    summary = slice_archive(folder, tmp_path / "run", skip_bad_dates=True, quiet=True)
    assert summary["label"].tolist() == ["1990"]


def test_run_folder_inside_a_source_folder_is_refused(tmp_path):
    folder = tmp_path / "notes"
    folder.mkdir()
    (folder / "1990.txt").write_text("a note", encoding="utf-8")
    with pytest.raises(DriftError, match="inside the source folder"):
        slice_archive(folder, folder / "run", quiet=True)


def test_many_slices_with_few_open_files(tmp_path, monkeypatch):
    monkeypatch.setattr(slicing, "_MAX_OPEN_FILES", 3)
    monkeypatch.setattr(readers, "BATCH_BYTES", 1 << 12)
    frame = pd.DataFrame(
        {
            "year": [1900 + i % 40 for i in range(800)],
            "text": [f"w{i % 7} x{i % 40}" for i in range(800)],
        }
    )
    path = tmp_path / "years.csv"
    frame.to_csv(path, index=False)
    summary = slice_archive(path, tmp_path / "run", quiet=True)
    assert len(summary) == 40 and (summary["documents"] == 20).all()
    for label in ("1900", "1939"):
        assert slice_file_counts(tmp_path / "run", label) == Counter(
            token for text in frame["text"][frame["year"] == int(label)] for token in tokenize(text)
        )


def test_progress_bar_unless_quiet(lee_csv, tmp_path, monkeypatch, capsys):
    monkeypatch.setattr(slicing, "PROGRESS_MIN_BYTES", 0)
    slice_archive(lee_csv, tmp_path / "a", by="decade", quiet=False)
    assert "Reading lee.csv" in capsys.readouterr().err
    slice_archive(lee_csv, tmp_path / "b", by="decade", quiet=True)
    assert "Reading" not in capsys.readouterr().err


def test_lines_longer_than_a_read_block_survive_even_and_balance(tmp_path):
    long_words = " ".join(f"{i:04d}" + "x" * 2000 for i in range(2500))  # one 5 MB line
    texts = ["short text here"] * 20 + [long_words] + ["more short text"] * 20
    years = [2001] * 20 + [2002] + [2003] * 20
    path = tmp_path / "long.csv"
    pd.DataFrame({"year": years, "text": texts}).to_csv(path, index=False)
    summary = slice_archive(path, tmp_path / "run", by="even:2", balance="smallest", quiet=True)
    assert summary["tokens"].sum() > 0 and (summary["tokens"] <= summary["tokens"].min()).all()
    lines = [
        line
        for label in summary["label"]
        for line in (tmp_path / "run" / "slices" / f"{label}.txt").read_text().splitlines()
    ]
    assert all(len(line.split()) <= MAX_LINE_TOKENS for line in lines)


def test_lines_within_budget_is_greedy_in_random_order():
    lengths = np.array([5, 50, 3, 4, 40, 2])
    order = np.array([1, 0, 4, 2, 3, 5])
    # 50 does not fit in 12; 5 fits (7 left); 40 does not; 3 fits (4 left); 4 fits (0 left)
    assert sorted(slicing.lines_within_budget(lengths, order, 12).tolist()) == [0, 2, 3]
    assert slicing.lines_within_budget(lengths, order, 1).tolist() == []
    assert sorted(slicing.lines_within_budget(lengths, order, 10**6).tolist()) == list(range(6))
