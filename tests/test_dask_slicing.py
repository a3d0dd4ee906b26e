"""`drift slice --engine dask` writes the same run folder as the local engine.

A LocalCluster of two threads in this process (``processes=False``) keeps the test fast; the
tasks go through Dask's scheduler and are pickled all the same. The text is gensim's bundled news
corpus (``lee_background.cor``) split into parts of different formats.
"""

from __future__ import annotations

import filecmp
import json
import re
from pathlib import Path

import pytest
from test_sources import lee_frame, write_parts

from drift.cli import main
from drift.errors import DriftError
from drift.ingest import dask_slicing
from drift.ingest.slicing import _Settings, parse_by, slice_archive

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
    ) as local:
        yield local


@pytest.fixture(scope="module")
def parts(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("dask") / "parts"
    write_parts(lee_frame(), folder)
    return folder


def run_files(run: Path) -> dict[str, Path]:
    """Every file of a run folder but run.json (which records times), by relative path."""
    return {
        p.relative_to(run).as_posix(): p
        for p in run.rglob("*")
        if p.is_file() and p.name not in ("run.json", ".lock")
    }


def assert_same_run(local: Path, dask: Path) -> None:
    """Same files, byte for byte, and the same slice record (params, labels, totals)."""
    ours, theirs = run_files(local), run_files(dask)
    assert sorted(ours) == sorted(theirs)
    for name, path in ours.items():
        assert filecmp.cmp(path, theirs[name], shallow=False), name
    records = [
        json.loads((run / "run.json").read_text())["stages"]["slice"] for run in (local, dask)
    ]
    for key in ("params", "labels", "totals", "inputs", "sources"):
        assert records[0].get(key) == records[1].get(key), key
    assert records[1]["engine"] == "dask"


@pytest.mark.parametrize(
    "options",
    [
        {"by": "5y", "meta": ["desk"]},
        {"by": "year", "balance": "smallest", "balance_by": "desk"},
        {"by": "even:3", "where": ["desk!=sport"]},
    ],
    ids=["5y-meta", "balanced", "even"],
)
def test_dask_slices_equal_the_local_engine(parts, cluster, tmp_path, options):
    slice_archive(parts, tmp_path / "local", quiet=True, **options)
    summary = slice_archive(parts, tmp_path / "dask", quiet=True, engine="dask",
                            scheduler=cluster.scheduler_address, **options)
    assert summary["tokens"].sum() > 0
    assert_same_run(tmp_path / "local", tmp_path / "dask")
    assert not list((tmp_path / "dask" / "slices").glob(".work-*")), "work folders are removed"


def test_one_file_on_dask_equals_local(tmp_path, cluster):
    whole = tmp_path / "whole.csv"
    lee_frame().to_csv(whole, index=False)
    slice_archive(whole, tmp_path / "local", by="5y", quiet=True)
    slice_archive(whole, tmp_path / "dask", by="5y", quiet=True, engine="dask",
                  scheduler=cluster.scheduler_address)
    assert_same_run(tmp_path / "local", tmp_path / "dask")


def test_a_task_run_twice_writes_its_part_once(parts, tmp_path):
    """A task run again after its worker was lost starts from an empty part folder."""
    from drift.ingest.sources import open_sources

    reader, _ = open_sources(parts)
    settings = _Settings(parse_by("5y"), None, False, False)
    tasks = dask_slicing.plan_tasks(reader, tmp_path, settings, fmt=None, encoding=None,
                                    delimiter=None)
    first = dask_slicing.slice_part(tasks[1])
    sizes = {p.name: p.stat().st_size for p in Path(tasks[1]["folder"]).iterdir()}
    second = dask_slicing.slice_part(tasks[1])
    assert {p.name: p.stat().st_size for p in Path(tasks[1]["folder"]).iterdir()} == sizes
    assert first["keys"] == second["keys"] and first["replaced"] == second["replaced"]
    assert len(first["outcomes"]) == len(second["outcomes"]) >= 1


def test_cli_engine_dask_with_a_scheduler(parts, cluster, tmp_path, capsys):
    with pytest.raises(SystemExit) as done:
        main(["slice", str(parts / "*"), "--out", str(tmp_path / "run"), "--by", "5y",
              "--engine", "dask", "--scheduler", cluster.scheduler_address, "-q"])
    assert done.value.code == 0
    assert "1990-1994" in capsys.readouterr().out


def test_unreachable_scheduler_and_bad_file_are_one_sentence(parts, cluster, tmp_path):
    with pytest.raises(DriftError, match="Could not reach the Dask scheduler at tcp://127.0.0.1:9"):
        slice_archive(parts, tmp_path / "run", quiet=True, engine="dask",
                      scheduler="tcp://127.0.0.1:9")
    folder = tmp_path / "bad"
    write_parts(lee_frame(), folder)
    (folder / "p1.jsonl").write_text('{"date": "1990", "text": "fine"}\nnot json\n')
    with pytest.raises(DriftError, match=r"Line 2 of .*p1\.jsonl is not valid JSON"):
        slice_archive(folder, tmp_path / "run2", quiet=True, engine="dask",
                      scheduler=cluster.scheduler_address)


@pytest.fixture()
def small_pieces(monkeypatch):
    """Files over 40 kB are read in pieces of about 40 kB (the default is 64 MB)."""
    monkeypatch.setattr(dask_slicing, "PIECE_BYTES", 40_000)


def write_pieced_sources(folder: Path, frame) -> None:
    """The frame as one JSON Lines file (about 150 kB) and one Parquet file of many row
    groups: both larger than the pieces."""
    folder.mkdir(parents=True, exist_ok=True)
    half = len(frame) // 2
    with (folder / "a.jsonl").open("w", encoding="utf-8") as handle:
        for record in frame.iloc[:half].to_dict("records"):
            handle.write(json.dumps(record, ensure_ascii=False) + "\n")
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pandas(frame.iloc[half:], preserve_index=False),
                   folder / "b.parquet", row_group_size=20)


