"""Archives that grow: `drift slice NEW --out RUN --append` and what training then redoes.

The text is real: gensim's bundled Lee background corpus (lee_background.cor, 300 news
documents), dated by position into 2001, 2002 and 2003. The reference for what an append must
write is slicing the whole archive (first part, then the appended part) at once.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import gensim
import numpy as np
import pandas as pd
import pytest

import drift
from drift import runfolder
from drift.cli import main
from drift.publish.evidence import source_problem
from drift.runfolder import RunPaths

GENSIM_DATA = Path(gensim.__file__).parent / "test" / "test_data"
TINY = ["--dim", "8", "--epochs", "1", "--min-count", "2", "--workers", "1", "--seeds", "1",
        "--quiet"]


@pytest.fixture(scope="module")
def archive(tmp_path_factory) -> dict[str, Path]:
    """first.csv (2001, 2002), later.csv (2003), late2002.csv (more 2002 documents) and the
    concatenations that slicing at once reads."""
    lines = (GENSIM_DATA / "lee_background.cor").read_text(encoding="utf-8").splitlines()
    frame = pd.DataFrame({
        "date": [f"{2001 + i // 100}-{1 + i % 12:02d}-15" for i in range(len(lines))],
        "desk": ["home" if i % 3 else "abroad" for i in range(len(lines))],
        "body": lines,
    })
    folder = tmp_path_factory.mktemp("growing")
    parts = {
        "first": frame.iloc[:180],            # 2001 and most of 2002
        "later": frame.iloc[200:],            # 2003
        "late2002": frame.iloc[180:200],      # the rest of 2002
    }
    paths = {}
    for name, part in parts.items():
        paths[name] = folder / f"{name}.csv"
        part.to_csv(paths[name], index=False)
    for name, names in {"first+later": ["first", "later"],
                        "first+later+late2002": ["first", "later", "late2002"]}.items():
        paths[name] = folder / f"{name}.csv"
        pd.concat([parts[n] for n in names]).to_csv(paths[name], index=False)
    return paths


def cli(args: list, capsys) -> tuple[int, str, str]:
    with pytest.raises(SystemExit) as exit_info:
        main([str(a) for a in args])
    captured = capsys.readouterr()
    return exit_info.value.code, captured.out, captured.err


def digest(path: Path) -> tuple[int, str]:
    return path.stat().st_mtime_ns, hashlib.sha256(path.read_bytes()).hexdigest()


def model_files(run: Path, label: str) -> list[Path]:
    return sorted((RunPaths(run).models_dir / label).glob("seed-*"))


def assert_same_as_sliced_at_once(grown: Path, at_once: Path) -> None:
    """Slice files byte for byte, summary, counts and composition equal; the document index
    equal but for ids and where each document lies in its source."""
    labels = drift.slice_labels(at_once)
    assert drift.slice_labels(grown) == labels
    for label in labels:
        assert RunPaths(grown).slice_file(label).read_bytes() == \
            RunPaths(at_once).slice_file(label).read_bytes(), label
    pd.testing.assert_frame_equal(drift.read_summary(grown), drift.read_summary(at_once))
    pd.testing.assert_frame_equal(drift.read_counts(grown), drift.read_counts(at_once))
    pd.testing.assert_frame_equal(drift.read_composition(grown), drift.read_composition(at_once))
    columns = ["date", "desk", "slice", "line", "lines", "tokens"]
    pd.testing.assert_frame_equal(
        drift.read_documents(grown)[columns], drift.read_documents(at_once)[columns]
    )
    assert drift.read_documents(grown)["document"].is_unique


def test_append_writes_what_slicing_everything_at_once_writes(archive, tmp_path, capsys):
    grown, at_once = tmp_path / "grown", tmp_path / "at-once"
    assert cli(["slice", archive["first"], "--out", grown, "--meta", "desk", "-q"], capsys)[0] == 0
    code, out, err = cli(["slice", archive["later"], "--out", grown, "--append"], capsys)
    assert code == 0, err
    assert "new: 2003" in out and "redone" not in out
    code, _, err = cli(["slice", archive["late2002"], "--out", grown, "--append", "-q"], capsys)
    assert code == 0, err
    assert "inside a slice the run already had (2002: 20 documents)" in err
    assert cli(["slice", archive["first+later+late2002"], "--out", at_once, "--meta", "desk",
                "-q"], capsys)[0] == 0
    assert_same_as_sliced_at_once(grown, at_once)

    record = runfolder.read_manifest(grown)["stages"]["slice"]
    history = record["history"]
    assert [entry["action"] for entry in history] == ["slice", "append", "append"]
    assert [Path(entry["source"]).name for entry in history] == \
        ["first.csv", "later.csv", "late2002.csv"]
    assert history[1]["new_slices"] == ["2003"] and history[1]["redone_slices"] == []
    assert history[2]["new_slices"] == [] and history[2]["redone_slices"] == ["2002"]
    assert history[2]["documents"] == 20
    assert record["totals"]["documents_read"] == 300
    # examples are quoted from the slice files, since the originals lie in several sources
    assert "appended" in source_problem(grown)

    # the same source again adds nothing; slicing the first source again keeps the appends
    before = RunPaths(grown).slice_file("2002").stat().st_mtime_ns
    code, out, err = cli(["slice", archive["later"], "--out", grown, "--append"], capsys)
    assert code == 0 and "added to" in err and "before" in err and "(reused)" in out
    code, out, err = cli(["slice", archive["first"], "--out", grown, "--meta", "desk"], capsys)
    assert code == 0 and "(reused)" in out and "appended since" in err
    assert RunPaths(grown).slice_file("2002").stat().st_mtime_ns == before
    assert drift.slice_labels(grown) == ["2001", "2002", "2003"]


def test_append_of_several_files_at_once_equals_slicing_everything(archive, tmp_path, capsys):
    """Two files appended together (a glob) write what slicing all three at once writes; their
    ids carry each file's name, run.json lists both, and the same batch again adds nothing."""
    batch = tmp_path / "batch"
    batch.mkdir()
    for name in ("later", "late2002"):
        (batch / f"{name}.csv").write_bytes(archive[name].read_bytes())
    grown, at_once = tmp_path / "grown", tmp_path / "at_once"
    assert cli(["slice", archive["first"], "--out", grown, "-q"], capsys)[0] == 0
    code, out, err = cli(["slice", str(batch / "*.csv"), "--out", grown, "--append"], capsys)
    assert code == 0, err
    title = " ".join(out.split())
    assert "(appended 2 files; new: 2003; redone: 2002)" in title
    assert "documents of the 2 files in" in err
    # slicing at once: the first part, then the batch's files in the glob's (sorted) order
    parts = [archive["first"], batch / "late2002.csv", batch / "later.csv"]
    assert cli(["slice", *parts, "--out", at_once, "-q"], capsys)[0] == 0
    labels = drift.slice_labels(at_once)
    assert drift.slice_labels(grown) == labels == ["2001", "2002", "2003"]
    for label in labels:
        assert RunPaths(grown).slice_file(label).read_bytes() == \
            RunPaths(at_once).slice_file(label).read_bytes(), label
    pd.testing.assert_frame_equal(drift.read_counts(grown), drift.read_counts(at_once))
    pd.testing.assert_frame_equal(drift.read_summary(grown), drift.read_summary(at_once))
    ids = drift.read_documents(grown)["document"]
    assert ids.is_unique
    assert ids.str.startswith("late2002.csv:").sum() == 20
    assert ids.str.startswith("later.csv:").sum() == 100
    entry = json.loads((grown / "run.json").read_text())["stages"]["slice"]["history"][-1]
    assert [Path(p).name for p in entry["sources"]] == ["late2002.csv", "later.csv"]
    code, out, err = cli(["slice", str(batch / "*.csv"), "--out", grown, "--append"], capsys)
    assert code == 0 and "(reused)" in out and "added to" in err


