"""`drift slice` end to end: the summary table, and exit code 2 with one sentence for bad input."""

from __future__ import annotations

import gzip
import json
import os
import subprocess
import sys
from pathlib import Path

import gensim
import pandas as pd
import pytest
from typer.testing import CliRunner

from drift.cli import main
from drift.cli.app import app
from drift.cli.cmd_slice import balance_and_sources
from drift.errors import DriftError

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"


@pytest.fixture(scope="module")
def source(tmp_path_factory) -> Path:
    """Real news text (gensim's lee_background.cor), one document per line, dated 1990 to 1999."""
    lines = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
    path = tmp_path_factory.mktemp("src") / "news.csv"
    pd.DataFrame(
        {"date": [f"{1990 + i % 10}-06-01" for i in range(len(lines))], "body": lines}
    ).to_csv(path, index=False)
    return path


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    with pytest.raises(SystemExit) as exit_info:
        main(["slice", *map(str, args)])
    captured = capsys.readouterr()
    return exit_info.value.code, captured.out, captured.err


def assert_bad_input(args, capsys, *fragments) -> str:
    code, out, err = run_cli(args, capsys)
    assert code == 2, err
    assert err.startswith("drift: ") and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    for fragment in fragments:
        assert fragment in err
    return err


def test_slice_prints_a_summary_table_and_reuses(source, tmp_path, capsys):
    run = tmp_path / "run"
    code, out, err = run_cli([source, "--out", run, "--by", "5y", "--quiet"], capsys)
    assert code == 0
    assert "1990-1994" in out and "1995-1999" in out and "tokens" in out
    assert "under a million tokens" in err  # the stage's warning (common practice threshold)
    assert (run / "slices" / "1990-1994.txt").exists() and (run / "counts.parquet").exists()
    code, out, err = run_cli([source, "--out", run, "--by", "5y"], capsys)
    assert code == 0 and "(reused)" in out and "reusing them" in err


def test_balance_with_and_without_a_number(source, tmp_path, capsys):
    code, out, _ = run_cli([source, "--out", tmp_path / "a", "--balance", "--quiet"], capsys)
    assert code == 0
    summary = pd.read_csv(tmp_path / "a" / "slices" / "summary.csv")
    assert summary["tokens"].max() <= summary["tokens"].min() + 2000
    code, _, _ = run_cli([source, "--out", tmp_path / "b", "--balance", "2000", "-q"], capsys)
    assert code == 0
    assert (pd.read_csv(tmp_path / "b" / "slices" / "summary.csv")["tokens"] <= 2000).all()
    code, _, _ = run_cli(["--balance", "2000", source, "--out", tmp_path / "c", "-q"], capsys)
    assert code == 0
    assert (
        json.loads((tmp_path / "c" / "run.json").read_text())["stages"]["slice"]["params"][
            "balance"
        ]
        == 2000
    )


def test_balance_and_sources():
    assert balance_and_sources(False, ["a.csv"]) == (None, ["a.csv"])
    assert balance_and_sources(False, ["a.csv", "b.csv"]) == (None, ["a.csv", "b.csv"])
    assert balance_and_sources(True, ["a.csv"]) == ("smallest", ["a.csv"])
    assert balance_and_sources(True, ["a.csv", "100"]) == ("100", ["a.csv"])
    assert balance_and_sources(True, ["100", "a.csv", "b.csv"]) == ("100", ["a.csv", "b.csv"])
    with pytest.raises(DriftError, match="number is taken only right after --balance"):
        balance_and_sources(False, ["a.csv", "100"])
    with pytest.raises(DriftError, match="one token budget"):
        balance_and_sources(True, ["a.csv", "100", "200"])


def test_missing_file(tmp_path, capsys):
    assert_bad_input(
        [tmp_path / "nothere.csv", "--out", tmp_path / "run"], capsys, "There is no file or folder"
    )


def test_unknown_format(tmp_path, capsys):
    path = tmp_path / "data.xlsx"
    path.write_text("x")
    assert_bad_input(
        [path, "--out", tmp_path / "run"], capsys, "Cannot tell the format", "--input-format"
    )
    assert_bad_input(
        [path, "--out", tmp_path / "run", "--input-format", "xls"],
        capsys,
        "Unknown --input-format 'xls'",
    )