def test_large_files_in_pieces_equal_the_local_engine(tmp_path, cluster, small_pieces):
    folder = tmp_path / "big"
    write_pieced_sources(folder, lee_frame())
    reader, _ = __import__("drift.ingest.sources", fromlist=["open_sources"]).open_sources(folder)
    tasks = dask_slicing.plan_tasks(reader, tmp_path / "work", None, fmt=None, encoding=None,
                                    delimiter=None)
    assert len(tasks) > 4 and [t["file"] for t in tasks] == sorted(t["file"] for t in tasks)
    for options in ({"by": "5y", "meta": ["desk"]}, {"by": "even:2", "balance": "smallest"}):
        slice_archive(folder, tmp_path / "local", quiet=True, **options)
        slice_archive(folder, tmp_path / "dask", quiet=True, engine="dask",
                      scheduler=cluster.scheduler_address, **options)
        assert_same_run(tmp_path / "local", tmp_path / "dask")


def errors_of_both_engines(source: Path, tmp_path: Path, cluster) -> list[str]:
    """The error each engine stops with when slicing ``source`` by 5 years (local, then dask)."""
    messages = []
    for engine in ("local", "dask"):
        extra = {"scheduler": cluster.scheduler_address} if engine == "dask" else {}
        with pytest.raises(DriftError) as failed:
            slice_archive(source, tmp_path / f"bad-{engine}", by="5y", quiet=True,
                          engine=engine, **extra)
        messages.append(str(failed.value))
    return messages


