"""End to end: drift rank, drift neighbours and drift export on a run folder."""

from __future__ import annotations

import io
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from gensim.models import KeyedVectors
from rankrun_builder import write_array_run
from scipy.stats import ortho_group

from drift.cli import main

LABELS = ("2001", "2002", "2003")
MOVED = ["harbour", "signal", "current"]
JSON = ("--output-format", "json")
CSV = ("--output-format", "csv")


@pytest.fixture(scope="module")
def pristine_run(tmp_path_factory):
    """Three rotated, noisy copies of one random geometry; three words move in 2003; a word
    made of markup shows up in every slice. Two seeds and a control pair without change."""
    rng = np.random.default_rng(21)
    dim = 12
    words = MOVED + ["[bold]x[/bold]"] + [f"w{i}" for i in range(300)]
    counts = np.round(4000 / (1 + np.arange(len(words))) ** 1.1).astype(int) + 20
    base = rng.standard_normal((len(words), dim)) + 1.0

    def noisy(points):
        matrix = points + (1.5 / np.sqrt(counts))[:, None] * rng.standard_normal(points.shape)
        return matrix @ ortho_group.rvs(dim, random_state=int(rng.integers(1 << 30)))

    slices = {}
    for label in LABELS:
        points = base.copy()
        if label == LABELS[-1]:
            points[: len(MOVED)] = rng.standard_normal((len(MOVED), dim)) + 1.0
        slices[label] = (words, [noisy(points), noisy(points)], counts)
    control = {name: (words, [noisy(base), noisy(base)], counts)
               for name in ("control-a", "control-b")}
    return write_array_run(tmp_path_factory.mktemp("cli") / "run", slices, control)


@pytest.fixture
def run(pristine_run, tmp_path):
    """A copy of the run for each test: a test that ranks with other options changes the folder,
    and no other test may see that."""
    return Path(shutil.copytree(pristine_run, tmp_path / "run"))


def _drift(args, capsys):
    """Run the drift command line in-process; return (exit code, stdout, stderr)."""
    code = 0
    try:
        main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_rank_json_rows(run, capsys):
    args = ["rank", run, "--k", "8", *JSON, "--top", "5", "-q"]
    code, out, err = _drift(args, capsys)
    assert code == 0, err
    rows = json.loads(out)
    assert len(rows) == 5
    needed = {"word", "rank", "score", "displacement", "turnover", "z", "p", "q", "count_from",
              "count_to"}
    assert needed <= set(rows[0])
    assert {r["word"] for r in rows[:3]} == set(MOVED)
    assert [r["rank"] for r in rows] == [1, 2, 3, 4, 5]
    assert rows[0]["change_point"] == "2003"
    assert err == ""


def test_rank_json_nan_is_null(run, capsys, tmp_path):
    code, out, _ = _drift(["rank", run, "--k", "8", *JSON, "--all", "-q"], capsys)
    assert code == 0
    rows = json.loads(out)  # NaN would not parse as strict JSON
    assert len(rows) == 304
    assert "NaN" not in out


def test_rank_csv_and_min_count(run, capsys):
    code, out, _ = _drift(
        ["rank", run, "--k", "8", *CSV, "--all", "--min-count-shown", "100", "-q"], capsys
    )
    assert code == 0
    table = pd.read_csv(io.StringIO(out))
    assert len(table) > 0
    assert (table[["count_from", "count_to"]] >= 100).all().all()
    assert table["rank"].is_monotonic_increasing


def test_rank_table_shows_words_as_typed(run, capsys):
    code, out, _ = _drift(["rank", run, "--k", "8", "--all", "-q"], capsys)
    assert code == 0
    assert "Words that changed most from 2001 to 2003" in out
    assert "harbour" in out and "2003 (+" in out
    assert "[bold]x[/bold]" in out  # printed as text, not read as console markup


def test_rank_options_between_reference_measure(run, capsys):
    code, out, err = _drift(
        ["rank", run, "--k", "8", "--between", "2002", "2003", "--reference", "2002",
         "--measure", "turnover", "--anchors", "100", *JSON, "--top", "3", "-q"],
        capsys,
    )
    assert code == 0, err
    rows = json.loads(out)
    assert all(r["score"] == r["turnover"] for r in rows)
    manifest = json.loads((run / "run.json").read_text())
    assert manifest["stages"]["rank"]["params"]["between"] == ["2002", "2003"]
    assert manifest["stages"]["rank"]["params"]["anchors"] == 100


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--between", "2001", "2009"], "--between 2009 is not a slice of this run"),
        (["--measure", "speed"], "--measure speed is unknown"),
        (["--output-format", "xml"], "--output-format xml is unknown"),
        (["--anchors", "missing-file.txt"], "neither a number of words nor an existing"),
        (["--alpha", "0"], "--alpha must lie strictly between 0 and 1"),
        (["--top", "0"], "--top must be at least 1"),
    ],
)
def test_rank_bad_input_exits_2(run, capsys, args, message):
    code, out, err = _drift(["rank", run, "--k", "8", "-q", *args], capsys)
    assert code == 2
    assert message in err
    assert "Traceback" not in err