def test_empty_file_and_header_only(tmp_path, capsys):
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    assert_bad_input([empty, "--out", tmp_path / "run"], capsys, "is empty")
    header = tmp_path / "header.csv"
    header.write_text("date,text\n")
    assert_bad_input(
        [header, "--out", tmp_path / "run"], capsys, "has no documents (only a header row)"
    )


def test_missing_or_misnamed_columns_list_the_columns(source, tmp_path, capsys):
    assert_bad_input(
        [source, "--out", tmp_path / "run", "--text-col", "txt"],
        capsys,
        "no column 'txt'",
        "date, body",
    )
    odd = tmp_path / "odd.csv"
    odd.write_text("when,what\n1990,hello\n")
    assert_bad_input(
        [odd, "--out", tmp_path / "run"],
        capsys,
        "Cannot tell which column",
        "--time-col",
        "when, what",
    )
    both = tmp_path / "both.csv"
    both.write_text("date,year,text\n1990-01-01,1990,hello\n")
    assert_bad_input(
        [both, "--out", tmp_path / "run"],
        capsys,
        "several columns could hold the time (date, year)",
    )


def test_dates_that_do_not_parse(tmp_path, capsys):
    path = tmp_path / "dates.csv"
    path.write_text("date,text\n1990,a\nlater,b\n03/04/1991,c\n1992,d\n")
    err = assert_bad_input(
        [path, "--out", tmp_path / "run"], capsys, "2 of 4 values", "'later', '03/04/1991'"
    )
    assert "--skip-bad-dates" in err and "--date-format" in err
    code, out, err = run_cli([path, "--out", tmp_path / "run", "--skip-bad-dates", "-q"], capsys)
    assert code == 0 and "2 documents whose date does not parse left out" in err
    code, out, _ = run_cli(
        [path, "--out", tmp_path / "run2", "--skip-bad-dates", "--date-format", "%d/%m/%Y", "-q"],
        capsys,
    )
    assert code == 0 and "1991" in out


def test_undecodable_bytes_are_replaced_not_fatal(tmp_path, capsys):
    # valid UTF-8 (the e-acute) comes first, so the file is UTF-8 with two broken bytes
    path = tmp_path / "mixed.csv"
    path.write_bytes(b"date,text\n1990,caf\xc3\xa9\n1991,na\xefve caf\xe9\n")
    code, out, err = run_cli([path, "--out", tmp_path / "run", "-q"], capsys)
    assert code == 0 and "2 undecodable byte sequences" in err and "read as utf-8" in err


def test_a_latin1_file_is_detected_and_reported_with_a_count(tmp_path, capsys):
    path = tmp_path / "latin.csv"
    path.write_bytes("date,text\n1990,café était naïve\n1991,plain\n".encode("latin-1"))
    code, out, err = run_cli([path, "--out", tmp_path / "run", "-q"], capsys)
    assert code == 0, err
    assert "not UTF-8: 3 non-ASCII characters were read as cp1252" in err
    text = (tmp_path / "run" / "slices" / "1990.txt").read_text(encoding="utf-8")
    assert text.split() == ["café", "était", "naïve"]  # not "caf tait"
    code, out, err = run_cli(
        [path, "--out", tmp_path / "run2", "-q", "--encoding", "latin-1"], capsys
    )
    assert code == 0 and "cp1252" not in err and "undecodable" not in err
    assert (tmp_path / "run2" / "slices" / "1990.txt").read_text(encoding="utf-8").split()[0] == (
        "café"
    )
    assert_bad_input(
        [path, "--out", tmp_path / "r3", "--encoding", "klingon"],
        capsys,
        "not a known text encoding",
    )


def test_semicolon_file_gets_a_hint_and_reads_with_delimiter(tmp_path, capsys):
    path = tmp_path / "export.csv"
    path.write_text("date;text\n1990;one two\n1991;three four\n", encoding="utf-8")
    assert_bad_input([path, "--out", tmp_path / "run"], capsys, "add --delimiter ';'")
    code, out, err = run_cli([path, "--out", tmp_path / "run", "-q", "--delimiter", ";"], capsys)
    assert code == 0, err
    assert (tmp_path / "run" / "slices" / "1991.txt").read_text().split() == ["three", "four"]
    piped = tmp_path / "piped.csv"
    piped.write_text("date|text\n1990|a\n", encoding="utf-8")
    assert_bad_input([piped, "--out", tmp_path / "r2"], capsys, "add --delimiter '|'")
    assert_bad_input(
        [path, "--out", tmp_path / "r3", "--delimiter", ";;"], capsys, "must be one character"
    )