def test_large_csv_in_pieces_equals_the_local_engine(tmp_path, cluster, small_pieces):
    """A CSV whose quoted fields hold commas, line breaks and doubled quotes is split at rows
    (readers.csv_row_starts), and the run folder is the local engine's, byte for byte; a bad
    row in a later piece is named by its line in the whole file."""
    from test_readers import awkward_csv

    folder = tmp_path / "csv"
    folder.mkdir()
    path = awkward_csv(folder / "news.csv", rows=900)
    reader, _ = __import__("drift.ingest.sources", fromlist=["open_sources"]).open_sources(path)
    tasks = dask_slicing.plan_tasks(reader, tmp_path / "work", None, fmt=None, encoding=None,
                                    delimiter=None)
    assert len(tasks) > 4
    slice_archive(path, tmp_path / "local", by="5y", quiet=True)
    slice_archive(path, tmp_path / "dask", by="5y", quiet=True, engine="dask",
                  scheduler=cluster.scheduler_address)
    assert_same_run(tmp_path / "local", tmp_path / "dask")
    data = path.read_bytes()
    cut = tasks[-2]["piece"][0]
    path.write_bytes(data[:cut] + b"1995,one,two,three\n" + data[cut:])
    messages = errors_of_both_engines(path, tmp_path, cluster)
    assert messages[0] == messages[1]