def test_rank_missing_run_exits_2(tmp_path, capsys):
    code, _, err = _drift(["rank", tmp_path / "nothing"], capsys)
    assert code == 2 and "does not exist" in err


def test_neighbours_table_and_json(run, capsys):
    code, out, _ = _drift(["neighbours", run, "harbour", "--neighbours", "4"], capsys)
    assert code == 0
    assert "Nearest neighbours of 'harbour' per slice" in out
    assert all(label in out for label in LABELS)
    code, out, _ = _drift(["neighbours", run, "harbour", "--neighbours", "4", *JSON], capsys)
    rows = json.loads(out)
    assert len(rows) == 12 and {r["slice"] for r in rows} == set(LABELS)


def test_neighbours_unknown_word_suggests_close_ones(run, capsys):
    code, _, err = _drift(["neighbours", run, "harbor"], capsys)
    assert code == 2
    assert "'harbor' is not in any slice of this run; did you mean harbour" in err


def test_export_word2vec_and_npz(run, capsys, tmp_path):
    code, out, _ = _drift(["export", run, "--vector-format", "word2vec", "-o", tmp_path / "w"],
                          capsys)
    assert code == 0
    files = out.split()
    assert [p.rsplit("/", 1)[-1] for p in files] == ["2001.txt", "2002.txt", "2003.txt"]
    first = KeyedVectors.load_word2vec_format(files[0])
    second = KeyedVectors.load_word2vec_format(files[1])
    assert first["w0"] @ second["w0"] > 0.95  # aligned onto the reference slice
    code, out, _ = _drift(["export", run, "--vector-format", "npz", "-o", tmp_path / "n"], capsys)
    assert code == 0
    with np.load(out.split()[0]) as data:
        assert data["vectors"].shape == (304, 12)
    code, _, err = _drift(["export", run, "--vector-format", "glove", "-o", tmp_path / "g"], capsys)
    assert code == 2 and "--vector-format glove is unknown" in err


def _render(table, width):
    from rich.console import Console

    console = Console(width=width, record=True)
    console.print(table)
    return console.export_text()


def test_scores_table_fits_80_columns_without_cutting_words(run):
    from drift.cli.rank_views import DROP_ORDER, SHOWN_NEIGHBOURS, scores_table
    from drift.compare.ranking import rank_record, rank_run
    from drift.options import measures_judged

    rows = rank_run(run, k=8, quiet=True).head(4).copy()
    rows.loc[rows.index[0], "word"] = "counterrevolutionaries"  # longer than any column's share
    rows.loc[rows.index[1], "gained"] = "telecommunications harbour signal current w1 w2 w3"
    params = rank_record(run)["params"]
    table = scores_table(rows, params, True, 80)
    text = _render(table, 80)
    assert max(len(line) for line in text.splitlines()) <= 80
    tokens = set(text.split())
    assert set(rows["word"]) <= tokens  # every word whole, on one line
    headers = [str(c.header) for c in table.columns]
    if "gained" in headers:  # neighbour lists wrap between words, never inside one
        shown = "telecommunications harbour signal current w1".split()[:SHOWN_NEIGHBOURS]
        assert set(shown) <= tokens
    if "count" in headers:
        assert f"{rows['count_from'].iloc[0]} → {rows['count_to'].iloc[0]}" in text
    # whole columns go, in the stated order, and the caption names them
    every = ["#", "word", "displ.", "turnover", "local", "z", "q", "count", "change", "gained",
             "lost"]
    dropped = [name for name in every if name not in headers]
    names = {"displ.": "displacement"}
    dropped = [names.get(name, name) for name in dropped]
    assert dropped, "80 columns cannot hold every column of this table"
    judged = measures_judged(params["measure"])  # the measures the ranking stands on stay
    assert judged == ("displacement", "local")
    in_order = [key for key in DROP_ORDER if key not in judged][: len(dropped)]
    assert sorted(dropped) == sorted(in_order)
    assert f"Not shown at this width: {', '.join(in_order)} (" in table.caption.plain
    assert {"#", "word", "displ.", "local", "q"} <= set(headers)


def test_scores_table_whole_when_no_width(run):
    from drift.cli.rank_views import scores_table
    from drift.compare.ranking import rank_record, rank_run

    rows = rank_run(run, k=8, quiet=True).head(3)
    table = scores_table(rows, rank_record(run)["params"], True, None)
    assert [str(c.header) for c in table.columns] == [
        "#", "word", "displ.", "turnover", "local", "z", "q", "count", "change", "gained", "lost",
    ]
    assert "Not shown" not in table.caption.plain
    first = rows.iloc[0]
    assert f"{first['count_from']} → {first['count_to']}" in _render(table, 400)


