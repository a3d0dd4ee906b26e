"""The runnable examples in notebooks_free_examples/ run (a smoke run on small data)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = sorted((Path(__file__).resolve().parent.parent / "notebooks_free_examples").glob("*.py"))


def test_there_are_four_examples():
    assert [p.name[:3] for p in EXAMPLES] == ["01_", "02_", "03_", "04_"]


@pytest.mark.parametrize("script", EXAMPLES, ids=lambda p: p.stem)
def test_example_runs(script, small_demo_archive, tmp_path):
    done = subprocess.run(
        [sys.executable, str(script), "--archive", str(small_demo_archive), "--out",
         str(tmp_path / "out"), "--quick"],
        capture_output=True, text=True, timeout=600,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.strip(), "the example prints its story"