def test_parquet_text_column_of_lists_exits_2_naming_column_and_type(tmp_path, capsys):
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp_path / "tokens.parquet"
    pq.write_table(pa.table({"date": ["1990", "1991"], "text": [["a", "b"], ["c"]]}), path)
    err = assert_bad_input([path, "--out", tmp_path / "run"], capsys, "'text'", "list<")
    assert "--pretokenized" in err
    raw = tmp_path / "bytes.parquet"
    pq.write_table(pa.table({"date": ["1990"], "text": [b"\xff\xfe"]}), raw)
    assert_bad_input([raw, "--out", tmp_path / "r2"], capsys, "holds binary values", "UTF-8")


def test_binary_file_bytes_are_escaped_in_the_message(tmp_path, capsys):
    path = tmp_path / "picture.csv"
    path.write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x07\xff\xfe")
    err = assert_bad_input([path, "--out", tmp_path / "run"], capsys, "binary file")
    assert all(ch.isprintable() for ch in err.strip())
    weird = tmp_path / "weird.csv"
    weird.write_bytes(b"da\x1bte\x07,te\xffxt\n1990,a\n")
    err = assert_bad_input([weird, "--out", tmp_path / "r2"], capsys, "\\x1b", "\\x07")
    assert all(ch.isprintable() for ch in err.strip())


def test_truncated_gzip(tmp_path, capsys):
    path = tmp_path / "cut.csv.gz"
    with gzip.open(path, "wt") as out:
        out.write(
            "date,text\n" + "".join(f"{1990 + i % 5},word{i} other{i % 7}\n" for i in range(20000))
        )
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    assert_bad_input([path, "--out", tmp_path / "run"], capsys, "truncated or damaged", "gzip")


def test_empty_slice_after_filtering(source, tmp_path, capsys):
    assert_bad_input(
        [source, "--out", tmp_path / "run", "--by", "edges:1980,1985,1995"],
        capsys,
        "1980-1984",
        "hold no documents",
    )


def test_bad_by_and_balance_values(source, tmp_path, capsys):
    assert_bad_input(
        [source, "--out", tmp_path / "run", "--by", "weekly"], capsys, "Unknown --by 'weekly'"
    )
    assert_bad_input(
        [source, "--out", tmp_path / "run", "--by", "even:500"],
        capsys,
        "even:500 needs at least 500",
    )
    assert_bad_input(
        [source, "--out", tmp_path / "run", "--balance", "10000000000"],
        capsys,
        "asks for more tokens",
    )
    assert_bad_input(  # a second SOURCE is read too, so a missing one is named
        [source, "extra.csv", "--out", tmp_path / "run"], capsys,
        "There is no file or folder at extra.csv",
    )


def test_out_is_a_file(source, tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("x")
    assert_bad_input([source, "--out", target], capsys, "is a file, not a folder")


def test_run_folder_from_another_version(source, tmp_path, capsys):
    run = tmp_path / "old"
    run.mkdir()
    (run / "run.json").write_text(json.dumps({"format_version": 99, "stages": {}}))
    assert_bad_input([source, "--out", run], capsys, "made by another version of drift")


def test_run_folder_in_use(source, tmp_path, capsys):
    run = tmp_path / "busy"
    run.mkdir()
    (run / ".lock").write_text(str(os.getppid()))
    assert_bad_input([source, "--out", run], capsys, "in use by another drift process")


def test_typer_app_raises_drift_error(tmp_path):
    result = CliRunner().invoke(
        app, ["slice", str(tmp_path / "none.csv"), "--out", str(tmp_path / "run")]
    )
    assert isinstance(result.exception, DriftError)


def test_real_process_exits_2_without_traceback(tmp_path):
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "drift",
            "slice",
            str(tmp_path / "none.csv"),
            "--out",
            str(tmp_path / "run"),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert result.returncode == 2
    assert (
        result.stderr.strip().startswith("drift: There is no file or folder")
        and "Traceback" not in result.stderr
    )
