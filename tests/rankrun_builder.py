"""Run folders for the rank-stage tests, written directly per the DEVELOPERS.md contract.

Two kinds:

- :func:`write_text_run` trains tiny gensim Word2Vec models (skip-gram, small dimension, few
  epochs) on real text, gensim's bundled Lee background corpus
  (gensim/test/test_data/lee_background.cor, 300 news documents), one model per slice and seed,
  plus the time-shuffled control pair.
- :func:`write_array_run` saves KeyedVectors built from numpy arrays, for checks where a known
  geometry is the point (a known rotation, words moved on purpose).
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from gensim.models import KeyedVectors, Word2Vec
from gensim.test.utils import datapath

from drift import runfolder
from drift.embed.training import save_keyed_vectors

_TOKEN_RE = re.compile(r"[a-z]+")


def lee_documents() -> list[list[str]]:
    """The Lee background corpus, one list of lower-cased word tokens per document."""
    with open(datapath("lee_background.cor"), encoding="utf-8") as handle:
        return [_TOKEN_RE.findall(line.lower()) for line in handle if line.strip()]


def _write_slices(root: Path, slices: Mapping[str, Sequence[Sequence[str]]]) -> runfolder.RunPaths:
    paths = runfolder.prepare_run_folder(root)
    paths.slices_dir.mkdir(parents=True, exist_ok=True)
    rows, counters = [], {}
    for i, (label, docs) in enumerate(slices.items()):
        paths.slice_file(label).write_text("\n".join(" ".join(d) for d in docs) + "\n", "utf-8")
        counter = Counter(t for d in docs for t in d)
        counters[label] = counter
        rows.append(
            {
                "label": label,
                "start": f"{2000 + i}-01-01",
                "end": f"{2000 + i}-12-31",
                "documents": len(docs),
                "tokens": sum(counter.values()),
                "types": len(counter),
                "dropped": 0,
            }
        )
    runfolder.write_table(paths.root, "summary", pd.DataFrame(rows))
    _write_counts(paths, {label: dict(c) for label, c in counters.items()})
    runfolder.record_stage(root, "slice", {"by": "year"}, "test", 0.0, {"labels": list(slices)})
    return paths


def _write_counts(paths: runfolder.RunPaths, counters: Mapping[str, Mapping[str, int]]) -> None:
    table = pd.DataFrame({label: pd.Series(c, dtype="int64") for label, c in counters.items()})
    table = table.fillna(0).astype("int64")
    table = table.loc[table.sum(axis=1).sort_values(ascending=False, kind="stable").index]
    table.index.name = "word"
    runfolder.write_table(paths.root, "counts", table.reset_index())


def _save_model(target: Path, docs: Sequence[Sequence[str]], seed: int, dim: int, epochs: int,
                min_count: int) -> None:
    model = Word2Vec(
        sentences=[list(d) for d in docs], vector_size=dim, window=5, min_count=min_count,
        sg=1, negative=5, epochs=epochs, workers=1, seed=seed,
    )
    target.parent.mkdir(parents=True, exist_ok=True)
    save_keyed_vectors(model.wv, target)


def write_text_run(
    root: Path,
    slices: Mapping[str, Sequence[Sequence[str]]],
    *,
    seeds: int = 2,
    control: bool = True,
    dim: int = 24,
    epochs: int = 5,
    min_count: int = 5,
    shuffle_seed: int = 7,
) -> Path:
    """A trained run: slice files, counts, one Word2Vec per slice and seed, the control pair."""
    root = Path(root)
    paths = _write_slices(root, slices)
    labels = list(slices)
    for label in labels:
        for k in range(seeds):
            _save_model(paths.model_file(label, k), slices[label], 1 + k, dim, epochs, min_count)
    control_info = None
    if control:
        first, last = labels[0], labels[-1]
        pooled = [list(d) for d in slices[first]] + [list(d) for d in slices[last]]
        order = np.random.default_rng(shuffle_seed).permutation(len(pooled))
        cut = len(slices[first])
        pair = {
            "control-a": [pooled[i] for i in order[:cut]],
            "control-b": [pooled[i] for i in order[cut:]],
        }
        for name, docs in pair.items():
            text = paths.control_slice_file(name)
            text.parent.mkdir(parents=True, exist_ok=True)
            text.write_text("\n".join(" ".join(d) for d in docs) + "\n", "utf-8")
            for k in range(seeds):
                _save_model(paths.control_model_file(name, k), docs, 1 + k, dim, epochs, min_count)
        control_info = {"between": [first, last], "shuffle_seed": shuffle_seed}
    params = {"dim": dim, "epochs": epochs, "min_count": min_count, "seeds": seeds, "base_seed": 1}
    extra = {"control": control_info, "labels": labels}
    runfolder.record_stage(root, "train", params, "test", 0.0, extra)
    return root


def keyed_vectors(words: Sequence[str], matrix: np.ndarray, counts: Sequence[int]) -> KeyedVectors:
    """KeyedVectors holding ``matrix`` row by row, with a model count per word."""
    kv = KeyedVectors(matrix.shape[1])
    kv.add_vectors(list(words), np.asarray(matrix, dtype=np.float32))
    for word, count in zip(words, counts, strict=True):
        kv.set_vecattr(word, "count", int(count))
    return kv


ArraySlice = tuple[Sequence[str], Sequence[np.ndarray], Sequence[int]]


def write_array_run(
    root: Path,
    slices: Mapping[str, ArraySlice],
    control: Mapping[str, ArraySlice] | None = None,
    tokens: int = 1_000_000,
) -> Path:
    """A run whose models are given arrays: ``slices[label] = (words, [matrix per seed], counts)``.

    ``control`` maps control-a and control-b to the same triple; the compared pair is the first
    and last slice. Every slice is said to hold ``tokens`` tokens.
    """
    root = Path(root)
    paths = runfolder.prepare_run_folder(root)
    paths.slices_dir.mkdir(parents=True, exist_ok=True)
    labels = list(slices)
    rows = []
    for i, label in enumerate(labels):
        words, _, _ = slices[label]
        paths.slice_file(label).write_text(" ".join(words) + "\n", "utf-8")
        rows.append(
            {"label": label, "start": f"{2000 + i}-01-01", "end": f"{2000 + i}-12-31",
             "documents": 1, "tokens": tokens, "types": len(words), "dropped": 0}
        )
    runfolder.write_table(paths.root, "summary", pd.DataFrame(rows))
    counters = {label: dict(zip(w, map(int, c), strict=True))
                for label, (w, _, c) in slices.items()}
    _write_counts(paths, counters)
    runfolder.record_stage(root, "slice", {"by": "year"}, "test", 0.0, {"labels": labels})
    n_seeds = len(next(iter(slices.values()))[1])
    for label, (words, matrices, counts) in slices.items():
        for k, matrix in enumerate(matrices):
            target = paths.model_file(label, k)
            target.parent.mkdir(parents=True, exist_ok=True)
            save_keyed_vectors(keyed_vectors(words, matrix, counts), target)
    control_info = None
    if control:
        for name, (words, matrices, counts) in control.items():
            for k, matrix in enumerate(matrices):
                target = paths.control_model_file(name, k)
                target.parent.mkdir(parents=True, exist_ok=True)
                save_keyed_vectors(keyed_vectors(words, matrix, counts), target)
        control_info = {"between": [labels[0], labels[-1]], "shuffle_seed": 0}
    dim = int(next(iter(slices.values()))[1][0].shape[1])
    params = {"dim": dim, "seeds": n_seeds, "min_count": 1}
    extra = {"control": control_info, "labels": labels}
    runfolder.record_stage(root, "train", params, "test", 0.0, extra)
    return root
