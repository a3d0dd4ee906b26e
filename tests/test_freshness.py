"""What --out may be, the lock across hosts, and stale results at every stage boundary."""

from __future__ import annotations

import json
import os
import platform
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from drift import runfolder
from drift.cli import main
from drift.compare.ranking import read_scores
from drift.errors import DriftError
from drift.pipeline import run_all

TINY_TRAIN = {"dim": 10, "epochs": 1, "seeds": 1, "min_count": 5, "workers": 1}


def _drift(args, capsys) -> tuple[int, str, str]:
    code = 0
    try:
        main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    captured = capsys.readouterr()
    return code, captured.out, captured.err


# ---------------------------------------------------------------------------- --out


def test_out_holding_user_files_is_refused_before_anything_is_written(
    small_demo_archive, tmp_path, capsys
):
    mine = tmp_path / "mydocs"
    (mine / "slices").mkdir(parents=True)
    (mine / "charts").mkdir()
    (mine / "slices" / "1900s.txt").write_text("my own notes")
    (mine / "charts" / "index.html").write_text("<p>my page</p>")
    (mine / "scores.csv").write_text("mine,1\n")
    before = {p: p.read_bytes() for p in mine.rglob("*") if p.is_file()}
    code, _, err = _drift(["run", small_demo_archive, "--out", mine, "-q"], capsys)
    assert code == 2
    assert "already holds files that drift did not write" in err
    assert "charts/" in err and "scores.csv" in err and "slices/" in err
    after = {p: p.read_bytes() for p in mine.rglob("*") if p.is_file()}
    assert after == before  # nothing written, nothing changed


def test_out_may_be_new_empty_or_a_run_folder(tmp_path):
    runfolder.prepare_run_folder(tmp_path / "new" / "run")
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / ".DS_Store").write_bytes(b"")
    paths = runfolder.prepare_run_folder(empty)
    assert paths.manifest.is_file()  # marked as a run folder at once
    runfolder.prepare_run_folder(empty)  # and so accepted again
    with pytest.raises(DriftError, match="is a file, not a folder"):
        runfolder.prepare_run_folder(empty / "run.json")


def test_export_out_holding_other_files_is_refused(tmp_path):
    folder = tmp_path / "vectors"
    folder.mkdir()
    (folder / "1990.txt").write_text("someone else's vectors")
    with pytest.raises(DriftError, match=r"already holds files .*1990\.txt"):
        runfolder.prepare_export_folder(folder)
    assert (folder / "1990.txt").read_text() == "someone else's vectors"


# ---------------------------------------------------------------------------- the lock