def test_append_before_the_first_slice_names_the_new_reference(archive, tmp_path, capsys):
    run = tmp_path / "run"
    assert cli(["slice", archive["later"], "--out", run, "--by", "year", "-q"], capsys)[0] == 0
    code, _, err = cli(["slice", archive["first"], "--out", run, "--append", "-q"], capsys)
    assert code == 0, err
    assert "before the first slice 2003" in err and "--reference 2003" in err
    assert drift.slice_labels(run) == ["2001", "2002", "2003"]


@pytest.mark.slow
def test_grow_train_rank_trains_only_the_new_and_redone_slices(archive, tmp_path, capsys):
    run = tmp_path / "run"
    pair = ["--between", "2001", "2002"]
    assert cli(["slice", archive["first"], "--out", run, "-q"], capsys)[0] == 0
    code, out, err = cli(["train", run, *TINY, *pair], capsys)
    assert code == 0, err
    assert cli(["rank", run, *pair, "-q", "--output-format", "csv"], capsys)[0] == 0
    drift.export_vectors(run, tmp_path / "aligned-before", "npz")
    old = {path: digest(path) for label in ("2001", "2002") for path in model_files(run, label)}
    control = {path: digest(path) for path in sorted(RunPaths(run).control_dir.rglob("seed-*"))}
    assert len(old) == 2 * 3 and len(control) == 2 * 3  # .npy, .vocab.parquet, .json each

    # a new year: only its model is trained; the old models and the control pair are untouched
    assert cli(["slice", archive["later"], "--out", run, "--append", "-q"], capsys)[0] == 0
    code, out, err = cli(["train", run, *TINY, *pair], capsys)
    assert code == 0, err
    assert "1 trained, 4 reused" in out
    assert {path: digest(path) for path in old} == old
    assert {path: digest(path) for path in control} == control
    assert RunPaths(run).model_file("2003", 0).is_file()
    assert json.loads((RunPaths(run).models_dir / "2003" / "seed-0.json").read_text())

    # rank works over the three slices; the old slices' alignment onto the reference is the same
    code, out, err = cli(["rank", run, *pair, "-q", "--output-format", "csv"], capsys)
    assert code == 0, err
    timeline = drift.read_timeline(run)
    assert sorted(timeline["slice"].unique()) == ["2001", "2002", "2003"]
    drift.export_vectors(run, tmp_path / "aligned-after", "npz")
    for label in ("2001", "2002"):
        before = np.load(tmp_path / "aligned-before" / f"{label}.npz")
        after = np.load(tmp_path / "aligned-after" / f"{label}.npz")
        assert list(before["words"]) == list(after["words"])
        np.testing.assert_array_equal(before["vectors"], after["vectors"])

    # documents dated inside 2002: that slice is redone, and its model and the control pair
    # (drawn from 2002) are trained again; 2001 and 2003 are kept
    kept = {path: digest(path) for label in ("2001", "2003") for path in model_files(run, label)}
    redone = {path: digest(path) for path in model_files(run, "2002")}
    code, _, err = cli(["slice", archive["late2002"], "--out", run, "--append", "-q"], capsys)
    assert code == 0 and "2002: 20 documents" in err and "trains its models again" in err
    code, out, err = cli(["train", run, *TINY, *pair], capsys)
    assert code == 0, err
    assert "3 trained, 2 reused" in out  # 2002 and the two control models
    assert {path: digest(path) for path in kept} == kept
    assert all(digest(path) != redone[path] for path in redone if path.suffix == ".npy")
    assert cli(["rank", run, *pair, "-q", "--output-format", "csv"], capsys)[0] == 0


