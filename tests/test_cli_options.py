"""One source for every option: options classes, commands, library and README agree."""

from __future__ import annotations

import dataclasses
import inspect
import re
from pathlib import Path

import pytest
import typer.main
from typer.core import TyperOption

import drift
from drift.cli import app, main
from drift.cli.options_cli import option_flags
from drift.options import (
    STAGES,
    ChartOptions,
    RankOptions,
    ReportOptions,
    SliceOptions,
    TrainOptions,
    ViewOptions,
    flag_of,
)

README = Path(__file__).resolve().parent.parent / "README.md"


def _commands():
    return typer.main.get_command(app).commands


def _shown_options(command) -> dict[str, TyperOption]:
    """Long name -> option, for the options a command's --help lists."""
    shown = {}
    for param in command.params:
        if isinstance(param, TyperOption) and not param.hidden and "--help" not in param.opts:
            shown[max(param.opts, key=len)] = param
    return shown


def _drift(args, capsys):
    code = 0
    try:
        main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_drift_run_offers_every_stage_option():
    offered = set(_shown_options(_commands()["run"]))
    missing = option_flags(*STAGES) - offered
    assert not missing, f"drift run lacks {sorted(missing)}"
    # the options the issue found missing once
    assert {
        "--negative",
        "--sample",
        "--seed",
        "--reference",
        "--anchors",
        "--all",
        "--examples",
    } <= offered


@pytest.mark.parametrize(
    ("command", "classes"),
    [
        ("slice", [SliceOptions]),
        ("train", [TrainOptions]),
        ("rank", [RankOptions, ViewOptions]),
        ("chart", [ChartOptions]),
        ("report", [ReportOptions]),
    ],
)
def test_stage_commands_take_their_defaults_from_the_options(command, classes):
    shown = _shown_options(_commands()[command])
    for cls in classes:
        for item in dataclasses.fields(cls):
            option = shown[flag_of(item)]
            if item.metadata.get("negate"):
                assert option.default is False  # --no-control: off unless given
            elif item.metadata.get("cli_type") is bool:
                assert option.default in (None, False)  # --balance [N]
            else:
                assert option.default == item.default, item.name
            assert option.help == item.metadata["help"]


@pytest.mark.parametrize(
    ("function", "cls"),
    [
        (drift.slice_archive, SliceOptions),
        (drift.train_run, TrainOptions),
        (drift.rank_run, RankOptions),
        (drift.build_report, ReportOptions),
        (drift.chart_word, ChartOptions),
    ],
)
def test_library_keyword_defaults_are_the_options_defaults(function, cls):
    parameters = inspect.signature(function).parameters
    for name, value in cls.defaults().items():
        assert parameters[name].default == value, f"{function.__name__}({name}=...)"


def test_between_is_shown_as_two_labels(capsys):
    code, out, _ = _drift(["rank", "--help"], capsys)
    assert code == 0
    assert "--between A B" in out
    assert "<str,str>" not in out and "TEXT TEXT" not in out


def test_version(capsys):
    code, out, _ = _drift(["--version"], capsys)
    assert code == 0 and out.strip() == f"drift {drift.__version__}"


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--alpha", "2"], "--alpha must lie strictly between 0 and 1 (got 2.0); use e.g. 0.05."),
        (["--k", "0"], "--k must be a whole number of at least 1 (got 0)."),
        (["--measure", "turnovr"], "--measure turnovr is unknown; did you mean turnover?"),
        (["--dim", "1"], "--dim must be a whole number of at least 2 (got 1)"),
    ],
)
def test_one_message_for_one_check_everywhere(tmp_path, capsys, args, message):
    """The same bad value gets the same sentence from drift run, the stage command and the API,
    and drift run refuses it before reading anything."""
    code, _, err = _drift(
        ["run", tmp_path / "missing.csv", "--out", tmp_path / "run", *args], capsys
    )
    assert code == 2 and message in err, err
    assert not (tmp_path / "run").exists()
    stage = "train" if args[0] == "--dim" else "rank"
    code, _, err = _drift([stage, tmp_path / "run", *args], capsys)
    assert code == 2 and message in err, err
    field, parse = {
        "--alpha": ("alpha", float),
        "--k": ("k", int),
        "--measure": ("measure", str),
        "--dim": ("dim", int),
    }[args[0]]
    with pytest.raises(drift.DriftError) as error:
        (TrainOptions if stage == "train" else RankOptions)(**{field: parse(args[1])})
    assert message in str(error.value)


def test_former_spellings_still_work(tmp_path, capsys):
    """--format (each command's own meaning) and --base-seed are hidden, not gone."""
    code, out, _ = _drift(["rank", "--help"], capsys)
    assert "--format" not in out.replace("--output-format", "").replace("--vector-format", "")
    code, _, err = _drift(["train", tmp_path / "nowhere", "--base-seed", "3"], capsys)
    assert code == 2 and "No such option" not in err and "does not exist" in err


# ---------------------------------------------------------------------------- README in step


def _readme_options() -> dict[tuple[str, str], str]:
    """(long option name, command) -> the README's default cell, from the options table."""
    text = README.read_text(encoding="utf-8")
    table = text.split("<!-- options table")[1].split("\n\n")[0]
    rows = {}
    for line in table.splitlines()[3:]:
        cells = [cell.strip() for cell in line.strip().strip("|").split("|")]
        names = re.findall(r"--[a-z-]+", cells[0])
        assert names, line
        for command in cells[2].split(","):
            rows[(max(names, key=len), command.strip())] = cells[1]
    return rows


def test_readme_options_table_matches_help():
    documented = _readme_options()
    actual = {}
    for name, command in _commands().items():
        for flag, option in _shown_options(command).items():
            actual[(flag, name)] = option
    assert set(documented) == set(actual), (
        f"in --help only: {sorted(set(actual) - set(documented))}; "
        f"in README only: {sorted(set(documented) - set(actual))}"
    )
    for key, cell in documented.items():
        default = actual[key].default
        literal = re.fullmatch(r"`([^`]*)`", cell)
        if literal:  # a value: it must be the default --help shows
            assert str(default) == literal.group(1), (key, cell, default)
        elif key != ("--out", "demo"):  # words ('first and last slice'): no fixed default
            assert default in (None, False), (key, cell, default)


def test_readme_command_table_lists_every_command():
    text = README.read_text(encoding="utf-8").split("## The commands")[1].split("###")[0]
    listed = set(re.findall(r"^\| `drift ([a-z]+)", text, flags=re.MULTILINE))
    assert listed == set(_commands())
