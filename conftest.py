"""What the examples in drift's docstrings may use when they run as doctests.

``pytest`` collects the docstrings of the package (``--doctest-modules``, see pyproject.toml). An
example may use these names without defining them:

* ``archive``: a small dated CSV (every eighth document of the bundled demo archive);
* ``workdir``: an empty folder of its own;
* ``run``: its own copy of a run folder sliced by decade, trained (tiny models: dimension 16,
  two seeds and the control pair) and ranked; the copy is made only for examples that name it.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pandas as pd
import pytest
from _pytest.doctest import DoctestItem

#: Tiny models: enough for the examples to show real output in a few seconds.
EXAMPLE_TRAINING = {"dim": 16, "epochs": 2, "seeds": 2, "min_count": 5, "workers": 2}


@pytest.fixture(scope="session")
def example_archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from drift.pipeline import DEMO_ARCHIVE

    path = tmp_path_factory.mktemp("doctest") / "letters.csv"
    pd.read_csv(DEMO_ARCHIVE).iloc[::8].to_csv(path, index=False)
    return path


@pytest.fixture(scope="session")
def example_run(example_archive: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    import drift

    run = tmp_path_factory.mktemp("doctest") / "run"
    drift.slice_archive(example_archive, run, by="decade", id_col="id", meta="source", quiet=True)
    drift.train_run(run, quiet=True, **EXAMPLE_TRAINING)
    drift.rank_run(run, quiet=True)
    return run


def _names(item: DoctestItem) -> set[str]:
    return {
        name
        for example in item.dtest.examples
        for name in re.findall(r"[A-Za-z_]\w*", example.source)
    }


@pytest.fixture(autouse=True)
def _doctest_names(request: pytest.FixtureRequest) -> None:
    if not isinstance(request.node, DoctestItem):
        return
    names = _names(request.node)
    namespace = request.getfixturevalue("doctest_namespace")
    workdir = request.getfixturevalue("tmp_path")
    namespace["workdir"] = workdir
    if "archive" in names:
        namespace["archive"] = request.getfixturevalue("example_archive")
    if "run" in names:
        namespace["run"] = Path(shutil.copytree(request.getfixturevalue("example_run"),
                                                workdir / "run"))