def test_run_grows_with_append_too(archive, tmp_path):
    """drift run passes --append to the slice stage (the library call it makes)."""
    run = tmp_path / "run"
    drift.slice_archive(archive["first"], run, quiet=True)
    summary = drift.slice_archive(archive["later"], run, append=True, quiet=True)
    assert summary.attrs["added"] == {"new": ["2003"], "redone": []}
    assert summary["label"].tolist() == ["2001", "2002", "2003"]


# ---------------------------------------------------------------------------- bad input


def assert_bad(args, capsys, *fragments) -> None:
    code, _, err = cli(args, capsys)
    assert code == 2, err
    assert err.startswith("drift: ") and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1, err
    for fragment in fragments:
        assert fragment in err, err


def test_append_refuses_what_it_cannot_keep(archive, tmp_path, capsys):
    empty = tmp_path / "nothing"
    assert_bad(["slice", archive["later"], "--out", empty, "--append"], capsys, "no slices")
    even = tmp_path / "even"
    assert cli(["slice", archive["first"], "--out", even, "--by", "even:2", "-q"], capsys)[0] == 0
    assert_bad(["slice", archive["later"], "--out", even, "--append"], capsys,
               "even:2", "Slice the whole archive again")
    balanced = tmp_path / "balanced"
    assert cli(["slice", archive["first"], "--out", balanced, "--balance", "-q"], capsys)[0] == 0
    assert_bad(["slice", archive["later"], "--out", balanced, "--append"], capsys, "--balance")
    yearly = tmp_path / "yearly"
    assert cli(["slice", archive["first"], "--out", yearly, "--meta", "desk", "-q"],
               capsys)[0] == 0
    assert_bad(["slice", archive["later"], "--out", yearly, "--append", "--by", "decade"],
               capsys, "--by decade", "'year'", "leave --by out")
    no_desk = tmp_path / "no-desk.csv"
    pd.read_csv(archive["later"]).drop(columns="desk").to_csv(no_desk, index=False)
    assert_bad(["slice", no_desk, "--out", yearly, "--append"], capsys, "desk")
    assert drift.slice_labels(yearly) == ["2001", "2002"]  # nothing was changed
