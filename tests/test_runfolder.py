"""The run folder module: paths, atomic writes, fingerprints, the manifest, the lock, safe names."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from drift import runfolder
from drift.errors import DriftError
from drift.runfolder import RunPaths

# ---------------------------------------------------------------------------- paths


def test_paths_follow_the_documented_layout(tmp_path):
    """The layout DEVELOPERS.md documents (the run folder contract)."""
    paths = RunPaths(str(tmp_path))  # a str root is accepted
    assert paths.root == tmp_path
    rel = {name: getattr(paths, name).relative_to(tmp_path).as_posix() for name in (
        "manifest", "slice_summary", "counts", "scores_parquet", "scores_csv",
        "timeline_parquet", "terms_parquet", "charts_dir", "word_charts_dir",
    )}
    assert rel == {
        "manifest": "run.json", "slice_summary": "slices/summary.csv",
        "counts": "counts.parquet", "scores_parquet": "scores.parquet",
        "scores_csv": "scores.csv", "timeline_parquet": "timeline.parquet",
        "terms_parquet": "terms.parquet", "charts_dir": "charts",
        "word_charts_dir": "charts/words",
    }
    assert paths.slice_file("1990s").relative_to(tmp_path).as_posix() == "slices/1990s.txt"
    assert paths.model_file("1990s", 1).relative_to(tmp_path).as_posix() == (
        "models/1990s/seed-1.npy"
    )
    assert paths.control_model_file("control-a", 0).relative_to(tmp_path).as_posix() == (
        "control/control-a/seed-0.npy"
    )


# ---------------------------------------------------------------------------- atomic writes


def test_atomic_write_replaces_the_target_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "deep" / "table.csv"
    runfolder.write_text_atomic(target, "a,b\n1,2\n")
    assert target.read_text(encoding="utf-8") == "a,b\n1,2\n"
    runfolder.write_text_atomic(target, "a,b\n3,4\n")
    assert target.read_text(encoding="utf-8") == "a,b\n3,4\n"
    assert [p.name for p in target.parent.iterdir()] == ["table.csv"]


def test_a_failed_write_keeps_the_old_file_whole(tmp_path):
    target = tmp_path / "scores.csv"
    target.write_text("old\n", encoding="utf-8")
    with pytest.raises(RuntimeError), runfolder.atomic_path(target) as tmp:
        tmp.write_text("half of the new", encoding="utf-8")
        raise RuntimeError("killed half-way")
    assert target.read_text(encoding="utf-8") == "old\n"
    assert [p.name for p in tmp_path.iterdir()] == ["scores.csv"]


def test_atomic_writes_keep_the_usual_file_mode(tmp_path):
    """A file written atomically gets the mode a plain open() would give (0666 less the umask),
    not mkstemp's private 0600."""
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    atomic = tmp_path / "atomic.txt"
    runfolder.write_text_atomic(atomic, "x")
    assert atomic.stat().st_mode & 0o777 == plain.stat().st_mode & 0o777


def test_json_round_trip(tmp_path):
    data = {"b": [1, 2], "a": {"word": "café"}, "path": Path("x")}
    runfolder.write_json_atomic(tmp_path / "r.json", data)
    assert json.loads((tmp_path / "r.json").read_text(encoding="utf-8")) == {
        "a": {"word": "café"}, "b": [1, 2], "path": "x",
    }


# ---------------------------------------------------------------------------- fingerprints


def test_file_fingerprint_sees_changes_at_both_ends(tmp_path):
    path = tmp_path / "big.txt"
    size = 3 << 20  # beyond the two MiB that are hashed
    path.write_bytes(b"a" * size)
    stat = path.stat()
    first = runfolder.fingerprint_file(path)
    assert runfolder.fingerprint_file(path) == first  # stable

    def rewrite(offset: int) -> str:
        data = bytearray(b"a" * size)
        data[offset] = ord("b")
        path.write_bytes(bytes(data))
        os.utime(path, ns=(stat.st_atime_ns, stat.st_mtime_ns))  # same size, same mtime
        return runfolder.fingerprint_file(path)

    assert rewrite(0) != first
    assert rewrite(size - 1) != first


