"""Fixtures shared by several test modules: one run of ``drift demo`` for the whole session."""

from __future__ import annotations

import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest

from drift.pipeline import DEMO_DIR


@dataclass(frozen=True)
class DemoRun:
    """The run folder ``drift demo`` wrote, and what the command printed."""

    run: Path
    stdout: str
    stderr: str


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> DemoRun:
    """``drift demo`` run once, end to end, as a user would run it (a subprocess)."""
    out = tmp_path_factory.mktemp("demo") / "run"
    done = subprocess.run(
        [sys.executable, "-m", "drift", "demo", "--out", str(out), "--quiet", "--top", "10"],
        capture_output=True,
        text=True,
        timeout=1200,
    )
    assert done.returncode == 0, done.stderr
    return DemoRun(out, done.stdout, done.stderr)


@pytest.fixture(scope="session")
def small_demo_archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Every fourth document of the demo archive, gzip-compressed: small enough for tiny models."""
    frame = pd.read_csv(DEMO_DIR / "archive.csv.gz")
    path = tmp_path_factory.mktemp("small") / "small.csv.gz"
    frame.iloc[::4].to_csv(path, index=False)
    return path
