"""`drift train` end to end: options, output, exit codes, and resuming after a kill."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from train_fixtures import lee_run

from drift import runfolder
from drift.cli import main
from drift.embed import engines, training
from drift.runfolder import RunPaths

TINY_ARGS = ["--dim", "8", "--epochs", "1", "--min-count", "2", "--workers", "1", "--quiet"]


def drift(args: list[str], capsys) -> tuple[int, str, str]:
    """Run the drift command line in this process; return (exit code, stdout, stderr)."""
    try:
        main(args)
        code = 0
    except SystemExit as exit_:
        code = exit_.code if isinstance(exit_.code, int) else 1
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture(scope="module")
def lee_source(tmp_path_factory):
    return lee_run(tmp_path_factory.mktemp("cli") / "source")


@pytest.fixture
def run(lee_source, tmp_path):
    target = tmp_path / "run"
    import shutil

    shutil.copytree(lee_source, target)
    return target


def test_train_writes_the_models_and_says_what_it_did(run, capsys):
    code, out, err = drift(["train", str(run), *TINY_ARGS, "--seeds", "1", "--between",
                            "2002", "2003"], capsys)
    assert code == 0, err
    assert "5 models" in out and "5 trained, 0 reused" in out
    assert RunPaths(run).model_file("2001", 0).is_file()
    assert training.control_info(run)["between"] == ["2002", "2003"]
    code, out, _ = drift(["train", str(run), *TINY_ARGS, "--seeds", "1", "--between",
                          "2002", "2003"], capsys)
    assert code == 0 and "0 trained, 5 reused" in out


def test_no_control_says_ranking_will_have_no_p_values(run, capsys):
    code, out, _ = drift(["train", str(run), *TINY_ARGS, "--seeds", "1", "--no-control"], capsys)
    assert code == 0
    assert "no p or q values" in out
    assert training.control_info(run) is None
    assert not RunPaths(run).control_dir.exists()


def test_cbow_and_other_values_are_recorded(run, capsys):
    args = ["train", str(run), "--architecture", "cbow", "--dim", "6", "--window", "3",
            "--negative", "2", "--sample", "0", "--epochs", "1", "--min-count", "3",
            "--seeds", "1", "--workers", "1", "--seed", "7", "--no-control", "-q"]
    code, _, err = drift(args, capsys)
    assert code == 0, err
    params = runfolder.read_manifest(run)["stages"]["train"]["params"]
    assert params["architecture"] == "cbow" and params["window"] == 3 and params["sample"] == 0
    assert params["negative"] == 2 and params["base_seed"] == 7 and params["min_count"] == 3
    assert training.load_vectors(run, "2001", 0).vector_size == 6


@pytest.mark.parametrize(
    ("args", "says"),
    [
        (["--dim", "1"], "--dim must be a whole number of at least 2"),
        (["--window", "0"], "--window must be a whole number of at least 1"),
        (["--negative", "0"], "--negative must be a whole number of at least 1"),
        (["--min-count", "100000"], "lower --min-count"),
        (["--between", "2001", "1999"], "--between 1999 is not a slice of this run"),
        (["--engine", "spark"], "--engine spark is unknown; choose one of local, dask"),
    ],
)
def test_bad_input_exits_2_with_one_sentence(run, capsys, args, says):
    code, _, err = drift(["train", str(run), *TINY_ARGS, *args], capsys)
    assert code == 2
    assert says in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_a_folder_without_slices_points_to_drift_slice(tmp_path, capsys):
    code, _, err = drift(["train", str(tmp_path / "nothing"), *TINY_ARGS], capsys)
    assert code == 2 and "drift slice" in err


def test_an_unreachable_scheduler_exits_2_and_names_it(run, capsys, monkeypatch):
    monkeypatch.setattr(engines, "CONNECT_TIMEOUT_S", 1.0)
    address = "tcp://127.0.0.1:9"  # the discard port: nothing listens there
    code, _, err = drift(["train", str(run), *TINY_ARGS, "--engine", "dask", "--scheduler",
                          address], capsys)
    assert code == 2 and address in err
    assert not RunPaths(run).models_dir.exists()


def _finished(root: Path) -> dict[str, int]:
    """Finished models (their sidecar is written after the .npy) and the .npy modification time."""
    found = {}
    for sidecar in sorted(root.rglob("seed-*.json")):
        model = sidecar.with_suffix(".npy")
        found[str(model.relative_to(root))] = model.stat().st_mtime_ns
    return found


#: Runs `drift train` and kills its own process (SIGKILL: no clean-up runs) right after the
#: parent has received the KILL_AFTER-th finished model: a kill at a known point, not a race.
_KILLED_TRAIN = """
import os, signal, sys
from drift.embed import training
from drift.cli import main

received = 0
keep = training._result_row


def result_row(*args, **kwargs):
    global received
    row = keep(*args, **kwargs)
    received += 1
    if received == int(os.environ["KILL_AFTER"]):
        os.kill(os.getpid(), signal.SIGKILL)
    return row


training._result_row = result_row
main(sys.argv[1:])
"""


@pytest.mark.slow
def test_a_killed_run_resumes_without_retraining_finished_models(run):
    import psutil

    args = ["train", str(run), "--dim", "8", "--epochs", "2", "--min-count", "2", "--seeds", "2",
            "--workers", "2", "--quiet"]
    env = {**os.environ, "KILL_AFTER": "2"}
    process = psutil.Popen([sys.executable, "-c", _KILLED_TRAIN, *args], env=env,
                           stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    workers: set = set()
    while process.poll() is None:  # note the pool workers while the parent lives
        try:
            workers.update(process.children(recursive=True))
        except psutil.NoSuchProcess:
            break
        time.sleep(0.02)
    assert process.returncode == -signal.SIGKILL, process.stderr.read().decode()
    # pool workers notice that their parent is gone and stop (one may finish its model first)
    gone, alive = psutil.wait_procs(list(workers), timeout=30)
    assert not alive, f"workers left running after the kill: {alive}"
    done_before = _finished(run)
    expected = 10  # 3 slices x 2 seeds + the control pair x 2 seeds
    # the 2 the parent received, and any a worker finished before it noticed
    assert 2 <= len(done_before) < expected

    # nothing half-written where a finished model is expected: every .npy present loads
    from drift.embed.training import read_keyed_vectors

    for model in run.rglob("seed-*.npy"):
        assert len(read_keyed_vectors(model)) > 0

    command = [sys.executable, "-m", "drift", *args]
    rerun = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert f"{len(done_before)} reused" in rerun.stdout
    done_after = _finished(run)
    assert len(done_after) == expected
    assert not list(run.rglob("*.tmp")), "temporary files of the killed run are left"
    for model, mtime in done_before.items():
        assert done_after[model] == mtime, f"{model} was trained again"
    for label in ("2001", "2002", "2003"):
        for seed in training.trained_seeds(run):
            assert len(training.load_vectors(run, label, seed)) > 0
    for name in training.CONTROL_LABELS:
        for seed in training.trained_seeds(run):
            assert len(training.load_vectors(run, name, seed, control=True)) > 0
    record = json.loads((run / "run.json").read_text())["stages"]["train"]
    assert record["models"] == {"total": expected, "trained": expected - len(done_before)}
