"""drift: find which words changed meaning across a dated text archive, when, and how.

Each pipeline stage is a library function that reads the previous stage's files in a run folder
and writes its own (see DEVELOPERS.md); the command line is a thin layer over these functions::

    import drift
    drift.slice_archive("archive.csv.gz", "runs/a", by="decade")   # -> slice summary DataFrame
    drift.train_run("runs/a")                                       # -> one row per model
    scores = drift.rank_run("runs/a")                               # -> scores DataFrame
    drift.chart_word("runs/a", scores["word"][0])                   # -> path of the HTML page
    drift.build_report("runs/a")                                    # -> path of the report

or all at once with :func:`run_all`. Functions are imported lazily, so ``import drift`` is cheap.
"""

from __future__ import annotations

import importlib
from typing import Any

from drift.errors import DriftError
from drift.runfolder import RunPaths, package_version

__version__ = package_version()

#: Public name -> module that defines it.
_API = {
    "slice_archive": "drift.ingest.slicing",
    "read_summary": "drift.ingest.slicing",
    "read_counts": "drift.ingest.slicing",
    "slice_labels": "drift.ingest.slicing",
    "train_run": "drift.embed.training",
    "load_vectors": "drift.embed.training",
    "rank_run": "drift.compare.ranking",
    "read_scores": "drift.compare.results",
    "read_timeline": "drift.compare.results",
    "read_terms": "drift.compare.results",
    "neighbours_by_slice": "drift.compare.results",
    "export_vectors": "drift.compare.results",
    "example_sentences": "drift.publish.evidence",
    "examples_for_words": "drift.publish.evidence",
    "read_documents": "drift.ingest.documents",
    "read_composition": "drift.ingest.documents",
    "composition": "drift.ingest.documents",
    "target_scores": "drift.compare.targets",
    "read_word_list": "drift.compare.targets",
    "evaluate_run": "drift.validate.evaluation",
    "word_figure_set": "drift.publish.report",
    "chart_word": "drift.publish.report",
    "build_report": "drift.publish.report",
    "run_all": "drift.pipeline",
    "run_demo": "drift.pipeline",
    "calibrate": "drift.compare.calibration",
}

__all__ = ["DriftError", "RunPaths", "__version__", *_API]


def __getattr__(name: str) -> Any:
    if name in _API:
        return getattr(importlib.import_module(_API[name]), name)
    raise AttributeError(f"module 'drift' has no attribute {name!r}")