@pytest.mark.parametrize("command", [["rank", "--k", "8", "--top", "3", "-q"],
                                     ["neighbours", "harbour", "--neighbours", "3"]])
def test_piped_tables_are_whole(run, capsys, tmp_path, command):
    """Into a pipe (capsys is not a terminal) or a file a table keeps every column and word."""
    name, *rest = command
    code, out, _ = _drift([name, run, *rest], capsys)
    assert code == 0
    assert "Not shown" not in out and "not shown" not in out
    assert "\x1b[" not in out  # no colour codes
    code, _, _ = _drift([name, run, *rest, "-o", tmp_path / "table.txt"], capsys)
    assert code == 0 and (tmp_path / "table.txt").read_text(encoding="utf-8") == out
    if name == "rank":
        assert all(h in out for h in ("local", "turnover", "lost", "change"))
        assert len(max(out.splitlines(), key=len)) > 80
    else:
        assert all(label in out for label in LABELS)


def test_neighbours_table_drops_inner_slices_first(run):
    from drift.cli.rank_views import neighbours_table
    from drift.compare.ranking import neighbours_by_slice

    frame = neighbours_by_slice(run, "harbour", k=3)
    table = neighbours_table("harbour", frame, list(LABELS), 40)
    text = _render(table, 40)
    assert max(len(line) for line in text.splitlines()) <= 40
    headers = [str(c.header) for c in table.columns]
    assert headers == ["#", "2001", "2003"]
    assert "Slices not shown at this width: 2002" in table.caption.plain
    for neighbour in frame[frame["slice"] != "2002"]["neighbour"]:
        assert neighbour in text.split()  # the word and its similarity may wrap apart, not the word


def test_rank_output_file_csv(run, capsys, tmp_path):
    target = tmp_path / "top.csv"
    code, out, _ = _drift(
        ["rank", run, "--k", "8", "--top", "4", *CSV, "-o", target, "-q"],
        capsys,
    )
    assert code == 0 and out == ""
    assert len(pd.read_csv(target)) == 4


def test_slices_drop_from_the_middle_outwards():
    from drift.cli.rank_views import _slice_drop_order

    decades = ["1950s", "1960s", "1970s", "1980s", "1990s", "2000s"]
    assert _slice_drop_order(decades) == ("1970s", "1980s", "1960s", "1990s")
    assert _slice_drop_order(decades[:2]) == ()


def test_slice_summary_fits_80_columns_with_long_labels():
    from drift.cli.rank_views import SUMMARY_DROP_ORDER, summary_view

    summary = pd.DataFrame({
        "label": ["1990-03-01_1994-12-31", "1995-01-01_1999-12-31"],
        "start": ["1990-03-01", "1995-01-01"], "end": ["1994-12-31", "1999-12-31"],
        "documents": [120_000, 98_000], "tokens": [41_000_000, 39_500_000],
        "types": [310_000, 298_000], "dropped": [1_500_000, 0],
    })
    table = summary_view(summary, "Slices in runs/letters", 80)
    text = _render(table, 80)
    assert max(len(line) for line in text.splitlines()) <= 80
    assert {"1990-03-01_1994-12-31", "41,000,000", "39,500,000"} <= set(text.split())
    headers = [str(c.header) for c in table.columns]
    dropped = [name for name in SUMMARY_DROP_ORDER if name not in headers]
    assert dropped == list(SUMMARY_DROP_ORDER[: len(dropped)]) and dropped
    assert f"Not shown at this width: {', '.join(dropped)}" in table.caption.plain
    whole = summary_view(summary, "Slices", None)
    assert [str(c.header) for c in whole.columns] == list(summary.columns)


def test_scores_table_shows_a_change_point_only_where_the_pages_do(run):
    """The terminal table and the word pages agree: a change point is shown for a significant
    word that moved away (positive step), and '-' for the others."""
    from drift.cli.rank_views import scores_table
    from drift.compare.ranking import rank_record, rank_run

    rows = rank_run(run, k=8, quiet=True).head(3).copy()
    rows["change_point"] = ["2002", "2002", "2002"]
    rows["change_step"] = [0.5, 0.5, -0.5]
    rows["significant"] = pd.array([True, False, True], dtype="boolean")
    params = rank_record(run)["params"]
    lines = _render(scores_table(rows, params, True, None), 400).splitlines()
    cells = {word: [line for line in lines if f" {word} " in line][0] for word in rows["word"]}
    first, second, third = rows["word"]
    assert "2002 (+0.50)" in cells[first]
    assert "2002" not in cells[second] and "2002" not in cells[third]
