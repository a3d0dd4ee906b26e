"""What the rank stage reads from a run folder before touching any vectors, and the vectors.

The slice labels, trained seeds, control pair, counts and slice sizes (:class:`RunInputs`), the
check that every model exists, one model's prepared vectors (:func:`load_slice_vectors`) and the
neighbour candidates (the words every slice's models know).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift import options, runfolder
from drift.compare.alignment import (
    SliceVectors,
    prepare_vectors,
)
from drift.errors import DriftError

#: The two control models' labels (the compared slices pooled and split at random).
CONTROL_NAMES = ("control-a", "control-b")


@dataclass(frozen=True)
class RunInputs:
    """What the rank stage reads from a run folder before touching any vectors."""

    paths: runfolder.RunPaths
    labels: list[str]
    seeds: list[int]
    control: dict[str, Any] | None
    counts: pd.DataFrame  # index word, one int64 column per slice label
    tokens: dict[str, int]
    manifest: dict[str, Any] = field(repr=False)


def _check_models_exist(
    paths: runfolder.RunPaths, labels: Sequence[str], seeds: Sequence[int],
    control: Sequence[Sequence[str]],
) -> None:
    """Fail early, before any work, when a model file of the run is missing."""
    wanted = [(label, False) for label in labels]
    wanted += [(name, True) for names in control for name in names]
    for label, is_control in wanted:
        for seed in seeds:
            locate = paths.control_model_file if is_control else paths.model_file
            path = locate(label, seed)
            if not path.is_file():
                what = "control model" if is_control else f"model of slice {label}"
                raise DriftError(
                    f"The {what} {path} is missing; retrain with 'drift train {paths.root}'."
                )


def read_run_inputs(run: str | Path) -> RunInputs:
    """Open a trained run folder and read its labels, seeds, control info, counts and sizes."""
    paths = runfolder.existing_run(Path(run), needs="models")
    runfolder.check_current(paths.root, "train")  # models made from the slices there now
    manifest = runfolder.read_manifest(paths.root)
    if not paths.slice_summary.exists():
        raise DriftError(f"{paths.root} has no slices/summary.csv; rerun 'drift slice'.")
    labels = runfolder.slice_labels(paths.root)
    if len(labels) < 2:
        raise DriftError(
            f"{paths.root} has {len(labels)} slice; ranking needs at least two, so slice the "
            "archive into more periods."
        )
    from drift.embed.training import control_info, control_labels_of, trained_seeds

    seeds = trained_seeds(paths.root)
    control = control_info(paths.root)
    _check_models_exist(paths, labels, seeds, control_labels_of(control))
    summary = runfolder.read_table(paths.root, "summary")
    tokens = {str(r.label): int(r.tokens) for r in summary.itertuples()}
    counts = runfolder.read_table(paths.root, "counts").set_index("word")
    return RunInputs(paths, labels, seeds, control or None, counts, tokens, manifest)


def control_pairs(inputs: RunInputs) -> list[tuple[str, str]]:
    """The labels of the run's control pairs, one per control split (none without control)."""
    from drift.embed.training import control_labels_of

    return control_labels_of(inputs.control)


def load_slice_vectors(
    paths: runfolder.RunPaths, label: str, seed: int, control: bool = False
) -> SliceVectors:
    """A slice's (or control model's) words, prepared vectors and counts for one seed."""
    from drift.embed.training import load_vectors

    kv = load_vectors(paths.root, label, seed, control=control)
    words = list(kv.index_to_key)
    if "count" in kv.expandos:
        counts = np.asarray(kv.expandos["count"], dtype=np.int64)
    else:
        counts = np.zeros(len(words), dtype=np.int64)
    return SliceVectors(label, words, prepare_vectors(kv.vectors), counts)


def candidate_words(slices: Sequence[SliceVectors]) -> list[str]:
    """Words every given model knows, in the first model's order (the neighbour candidates)."""
    first, rest = slices[0], slices[1:]
    return [w for w in first.words if all(w in s.index for s in rest)]


def counts_for(inputs: RunInputs, words: Sequence[str], label: str, fallback: np.ndarray | None):
    """Counts of ``words`` in slice ``label`` from counts.parquet (``fallback`` where absent)."""
    if label in inputs.counts.columns:
        found = inputs.counts[label].reindex(list(words)).to_numpy(dtype=np.float64)
    else:
        found = np.full(len(words), np.nan)
    missing = ~np.isfinite(found)
    if fallback is not None:
        found[missing] = fallback[missing]
    else:
        found[missing] = 0
    return found.astype(np.int64)


def per_million(counts: np.ndarray, tokens: int | None) -> np.ndarray:
    if not tokens:
        return np.full(len(counts), np.nan)
    return counts.astype(np.float64) * 1e6 / tokens


def resolve_slices(
    labels: Sequence[str], between: Sequence[str] | None, reference: str | None
) -> tuple[str, str, str]:
    """The compared pair (first and last slice by default) and the reference (first slice)."""

    slice_from, slice_to = options.check_between(labels, between)
    ref = labels[0] if reference is None else options.check_label(reference, labels, "--reference")
    return slice_from, slice_to, ref