def test_a_piece_that_is_not_utf8_or_fails_reads_the_file_whole(tmp_path, cluster, small_pieces):
    """Bytes that are not UTF-8 are read by what came before them (detection), and an error
    names its line in the file: both come out as the local engine has them."""
    folder = tmp_path / "odd"
    write_pieced_sources(folder, lee_frame())
    data = (folder / "a.jsonl").read_bytes()
    cut = data.index(b"\n", len(data) * 2 // 3) + 1
    odd = data[:cut] + b'{"date": "1995", "text": "caf\\u00e9", "desk": "x"}\n' \
        .replace(b"\\u00e9", b"\xe9") + data[cut:]
    (folder / "a.jsonl").write_bytes(odd)  # a cp1252/Latin-1 byte in the last piece
    slice_archive(folder, tmp_path / "local", by="5y", quiet=True)
    slice_archive(folder, tmp_path / "dask", by="5y", quiet=True, engine="dask",
                  scheduler=cluster.scheduler_address)
    assert_same_run(tmp_path / "local", tmp_path / "dask")
    (folder / "a.jsonl").write_bytes(data[:cut] + b"not json\n" + data[cut:])
    line = data[:cut].count(b"\n") + 1
    for engine in ("local", "dask"):
        extra = {"scheduler": cluster.scheduler_address} if engine == "dask" else {}
        with pytest.raises(DriftError, match=rf"Line {line} of .*a\.jsonl is not valid JSON"):
            slice_archive(folder, tmp_path / f"bad-{engine}", by="5y", quiet=True,
                          engine=engine, **extra)


def test_large_compressed_files_in_pieces_equal_the_local_engine(tmp_path, cluster,
                                                                  small_pieces, monkeypatch):
    """A compressed CSV (gzip) and JSON Lines file (xz) larger than INFLATE_BYTES are
    decompressed once and read in pieces: the run folder is the local engine's, byte for byte,
    documents keep their file's name, and no decompressed copy is left; a bad row in a later
    piece is named by its line in the original file, as the local engine names it."""
    import gzip
    import lzma

    from test_readers import awkward_csv

    monkeypatch.setattr(dask_slicing, "INFLATE_BYTES", 10_000)
    folder = tmp_path / "packed"
    folder.mkdir()
    plain = awkward_csv(tmp_path / "news.csv", rows=900)
    (folder / "news.csv.gz").write_bytes(gzip.compress(plain.read_bytes()))
    write_pieced_sources(tmp_path / "json", lee_frame())
    lines = (tmp_path / "json" / "a.jsonl").read_bytes()
    (folder / "wire.jsonl.xz").write_bytes(lzma.compress(lines))
    reader, _ = __import__("drift.ingest.sources", fromlist=["open_sources"]).open_sources(folder)
    tasks = dask_slicing.plan_tasks(reader, tmp_path / "work" / "pass", None, fmt=None,
                                    encoding=None, delimiter=None)
    assert {t["file"] for t in tasks} == {0, 1} and len(tasks) > 6
    assert all(t["original"].endswith((".gz", ".xz")) for t in tasks)
    for options in ({"by": "5y"}, {"by": "even:2", "balance": "smallest"}):
        slice_archive(folder, tmp_path / "local", quiet=True, **options)
        slice_archive(folder, tmp_path / "dask", quiet=True, engine="dask",
                      scheduler=cluster.scheduler_address, **options)
        assert_same_run(tmp_path / "local", tmp_path / "dask")
        assert not (tmp_path / "dask" / "slices" / ".dask-parts").exists()
    data = plain.read_bytes()
    cut = [t for t in tasks if t["file"] == 0][-2]["piece"][0]
    (folder / "news.csv.gz").write_bytes(
        gzip.compress(data[:cut] + b"1995,one,two,three\n" + data[cut:]))
    messages = errors_of_both_engines(folder, tmp_path, cluster)
    assert messages[0] == messages[1] and "news.csv.gz" in messages[0]


def test_a_local_cluster_gets_a_worker_per_task_not_per_file(tmp_path, small_pieces, parts,
                                                             monkeypatch):
    """One large file read in pieces keeps more than one worker busy: the LocalCluster's size
    is capped by the tasks the archive can have (at least as many as plan_tasks makes), not by
    its files."""
    from drift.ingest.sources import open_sources

    for source in (tmp_path / "big", parts):
        if source.name == "big":
            write_pieced_sources(source, lee_frame())
        reader, _ = open_sources(source)
        tasks = dask_slicing.plan_tasks(reader, tmp_path / "work" / source.name, None,
                                        fmt=None, encoding=None, delimiter=None)
        files = len(reader.readers) if hasattr(reader, "readers") else 1
        assert len(tasks) <= dask_slicing.most_tasks(reader)
        assert dask_slicing.most_tasks(reader) >= files
    assert dask_slicing.most_tasks(reader) > files  # pieces of 40 kB: several per part
    monkeypatch.setattr(dask_slicing, "PIECE_BYTES", 64 << 20)
    assert dask_slicing.most_tasks(reader) == files  # pieces of 64 MB: one task per part


def test_a_damaged_compressed_file_is_not_decompressed(tmp_path, monkeypatch):
    """A packed file that breaks off after its first megabytes is not decompressed for pieces
    (no copy is left); it is read whole, so its error is the local engine's."""
    import gzip
    import os

    from drift.ingest.readers import open_source

    monkeypatch.setattr(dask_slicing, "INFLATE_BYTES", 100)
    text = os.urandom(2_000_000).hex()  # does not compress: the break lies past the header
    rows = "".join(f"199{i % 10},{text[i * 40:(i + 1) * 40]}\n" for i in range(100_000))
    packed = gzip.compress(("date,text\n" + rows).encode())
    (tmp_path / "x.csv.gz").write_bytes(packed[: len(packed) // 2])
    one = open_source(tmp_path / "x.csv.gz")
    assert dask_slicing._inflated(one, tmp_path / "inflated", None, None, None) is None
    assert not list((tmp_path / "inflated").iterdir())


def test_a_folder_of_text_files_on_dask_equals_local(tmp_path, cluster):
    """A folder of .txt documents is one task; file names, dates and notes come through."""
    lines = lee_frame()["text"].tolist()
    for number, line in enumerate(lines[:60]):
        folder = tmp_path / "letters" / str(1990 + number % 10)
        folder.mkdir(parents=True, exist_ok=True)
        (folder / f"note{number}.txt").write_text(line, encoding="utf-8")
    slice_archive(tmp_path / "letters", tmp_path / "local", by="5y", quiet=True)
    slice_archive(tmp_path / "letters", tmp_path / "dask", by="5y", quiet=True, engine="dask",
                  scheduler=cluster.scheduler_address)
    assert_same_run(tmp_path / "local", tmp_path / "dask")


def kept_tasks(run: Path) -> list[Path]:
    """Task folders a failed Dask pass kept, with a finished result."""
    from drift.ingest import partstore

    root = run / "slices" / ".dask-parts"
    return [p for p in root.rglob("*") if p.is_dir() and partstore.is_finished(p)]


def test_a_failed_pass_keeps_finished_files_and_a_rerun_resumes(parts, cluster, tmp_path, caplog):
    """A bad file stops the pass (exit 2); the files sliced by then are kept, and the same
    command after the file is mended slices only what was not finished, with the same run
    folder as the local engine's."""
    folder = tmp_path / "mended"
    write_parts(lee_frame(), folder)
    good = (folder / "p1.jsonl").read_bytes()
    (folder / "p1.jsonl").write_text('{"date": "1990", "text": "fine"}\nnot json\n')
    run = tmp_path / "dask"
    with pytest.raises(DriftError, match=r"p1\.jsonl is not valid JSON"):
        slice_archive(folder, run, by="5y", quiet=False, engine="dask",
                      scheduler=cluster.scheduler_address)
    kept = kept_tasks(run)
    assert len(kept) >= 1, "p0 was finished before p1 failed"
    (folder / "p1.jsonl").write_bytes(good)
    caplog.clear()
    with caplog.at_level("INFO", logger="drift"):
        slice_archive(folder, run, by="5y", quiet=False, engine="dask",
                      scheduler=cluster.scheduler_address)
    resumed = [r.getMessage() for r in caplog.records if r.getMessage().startswith("resuming")]
    assert len(resumed) == 1, resumed
    found = re.fullmatch(r"resuming: (\d) of 4 slicing tasks were finished by an earlier run "
                         r"and are not run again\.", resumed[0])
    # p0 at least (consumed before p1 failed); p1 never. How many of p2 and p3 is timing: a task
    # cancelled while it ran may finish after the failure, or be run again by the rerun.
    assert found and 1 <= int(found.group(1)) <= 3
    slice_archive(folder, tmp_path / "local", by="5y", quiet=True)
    assert_same_run(tmp_path / "local", run)  # .dask-parts is gone too


def test_a_damaged_kept_result_is_sliced_again(parts, cluster, tmp_path):
    """A kept result is data, read without pickle: one that was tampered with is not used."""
    folder = tmp_path / "src"
    write_parts(lee_frame(), folder)
    good = (folder / "p1.jsonl").read_bytes()
    (folder / "p1.jsonl").write_text('{"date": "1990", "text": "fine"}\nnot json\n')
    run = tmp_path / "dask"
    with pytest.raises(DriftError):
        slice_archive(folder, run, by="5y", quiet=True, engine="dask",
                      scheduler=cluster.scheduler_address)
    kept = kept_tasks(run)
    assert kept
    for task in kept:
        (task / "result.json").write_text('{"object": "os.system", "fields": {"command": "x"}}')
    (folder / "p1.jsonl").write_bytes(good)
    from drift.ingest import partstore

    assert all(partstore.load_result(task, "any") is None for task in kept)
    slice_archive(folder, run, by="5y", quiet=True, engine="dask",
                  scheduler=cluster.scheduler_address)
    slice_archive(folder, tmp_path / "local", by="5y", quiet=True)
    assert_same_run(tmp_path / "local", run)


def test_a_lost_cluster_is_one_sentence_and_the_rerun_resumes(parts, tmp_path, monkeypatch):
    """The scheduler goes away after the first file's result came back: exit 2 with one
    sentence, finished files kept; the same command on a new cluster resumes."""
    local = distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                     dashboard_address=None)
    real_result = dask_slicing._result
    calls = []

    def result_then_lose_the_cluster(future, task):
        out = real_result(future, task)
        calls.append(task["path"])
        if len(calls) == 1:
            local.close()
        return out

    monkeypatch.setattr(dask_slicing, "_result", result_then_lose_the_cluster)
    run = tmp_path / "dask"
    with pytest.raises(DriftError, match="lost the task slicing .*rerun the same command"):
        slice_archive(parts, run, by="5y", quiet=True, engine="dask",
                      scheduler=local.scheduler_address)
    assert len(kept_tasks(run)) >= 1
    monkeypatch.setattr(dask_slicing, "_result", real_result)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as again:
        slice_archive(parts, run, by="5y", quiet=True, engine="dask",
                      scheduler=again.scheduler_address)
    slice_archive(parts, tmp_path / "local", by="5y", quiet=True)
    assert_same_run(tmp_path / "local", run)
