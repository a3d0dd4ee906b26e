"""Engines: the local process pool and Dask run the same task function with the same results."""

from __future__ import annotations

import os
import socket

import numpy as np
import pytest
from engine_tasks import die, square
from train_fixtures import copy_run, lee_run

from drift import runfolder
from drift.embed import engines, training
from drift.errors import DriftError
from drift.runfolder import RunPaths

SMALL = {"dim": 8, "epochs": 1, "min_count": 3, "seeds": 2, "quiet": True}


@pytest.mark.parametrize(
    ("tasks", "workers", "expected"),
    [(10, 2, (2, 1)), (1, 2, (1, 2)), (2, 8, (2, 4)), (3, 8, (3, 2)), (5, 1, (1, 1))],
)
def test_cores_are_split_between_processes_and_threads(tasks, workers, expected):
    assert engines.plan_workers(tasks, workers) == expected


def test_the_pool_runs_every_task_in_worker_processes_and_reports_progress():
    seen = []
    engine = engines.LocalEngine(2, on_event=lambda key, done, total: seen.append(key))
    tasks = [{"key": f"t{i}", "value": i} for i in range(6)]
    results = list(engine.run(square, tasks))
    assert sorted(r["square"] for r in results) == [i * i for i in range(6)]
    assert os.getpid() not in {r["pid"] for r in results}
    assert sorted(seen) == sorted(t["key"] for t in tasks)


def test_an_error_in_a_worker_reaches_the_caller_as_the_same_sentence():
    engine = engines.LocalEngine(2)
    with pytest.raises(DriftError, match="negative value -1"):
        list(engine.run(square, [{"key": "a", "value": 2}, {"key": "b", "value": -1}]))


def test_a_worker_that_dies_is_reported_with_a_way_forward():
    engine = engines.LocalEngine(2)
    with pytest.raises(DriftError, match="rerun the same command to resume"):
        list(engine.run(die, [{"key": "a"}, {"key": "b"}]))


@pytest.fixture(scope="module")
def local_run(tmp_path_factory):
    """The Lee corpus in three slices, trained by the local engine with one thread per model."""
    root = lee_run(tmp_path_factory.mktemp("engines") / "local")
    training.train_run(root, **SMALL, workers=2)
    return root


def _model_files(root):
    paths = RunPaths(root)
    found = list(paths.models_dir.rglob("seed-*.npy")) + list(paths.control_dir.rglob("seed-*.npy"))
    return sorted(str(path.relative_to(root)) for path in found)


@pytest.mark.slow
def test_a_dask_local_cluster_gives_the_same_models_as_the_local_engine(
    local_run, tmp_path, monkeypatch
):
    finished_steps = {}
    original = training._TaskBars.on_event

    def record(self, key, completed, total):
        finished_steps[key] = max(completed, finished_steps.get(key, 0))
        original(self, key, completed, total)

    monkeypatch.setattr(training._TaskBars, "on_event", record)
    dask_root = lee_run(tmp_path / "dask")
    table = training.train_run(dask_root, **{**SMALL, "quiet": False}, workers=2, engine="dask")
    assert not table["reused"].any()
    # progress events travel from the Dask workers to this process (not necessarily all of
    # them before the results, so only their arrival is checked)
    assert finished_steps
    assert _model_files(dask_root) == _model_files(local_run)
    assert runfolder.read_manifest(dask_root)["stages"]["train"]["execution"]["engine"] == "dask"
    for relative in _model_files(local_run):
        group, label, seed = relative.split("/")
        seed_index = int(seed.removeprefix("seed-").removesuffix(".npy"))
        control = group == "control"
        ours = training.load_vectors(local_run, label, seed_index, control=control)
        theirs = training.load_vectors(dask_root, label, seed_index, control=control)
        # single-threaded models: the same seed gives the same vectors in another process
        assert ours.index_to_key == theirs.index_to_key
        assert np.array_equal(ours.vectors, theirs.vectors)


@pytest.fixture(scope="module")
def scheduler_address():
    """A running Dask scheduler (an in-process LocalCluster), as a cluster would be given."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None
    ) as cluster:
        yield cluster.scheduler_address


@pytest.mark.slow
def test_a_scheduler_address_runs_the_same_models(local_run, tmp_path, scheduler_address):
    root = lee_run(tmp_path / "remote")
    table = training.train_run(
        root, **SMALL, control=False, engine="dask", scheduler=scheduler_address
    )
    assert (table["threads"] == 1).all()  # one gensim thread per model unless --workers says
    execution = runfolder.read_manifest(root)["stages"]["train"]["execution"]
    assert execution["scheduler"] == scheduler_address
    for label in ("2001", "2002", "2003"):
        ours = training.load_vectors(local_run, label, 1)
        theirs = training.load_vectors(root, label, 1)
        assert np.array_equal(ours.vectors, theirs.vectors)


@pytest.mark.slow
def test_an_error_on_a_dask_worker_reaches_the_caller(local_run, tmp_path, scheduler_address):
    root = copy_run(local_run, tmp_path / "run")
    with pytest.raises(DriftError, match="no word that occurs at least"):
        training.train_run(
            root, **{**SMALL, "min_count": 10**6}, engine="dask", scheduler=scheduler_address
        )


def _closed_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def test_an_unreachable_scheduler_is_named_and_nothing_is_written(tmp_path, monkeypatch):
    monkeypatch.setattr(engines, "CONNECT_TIMEOUT_S", 1.0)
    root = lee_run(tmp_path / "run")
    address = f"tcp://127.0.0.1:{_closed_port()}"
    with pytest.raises(DriftError) as error:
        training.train_run(root, **SMALL, engine="dask", scheduler=address)
    assert address in str(error.value) and "nothing was written" in str(error.value)
    paths = RunPaths(root)
    assert not paths.models_dir.exists() and not paths.control_dir.exists()
    assert "train" not in runfolder.read_manifest(root)["stages"]


def test_a_scheduler_needs_the_dask_engine(tmp_path):
    root = lee_run(tmp_path / "run")
    with pytest.raises(DriftError, match="--engine dask"):
        training.train_run(root, **SMALL, scheduler="tcp://127.0.0.1:8786")