def test_a_lock_held_by_another_process_is_refused_and_released_after(tmp_path):
    root = tmp_path / "run"
    root.mkdir()
    holder = subprocess.Popen(
        [
            sys.executable,
            "-c",
            "import sys, time; from drift import runfolder\n"
            "with runfolder.run_lock(sys.argv[1]):\n"
            "    print('held', flush=True); time.sleep(60)\n",
            str(root),
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        record = json.loads((root / runfolder.LOCK_NAME).read_text())
        assert record["pid"] == holder.pid and record["host"] == platform.node()
        with pytest.raises(DriftError, match=f"in use by another drift process .pid {holder.pid}"):
            with runfolder.run_lock(root):
                pass
    finally:
        holder.kill()
        holder.wait()
    with runfolder.run_lock(root):  # the OS released the killed holder's lock
        with runfolder.run_lock(root):  # re-entrant within one process
            pass
    assert not (root / runfolder.LOCK_NAME).exists()


def test_a_lock_recorded_by_another_host_is_never_taken_over(tmp_path):
    root = tmp_path / "run"
    root.mkdir()
    # What a drift on another machine leaves while it runs on a shared folder whose locks this
    # machine may not see: the OS lock looks free here, the record says otherwise.
    record = {"host": "other-node-17", "pid": os.getpid(), "since": "2026-01-01T00:00:00"}
    (root / runfolder.LOCK_NAME).write_text(json.dumps(record))
    with pytest.raises(DriftError, match="held by drift pid .* on host other-node-17"):
        with runfolder.run_lock(root):
            pass
    assert json.loads((root / runfolder.LOCK_NAME).read_text()) == record  # untouched


def test_a_stale_lock_of_a_dead_process_on_this_host_is_taken(tmp_path):
    root = tmp_path / "run"
    root.mkdir()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (root / runfolder.LOCK_NAME).write_text(json.dumps({"host": platform.node(), "pid": dead.pid}))
    with runfolder.run_lock(root):
        assert json.loads((root / runfolder.LOCK_NAME).read_text())["pid"] == os.getpid()


# ---------------------------------------------------------------------------- freshness


@pytest.fixture(scope="module")
def ranked(small_demo_archive, tmp_path_factory) -> Path:
    """A whole tiny run (slice by decade, one small model per slice, rank, report)."""
    out = tmp_path_factory.mktemp("fresh") / "run"
    run_all(
        small_demo_archive,
        out,
        slice_options={"by": "decade"},
        train_options=TINY_TRAIN,
        rank_options={"k": 10},
        report_top=3,
        quiet=True,
    )
    return out


@pytest.fixture
def run(ranked, tmp_path) -> Path:
    return Path(shutil.copytree(ranked, tmp_path / "run"))


def test_stage_boundaries_are_recorded(run):
    stages = runfolder.read_manifest(run)["stages"]
    assert stages["train"]["made_from"] == {"slice": stages["slice"]["fingerprint"]}
    assert stages["rank"]["made_from"] == {
        "slice": stages["slice"]["fingerprint"],
        "train": stages["train"]["fingerprint"],
    }
    assert stages["charts"]["made_from"] == {"rank": stages["rank"]["fingerprint"]}
    assert set(stages["rank"]["files"]) == {
        "scores.parquet",
        "scores.csv",
        "timeline.parquet",
        "timeline.csv",
        "terms.parquet",
        "neighbours.parquet",
        "terms.csv",
    }
    for stage in ("train", "rank", "charts"):
        assert runfolder.stale_reason(run, stage) is None


def test_a_copied_run_folder_keeps_its_models_and_scores(ranked, tmp_path, capsys):
    """A run folder copied without its modification times (cp -r, a download) is still current:
    its stages record what the files hold, not when they were written."""
    copy = Path(shutil.copytree(ranked, tmp_path / "copy", copy_function=shutil.copyfile))
    (copy / runfolder.DIGEST_CACHE).unlink()  # as if it had not been copied either
    tiny = ["--dim", "10", "--epochs", "1", "--seeds", "1", "--min-count", "5", "--workers", "1"]
    code, out, err = _drift(["train", copy, *tiny], capsys)
    assert code == 0, err
    assert " 0 trained" in out
    code, _, err = _drift(["rank", copy, "--k", "10", "--top", "3"], capsys)
    assert code == 0, err
    assert "are current; reusing them" in err
    for stage in ("train", "rank", "charts"):
        assert runfolder.stale_reason(copy, stage) is None


def test_slice_to_train_boundary(run, small_demo_archive, capsys):
    """New slices make the models stale: rank and neighbours name 'drift train'."""
    code, _, err = _drift(
        ["slice", small_demo_archive, "--out", run, "--by", "decade", "--keep-case", "-q"], capsys
    )
    assert code == 0, err
    assert not (run / "charts" / "index.html").exists()  # pages of old results are gone
    for command in (["rank", run, "-q"], ["neighbours", run, "harbour"]):
        code, _, err = _drift(command, capsys)
        assert code == 2, err
        assert "out of date" in err and f"rerun 'drift train {run}'" in err


def test_train_to_rank_boundary_chart_after_a_retrain(run, capsys):
    """The reported case: 'drift chart' after 'drift train --dim 20' showed old numbers."""
    word = str(pd.read_parquet(run / "scores.parquet")["word"].iloc[0])
    code, _, err = _drift(
        [
            "train",
            run,
            "--dim",
            "20",
            "--epochs",
            "1",
            "--seeds",
            "1",
            "--min-count",
            "5",
            "--workers",
            "1",
            "-q",
        ],
        capsys,
    )
    assert code == 0, err
    assert not list((run / "charts" / "words").glob("*.html"))
    for command in (["chart", run, word], ["report", run]):
        code, _, err = _drift(command, capsys)
        assert code == 2, err
        assert f"rerun 'drift rank {run}'" in err and "'drift train' ran again" in err
    with pytest.raises(DriftError, match="drift rank"):
        read_scores(run)
    code, _, err = _drift(["rank", run, "--k", "10", "-q", "--format", "csv"], capsys)
    assert code == 0, err
    scores = pd.read_parquet(run / "scores.parquet").set_index("word")
    code, out, err = _drift(["chart", run, word], capsys)
    assert code == 0, err
    page = Path(out.strip().splitlines()[-1]).read_text(encoding="utf-8")
    assert f"{scores.loc[word, 'displacement']:.3f}" in page


def test_rank_to_neighbours_boundary(run, capsys):
    """neighbours.parquet (written by rank) is not shown once the models changed: the
    neighbours are recomputed from the models there now."""
    from drift.compare import neighbours

    stored = neighbours.read_neighbours(run)
    word = str(stored["word"].iloc[0])
    code, _, err = _drift(
        [
            "train",
            run,
            "--dim",
            "20",
            "--epochs",
            "1",
            "--seeds",
            "1",
            "--min-count",
            "5",
            "--workers",
            "1",
            "-q",
        ],
        capsys,
    )
    assert code == 0, err
    assert neighbours.read_neighbours(run) is None  # the stale table is not used
    shown = neighbours.word_neighbours(run, word, k=5)
    fresh = neighbours.compute_neighbours(neighbours.load_run_models(run), [word], 5)
    assert shown["neighbour"].tolist() == fresh["neighbour"].tolist()
    old = stored[(stored["word"] == word) & (stored["rank"] <= 5)]
    assert shown["neighbour"].tolist() != old["neighbour"].tolist()


def test_rank_to_charts_boundary(run, capsys):
    """A new ranking removes the pages made from the old one; the report remakes them."""
    assert (run / "charts" / "index.html").exists()
    code, _, err = _drift(["rank", run, "--k", "12", "-q", "--format", "csv"], capsys)
    assert code == 0, err
    assert not (run / "charts" / "index.html").exists()
    assert "charts" not in runfolder.read_manifest(run)["stages"]
    code, _, err = _drift(["report", run], capsys)
    assert code == 0, err
    assert runfolder.stale_reason(run, "charts") is None


def test_a_changed_scores_file_is_stale_and_rank_recomputes_it(run, capsys):
    scores = pd.read_parquet(run / "scores.parquet")
    scores.loc[0, "displacement"] = 9.0
    scores.to_parquet(run / "scores.parquet", index=False)
    code, _, err = _drift(["rank", run, "--k", "10", "--format", "json", "-q"], capsys)
    # same options as before: the stage would be reused, but its file no longer matches
    assert code == 0, err
    assert 9.0 not in pd.read_parquet(run / "scores.parquet")["displacement"].to_list()
    assert runfolder.stale_reason(run, "rank") is None
    (run / "timeline.parquet").write_bytes(b"not the table rank wrote")
    code, _, err = _drift(["chart", run, str(scores["word"].iloc[1])], capsys)
    assert code == 2 and "timeline.parquet changed after the rank stage wrote it" in err


def test_rank_to_export_boundary(run, tmp_path, capsys):
    out = tmp_path / "vectors"
    code, _, err = _drift(["export", run, "--format", "npz", "--out", out], capsys)
    assert code == 0, err
    record = json.loads((out / runfolder.EXPORT_MANIFEST).read_text())
    train = runfolder.read_manifest(run)["stages"]["train"]["fingerprint"]
    assert record["made_from"]["train"] == train
    assert set(record["files"]) == {p.name for p in out.glob("*.npz")}
    code, _, err = _drift(["export", run, "--format", "npz", "--out", out], capsys)
    assert code == 0, err  # an earlier export folder may be written again


class _Planted:
    """Unpickling this creates a file: proof that a loader ran code from a shared run."""

    def __init__(self, marker: str) -> None:
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_opening_a_shared_run_with_a_tampered_model_runs_nothing(run, tmp_path, capsys):
    import pickle

    marker = tmp_path / "code-ran"
    (run / "models" / "1970s" / "seed-0.npy").write_bytes(pickle.dumps(_Planted(str(marker))))
    for command in (["neighbours", run, "harbour"], ["rank", run, "--k", "11", "-q"]):
        code, _, err = _drift(command, capsys)
        assert code == 2 and "seed-0.npy is not a model file as drift writes it" in err
        assert "nothing in it was run" in err
    assert not marker.exists()
