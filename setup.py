"""Build hook: the wheel carries the demo archive as package data (drift/demo_data/).

The editable source of the demo stays in the top-level data_demo/ folder; a build copies the files
a user's `drift demo` needs into the package, so an installed drift has its demo anywhere.
Everything else about the package is declared in pyproject.toml.
"""

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

DEMO_SOURCE = Path(__file__).resolve().parent / "data_demo"
DEMO_FILES = ("archive.csv.gz", "planted.csv", "counts.json", "README.md")


class BuildWithDemo(build_py):
    """build_py, then the demo files into <build>/drift/demo_data/."""

    def run(self):
        super().run()
        target = Path(self.build_lib) / "drift" / "demo_data"
        target.mkdir(parents=True, exist_ok=True)
        for name in DEMO_FILES:
            shutil.copyfile(DEMO_SOURCE / name, target / name)

    def get_outputs(self, include_bytecode=True):
        demo = [str(Path(self.build_lib) / "drift" / "demo_data" / n) for n in DEMO_FILES]
        return super().get_outputs(include_bytecode) + demo


setup(cmdclass={"build_py": BuildWithDemo})