def _run_with_file(root: Path, size: int) -> Path:
    root.mkdir(parents=True)
    (root / runfolder.MANIFEST_NAME).write_text("{}")
    (root / "slices").mkdir()
    path = root / "slices" / "a.txt"
    path.write_bytes(b"a" * size)
    return path


def test_content_print_sees_a_change_anywhere_but_not_a_new_modification_time(tmp_path):
    size = 3 << 20
    path = _run_with_file(tmp_path / "run", size)
    first = runfolder.content_print(path)
    os.utime(path, ns=(0, 10**18))  # only the modification time changes
    assert runfolder.content_print(path) == first
    copy = _run_with_file(tmp_path / "copy", 1)
    shutil.copyfile(path, copy)  # a copied run folder: same bytes, new times
    assert runfolder.content_print(copy) == first
    data = bytearray(path.read_bytes())
    data[size // 2] = ord("b")  # the middle, beyond the ends that fingerprint_file reads
    path.write_bytes(bytes(data))
    assert runfolder.content_print(path) != first


def test_content_print_reads_a_file_once_and_survives_a_read_only_folder(tmp_path, monkeypatch):
    path = _run_with_file(tmp_path / "run", 1000)
    first = runfolder.content_print(path)
    kept = json.loads((tmp_path / "run" / runfolder.DIGEST_CACHE).read_text())
    stat = path.stat()
    assert kept == {"slices/a.txt": [stat.st_size, stat.st_mtime_ns, first]}
    runfolder._DIGESTS.clear()  # a new process: the digest comes from the cache, not the bytes
    monkeypatch.setattr(runfolder.hashlib, "blake2b",
                        lambda *a, **k: pytest.fail("the file was read again"))
    assert runfolder.content_print(path) == first
    monkeypatch.undo()

    def refuse(*args, **kwargs):
        raise PermissionError("read-only")

    monkeypatch.setattr(runfolder, "write_text_atomic", refuse)
    path.write_bytes(b"b" * 1000)
    assert runfolder.content_print(path) != first


def test_folder_fingerprint_includes_names(tmp_path):
    folder = tmp_path / "f"
    folder.mkdir()
    (folder / "a.txt").write_text("x")
    before = runfolder.fingerprint_path(folder)
    (folder / "a.txt").rename(folder / "b.txt")
    assert runfolder.fingerprint_path(folder) != before


def test_parameter_fingerprint_ignores_key_order():
    one = runfolder.fingerprint_params({"dim": 100, "window": 5})
    assert one == runfolder.fingerprint_params({"window": 5, "dim": 100})
    assert one != runfolder.fingerprint_params({"window": 5, "dim": 101})


# ---------------------------------------------------------------------------- manifest


def test_recorded_library_versions_are_those_the_libraries_report():
    """Read from package metadata without importing; each equals the module's __version__."""
    import gensim
    import numpy
    import pandas
    import scipy

    versions = runfolder.library_versions()
    for module in (numpy, scipy, pandas, gensim):
        assert versions[module.__name__] == module.__version__


def test_a_stage_is_current_only_with_the_same_params_and_inputs(tmp_path):
    runfolder.record_stage(tmp_path, "train", {"dim": 8}, "inputs-1", 1.23456, {"labels": ["a"]})
    manifest = runfolder.read_manifest(tmp_path)
    stage = manifest["stages"]["train"]
    assert stage["params"] == {"dim": 8} and stage["labels"] == ["a"]
    assert stage["seconds"] == 1.235
    assert manifest["format_version"] == runfolder.RUN_FORMAT_VERSION
    assert {"drift", "python", "numpy", "gensim"} <= set(manifest["versions"])
    assert runfolder.stage_is_current(tmp_path, "train", {"dim": 8}, "inputs-1")
    assert not runfolder.stage_is_current(tmp_path, "train", {"dim": 9}, "inputs-1")
    assert not runfolder.stage_is_current(tmp_path, "train", {"dim": 8}, "inputs-2")
    assert not runfolder.stage_is_current(tmp_path, "rank", {}, "")
    runfolder.forget_stage(tmp_path, "train")
    assert not runfolder.stage_is_current(tmp_path, "train", {"dim": 8}, "inputs-1")


def test_unreadable_or_foreign_manifests_are_plain_errors(tmp_path):
    assert runfolder.read_manifest(tmp_path)["stages"] == {}  # none yet: a new one
    (tmp_path / "run.json").write_text("{not json")
    with pytest.raises(DriftError, match="is not a readable run manifest"):
        runfolder.read_manifest(tmp_path)
    (tmp_path / "run.json").write_text(json.dumps({"format_version": 99, "stages": {}}))
    reads = runfolder.RUN_FORMAT_VERSION
    with pytest.raises(DriftError, match=rf"run format 99, this version reads {reads}"):
        runfolder.read_manifest(tmp_path)


def test_folder_checks(tmp_path):
    afile = tmp_path / "file"
    afile.write_text("x")
    with pytest.raises(DriftError, match="is a file, not a folder"):
        runfolder.prepare_run_folder(afile)
    with pytest.raises(DriftError, match="does not exist; make it with 'drift slice"):
        runfolder.existing_run(tmp_path / "missing")
    fresh = runfolder.prepare_run_folder(tmp_path / "run").root
    with pytest.raises(DriftError, match="has no slices yet"):
        runfolder.existing_run(fresh, needs="slices")
    with pytest.raises(DriftError, match="has no trained models yet"):
        runfolder.existing_run(fresh, needs="models")
    with pytest.raises(DriftError, match="has no scores yet"):
        runfolder.existing_run(fresh, needs="scores")


# ---------------------------------------------------------------------------- the lock

_HOLD_LOCK = """
import sys, time
from drift import runfolder
with runfolder.run_lock(sys.argv[1]):
    print("locked", flush=True)
    time.sleep(60)
"""


def test_a_second_writer_is_refused_while_the_first_lives(tmp_path):
    holder = subprocess.Popen([sys.executable, "-c", _HOLD_LOCK, str(tmp_path)],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"  # waits until the lock is held
        in_use = rf"in use by another drift process \(pid {holder.pid}\)"
        with pytest.raises(DriftError, match=in_use), runfolder.run_lock(tmp_path):
            pass
    finally:
        holder.kill()
        holder.wait()
    # the holder was killed: its lock is stale and is taken over
    assert (tmp_path / runfolder.LOCK_NAME).exists()
    with runfolder.run_lock(tmp_path):
        record = json.loads((tmp_path / runfolder.LOCK_NAME).read_text())
        assert record["pid"] == os.getpid()  # with the host and start time beside it
    assert not (tmp_path / runfolder.LOCK_NAME).exists()


def test_the_lock_is_reentrant_in_one_process_and_freed_on_error(tmp_path):
    with pytest.raises(RuntimeError):
        with runfolder.run_lock(tmp_path):
            with runfolder.run_lock(tmp_path):  # a stage calling another stage's writer
                pass
            assert (tmp_path / runfolder.LOCK_NAME).exists()
            raise RuntimeError("stage failed")
    assert not (tmp_path / runfolder.LOCK_NAME).exists()


def test_a_lock_left_by_a_dead_process_is_taken_over(tmp_path):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    pid = int(dead.stdout)
    deadline = time.monotonic() + 5
    while runfolder._pid_alive(pid) and time.monotonic() < deadline:
        time.sleep(0.05)
    (tmp_path / runfolder.LOCK_NAME).write_text(str(pid))
    with runfolder.run_lock(tmp_path):
        pass
    assert not (tmp_path / runfolder.LOCK_NAME).exists()


# ---------------------------------------------------------------------------- safe names


@pytest.mark.parametrize(
    "word", ["tablet", "../../etc/passwd", "<script>alert(1)</script>", "café", "日本語", "",
             "CON", "a" * 500, "white space", ".hidden"],
)
def test_safe_names_are_plain_short_file_names(word):
    name = runfolder.safe_name(word)
    assert re.fullmatch(r"[a-z0-9-]+", name), name
    assert len(name) <= 40 + 9
    assert not name.startswith("-") and "/" not in name


def test_safe_names_keep_different_words_apart():
    words = ["Tablet", "tablet", "tab-let", "tab let", "tab_let", "日本", "中国", "../x", "x"]
    names = [runfolder.safe_name(w) for w in words]
    assert len(set(names)) == len(words)
    assert runfolder.safe_name("tablet") == runfolder.safe_name("tablet")  # the same every time


# ---------------------------------------------------------------------------- table contract


def _check_every_table(root: Path) -> set[str]:
    """Read every table the run holds through the contract's reader (which checks the columns
    against runfolder.TABLES); return the names found."""
    found = set()
    for name, schema in runfolder.TABLES.items():
        if schema.path(root).is_file():
            frame = runfolder.read_table(root, name)
            schema.check(frame)
            if schema.csv_twin:
                import pandas as pd

                twin = pd.read_csv(root / schema.csv_twin, nrows=1)
                assert list(twin.columns) == list(frame.columns), name
            found.add(name)
    return found


@pytest.fixture(scope="module")
def staged_run(tmp_path_factory):
    """A run made by drift's own slice, train and rank stages from real text: gensim's bundled
    Lee background corpus (300 news documents) given dates in 1990-2009 and a metadata column."""
    import pandas as pd
    from gensim.test.utils import datapath

    import drift

    with open(datapath("lee_background.cor"), encoding="utf-8") as handle:
        texts = [line.strip() for line in handle if line.strip()]
    frame = pd.DataFrame({
        "id": [f"doc-{i}" for i in range(len(texts))],
        "date": [f"{1990 + (i * 7) % 20}-06-01" for i in range(len(texts))],
        "desk": ["home" if i % 3 else "abroad" for i in range(len(texts))],
        "text": texts,
    })
    base = tmp_path_factory.mktemp("staged")
    frame.to_csv(base / "lee.csv", index=False)
    run = base / "run"
    drift.slice_archive(base / "lee.csv", run, by="decade", id_col="id", meta=["desk"],
                        quiet=True)
    drift.train_run(run, dim=16, epochs=2, seeds=2, min_count=3, quiet=True)
    drift.rank_run(run, k=10, quiet=True)
    return run


def test_the_stages_write_every_table_as_the_contract_declares(staged_run):
    assert _check_every_table(staged_run) == set(runfolder.TABLES)


def test_the_test_fixtures_write_tables_the_contract_accepts(tmp_path):
    """The fixtures write through the same writers, so their tables pass the same check."""
    from chart_run_fixture import fixture_run_copy
    from train_fixtures import make_run

    charts = fixture_run_copy(tmp_path / "charts")
    assert {"summary", "counts", "scores", "timeline", "terms", "neighbours"} <= (
        _check_every_table(charts)
    )
    trained = make_run(tmp_path / "train", {"2001": ["a b c"], "2002": ["c d e"]})
    assert "summary" in _check_every_table(trained)


def test_a_table_off_the_contract_is_refused_on_write_and_on_read(tmp_path):
    import pandas as pd

    invented = pd.DataFrame({"word": ["a"], "score": [1.0]})
    with pytest.raises(DriftError, match="lacks the column"):
        runfolder.write_table(tmp_path, "scores", invented)
    assert not (tmp_path / "scores.parquet").exists()
    extra = pd.DataFrame({c: [0] for c in runfolder.NEIGHBOUR_COLUMNS + ("bonus",)})
    with pytest.raises(DriftError, match="bonus"):
        runfolder.write_table(tmp_path, "neighbours", extra)
    invented.to_parquet(tmp_path / "scores.parquet")  # written by hand, past the writer
    with pytest.raises(DriftError, match="rerun 'drift rank'"):
        runfolder.read_table(tmp_path, "scores")


def test_a_missing_table_names_the_command_that_writes_it(tmp_path):
    with pytest.raises(DriftError, match="run 'drift slice'"):
        runfolder.read_table(tmp_path, "counts")


def test_a_text_label_stays_text(tmp_path):
    """Slice labels such as 1990 read back as text from the CSV summary, not as numbers."""
    import pandas as pd

    runfolder.write_table(tmp_path, "summary", pd.DataFrame(
        {"label": ["1990", "2000"], "start": ["1990-01-01", "2000-01-01"],
         "end": ["1999-12-31", "2009-12-31"], "documents": [1, 1], "tokens": [5, 5],
         "types": [5, 5], "dropped": [0, 0]}))
    assert runfolder.read_table(tmp_path, "summary")["label"].tolist() == ["1990", "2000"]
    assert runfolder.slice_labels(tmp_path) == ["1990", "2000"]
