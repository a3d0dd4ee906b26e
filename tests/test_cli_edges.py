"""Cases a new user meets at the edges: one slice, --skip-bad-dates with no good date, the JSON
output's last line and its ``significant`` without a control, and the README's run-folder
listing."""

from __future__ import annotations

import fnmatch
import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from rankrun_builder import write_array_run

from drift.cli import main

ROOT = Path(__file__).resolve().parents[1]


def _drift(args, capsys) -> tuple[int, str, str]:
    code = 0
    try:
        main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_single_slice_advice_leads_somewhere(small_demo_archive, tmp_path, capsys):
    run = tmp_path / "run"
    code, _, err = _drift(
        ["slice", small_demo_archive, "--out", run, "--by", "edges:1950,2010", "-q"], capsys
    )
    assert code == 0, err
    for command in (["train", run, "-q"], ["train", run, "--no-control", "-q"]):
        code, _, err = _drift(command, capsys)
        assert code == 2
        assert "has one slice (1950-2009" in err and "--no-control" not in err
        assert "--by even:2" in err
    assert not (run / "models").exists()  # refused before any training
    # the advice, followed, works: two slices, then training and ranking have a pair
    advice = re.search(r"'drift slice (.*?)'", err).group(1).split()
    code, out, err = _drift(["slice", *advice, "-q"], capsys)
    assert code == 0, err
    assert len(pd.read_csv(run / "slices" / "summary.csv")) == 2


def test_skip_bad_dates_with_no_good_date_does_not_advise_itself(tmp_path, capsys):
    path = tmp_path / "dates.csv"
    path.write_text("date,text\nlater,a\nsoon,b\n03/04/1991,c\n", encoding="utf-8")
    code, _, err = _drift(["slice", path, "--out", tmp_path / "run"], capsys)
    assert code == 2 and "--skip-bad-dates" in err  # without it, the flag is good advice
    code, _, err = _drift(["slice", path, "--out", tmp_path / "run", "--skip-bad-dates"], capsys)
    assert code == 2
    assert "None of the 3 values in the time column 'date' is a date" in err
    assert "so --skip-bad-dates would leave nothing" in err and "--date-format" in err
    assert "drop those documents with --skip-bad-dates" not in err
    folder = tmp_path / "letters"
    folder.mkdir()
    (folder / "note1002.txt").write_text("no whole-word date here", encoding="utf-8")
    code, _, err = _drift(["slice", folder, "--out", tmp_path / "r2", "--skip-bad-dates"], capsys)
    assert code == 2 and "would leave nothing" in err and "index.csv" in err


@pytest.fixture(scope="module")
def no_control_run(tmp_path_factory) -> Path:
    rng = np.random.default_rng(5)
    words = [f"w{i}" for i in range(120)]
    counts = np.arange(120, 0, -1) + 30
    slices = {label: (words, [rng.standard_normal((120, 8))], counts) for label in ("2001", "2002")}
    return write_array_run(tmp_path_factory.mktemp("nc") / "run", slices, None)


def test_json_ends_with_a_newline_and_significant_is_null_without_control(no_control_run, capsys):
    code, out, err = _drift(["rank", no_control_run, "--k", "5", "--format", "json", "-q"], capsys)
    assert code == 0, err
    assert out.endswith("]\n") and not out.endswith("\n\n")
    rows = json.loads(out)
    assert rows and all(row["significant"] is None for row in rows)  # undecided, not false
    assert all(row["z"] is None for row in rows)
    csv_rows = pd.read_csv(no_control_run / "scores.csv")
    assert csv_rows["significant"].isna().all()


def readme_listing() -> list[str]:
    """The paths README.md's run-folder listing names, as glob patterns (<label> -> *)."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## The run folder") :]
    listing = re.search(r"```\n(.*?)```", section, re.S).group(1)
    patterns = []
    for line in listing.splitlines()[1:]:
        names = re.split(r"\s{2,}", line.strip())[0]
        for name in names.split(", "):
            patterns.append(re.sub(r"<[^>]+>", "*", name.strip()))
    return patterns


def test_readme_run_folder_listing_matches_a_real_run(demo_run):
    patterns = readme_listing()
    files = sorted(
        p.relative_to(demo_run.run).as_posix() for p in demo_run.run.rglob("*") if p.is_file()
    )
    unlisted = [f for f in files if not any(fnmatch.fnmatch(f, pattern) for pattern in patterns)]
    assert not unlisted, f"the README's run-folder listing misses {unlisted}"
    unused = [p for p in patterns if not any(fnmatch.fnmatch(f, p) for f in files)]
    assert not unused, f"the README lists {unused}, which a demo run does not hold"


def test_the_command_line_starts_without_the_statistics_stack():
    """`drift --help` and every command's parsing import neither pandas nor scipy: each stage
    imports what it needs when it runs (the append benchmark counts every second of start-up as
    drift's overhead on a year's training)."""
    import subprocess
    import sys

    probe = (
        "import sys, drift.cli; "
        "print(sorted(m for m in ('pandas', 'scipy', 'scipy.stats', 'gensim', 'plotly') "
        "if m in sys.modules))"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == "[]"
