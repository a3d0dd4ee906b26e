"""Installs anywhere: the wheel carries the demo archive, and the README's Python example runs as
a plain saved script (no ``if __name__ == "__main__":`` guard) although training uses worker
processes."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import sysconfig
import venv
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"


def readme_python_example() -> str:
    """The first Python block of README.md's "From Python" section, as a user would copy it."""
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## From Python") :]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def test_readme_example_is_a_plain_script_without_a_main_guard():
    code = readme_python_example()
    assert "__main__" not in code and "import drift" in code
    assert ".show()" not in code  # a saved script writes files; it opens no window


@pytest.mark.slow
def test_readme_python_example_runs_as_a_saved_script(small_demo_archive, tmp_path):
    shutil.copy(small_demo_archive, tmp_path / "letters.csv.gz")
    script = tmp_path / "example.py"
    script.write_text(readme_python_example(), encoding="utf-8")
    done = subprocess.run(
        [sys.executable, str(script)],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=1200,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert "Traceback" not in done.stderr
    assert (tmp_path / "runs" / "letters" / "charts" / "index.html").is_file()
    assert (tmp_path / "runs" / "letters" / "scores.parquet").is_file()


@pytest.mark.slow
def test_wheel_installed_outside_the_checkout_runs_the_demo(tmp_path):
    wheels = tmp_path / "wheels"
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(wheels), str(ROOT)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert built.returncode == 0, built.stderr[-3000:]
    (wheel,) = wheels.glob("lexical_drift-*.whl")
    names = zipfile.ZipFile(wheel).namelist()
    assert "drift/demo_data/archive.csv.gz" in names and "drift/demo_data/planted.csv" in names

    env_dir = tmp_path / "venv"
    venv.create(env_dir, with_pip=True)
    python = env_dir / "bin" / "python"
    # The dependencies come from this test's environment (a .pth file), so the fresh venv needs
    # no network; drift itself comes only from the wheel, installed without the checkout.
    site = subprocess.run(
        [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    Path(site, "deps-from-test-env.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    installed = subprocess.run(
        [str(python), "-m", "pip", "install", "--no-deps", "-q", str(wheel)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert installed.returncode == 0, installed.stderr[-3000:]
    work = tmp_path / "elsewhere"
    work.mkdir()
    environment = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)}
    where = subprocess.run(
        [str(python), "-c", "import drift, sys; print(drift.__file__)"],
        cwd=work,
        capture_output=True,
        text=True,
        env=environment,
        check=True,
    ).stdout.strip()
    assert str(ROOT) not in where  # the installed copy, not the checkout
    done = subprocess.run(
        [str(env_dir / "bin" / "drift"), "demo", "--out", str(work / "x"), "--quiet"],
        cwd=work,
        capture_output=True,
        text=True,
        env=environment,
        timeout=1800,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert (work / "x" / "charts" / "index.html").is_file()
