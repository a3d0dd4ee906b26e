"""The neighbours table: every measured word's nearest neighbours in every slice, computed once.

The rank stage writes ``neighbours.parquet`` (columns ``word, slice, rank, neighbour,
similarity``) for every word of scores.parquet, with the :data:`PAGE_K` nearest candidates per
slice. The similarity is the cosine of the prepared vectors averaged over seeds (each seed's
similarity to every candidate, then the best ``k`` of the average); candidates are the words every
slice's models know, as in the rank stage, so a neighbour never drops out of a list merely because
it is missing from another slice. Word pages, the report and ``drift neighbours`` read this table;
a run ranked before the table existed gets its neighbours computed from the models, each model
loaded once for all the words asked for.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from drift import runfolder
from drift.compare.alignment import SliceVectors
from drift.compare.measures import Neighbours, block_rows_for, gathered_similarities
from drift.errors import DriftError, unknown_word_error

#: Neighbours per slice shown on word pages and stored in neighbours.parquet; the word pages'
#: gained, lost and turnover are computed at this k, so a page states one k.
PAGE_K = 10
NEIGHBOUR_COLUMNS = list(runfolder.NEIGHBOUR_COLUMNS)


@dataclass
class RunModels:
    """Every slice model of a run (all seeds), prepared, and the neighbour candidates."""

    root: Path
    labels: list[str]
    seeds: list[int]
    slices: dict[tuple[str, int], SliceVectors]
    candidates: list[str]

    def knows(self, word: str) -> bool:
        return any(word in s.index for s in self.slices.values())

    def vocabulary(self) -> set[str]:
        return {w for s in self.slices.values() for w in s.words}


def load_run_models(run: str | Path) -> RunModels:
    """Load each slice model of ``run`` once (every seed); candidates = words every model knows."""
    from drift.compare.ranking import candidate_words, load_slice_vectors, read_run_inputs

    inputs = read_run_inputs(run)
    slices = {
        (label, seed): load_slice_vectors(inputs.paths, label, seed)
        for label in inputs.labels
        for seed in inputs.seeds
    }
    return RunModels(
        inputs.paths.root, list(inputs.labels), list(inputs.seeds), slices,
        candidate_words(list(slices.values())),
    )


def check_k(k: object) -> int:
    """``k`` as a whole number of at least 1, or a DriftError."""
    if isinstance(k, bool) or not isinstance(k, int | np.integer) or k < 1:
        raise DriftError(f"--k must be a whole number of at least 1 (got {k}).")
    return int(k)


def compute_neighbours(models: RunModels, words: Sequence[str], k: int = PAGE_K) -> pd.DataFrame:
    """The ``k`` nearest candidates of each of ``words`` in every slice that knows the word.

    Rows ordered by the given word order, then slice (time order), then rank.
    """
    k = check_k(k)
    cands = _check_candidates(models, k)
    cand_index = {w: i for i, w in enumerate(cands)}
    order = {w: i for i, w in enumerate(dict.fromkeys(words))}
    frames = []
    for at, label in enumerate(models.labels):
        per_seed = [models.slices[(label, seed)] for seed in models.seeds]
        present = [w for w in order if all(w in s.index for s in per_seed)]
        if not present:
            continue
        cand_t = [np.ascontiguousarray(s.vectors[s.rows(cands)].T) for s in per_seed]
        step = block_rows_for(len(cands) * len(per_seed))
        for start in range(0, len(present), step):
            block = present[start : start + step]
            total = np.zeros((len(block), len(cands)), dtype=np.float32)
            for s, c in zip(per_seed, cand_t, strict=True):
                total += s.vectors[s.rows(block)] @ c
            total /= len(per_seed)
            own = np.array([cand_index.get(w, -1) for w in block], dtype=np.int64)
            has_own = np.flatnonzero(own >= 0)
            total[has_own, own[has_own]] = -np.inf
            cut = len(cands) - k
            best = np.argpartition(total, cut, axis=1)[:, cut:]
            sims = np.take_along_axis(total, best, axis=1)
            rank_order = np.argsort(-sims, axis=1, kind="stable")
            best = np.take_along_axis(best, rank_order, axis=1)
            sims = np.take_along_axis(sims, rank_order, axis=1)
            frames.append(_rows_frame(block, label, at, best, sims, cands, order))
    return _ordered_table(frames)


def table_from_lists(
    models: RunModels,
    words: Sequence[str],
    listed_words: Sequence[str],
    lists: Sequence[dict[str, Neighbours]],
    k: int = PAGE_K,
) -> pd.DataFrame:
    """:func:`compute_neighbours` assembled from neighbour lists the rank stage already found.

    ``lists[i][label]`` holds seed ``i``'s best candidates (rows of ``models.candidates``, best
    first) for each of ``listed_words`` in slice ``label``. A word's seed-averaged similarity
    is computed for every candidate in any seed's list, and its best ``k`` are exact when the
    ``k``-th of them beats the average of the seeds' last listed similarities: a candidate in
    no list is at most that similar in every seed (the threshold algorithm; Fagin, Lotem and
    Naor 2003). Words where it does not, and words not listed, are searched in full with
    :func:`compute_neighbours`. Same rows as it, up to float32 rounding of near ties.
    """
    k = check_k(k)
    cands = _check_candidates(models, k)
    widths = [found.indices.shape[1] for seed_lists in lists for found in seed_lists.values()]
    if len(lists) != len(models.seeds) or not widths or min(widths) < k:
        return compute_neighbours(models, words, k)
    row_of = {w: i for i, w in enumerate(listed_words)}
    order = {w: i for i, w in enumerate(dict.fromkeys(words))}
    unsure = {w for w in order if w not in row_of}
    listed = [w for w in order if w in row_of]
    listed_rows = np.array([row_of[w] for w in listed], dtype=np.int64)
    frames = []
    for at, label in enumerate(models.labels):
        per_seed = [models.slices[(label, seed)] for seed in models.seeds]
        found = [seed_lists[label] for seed_lists in lists]
        present = np.ones(len(listed_rows), dtype=bool)
        for one in found:
            present &= one.indices[listed_rows, 0] >= 0
        block = [w for w, p in zip(listed, present, strict=True) if p]
        rows = listed_rows[present]
        if not block:
            continue
        ids = np.sort(np.concatenate([one.indices[rows] for one in found], axis=1), axis=1)
        repeated = np.zeros(ids.shape, dtype=bool)
        repeated[:, 1:] = ids[:, 1:] == ids[:, :-1]
        total = np.zeros(ids.shape, dtype=np.float64)
        for s in per_seed:
            total += gathered_similarities(s.vectors[s.rows(block)], s.vectors[s.rows(cands)], ids)
        total /= len(per_seed)
        total[repeated] = -np.inf
        best = np.argsort(-total, axis=1, kind="stable")[:, :k]
        sims = np.take_along_axis(total, best, axis=1)
        bound = np.mean([one.similarities[rows, -1] for one in found], axis=0)
        sure = sims[:, k - 1] > bound + _ROUNDING
        unsure.update(w for w, ok in zip(block, sure, strict=True) if not ok)
        frames.append(_rows_frame(block, label, at, np.take_along_axis(ids, best, axis=1),
                                  sims, cands, order))
    if not unsure:
        return _ordered_table(frames)
    searched = compute_neighbours(models, [w for w in order if w in unsure], k)
    searched["_w"] = searched["word"].map(order)
    searched["_s"] = searched["slice"].map({label: at for at, label in enumerate(models.labels)})
    kept = [frame[~frame["word"].isin(unsure)] for frame in frames]
    return _ordered_table([*kept, searched])


#: float32 similarities computed in two ways (a matrix product, a gathered dot product) differ
#: by about 1e-7; a list counts as exact only with this margin above its bound
_ROUNDING = 1e-5


def _check_candidates(models: RunModels, k: int) -> list[str]:
    cands = models.candidates
    if len(cands) <= k:
        raise DriftError(
            f"Only {len(cands)} words are known to every slice, too few for --k {k} neighbours; "
            "use a smaller --k or more text per slice."
        )
    return cands


def _rows_frame(
    block: Sequence[str], label: str, at: int, best: np.ndarray, sims: np.ndarray,
    cands: Sequence[str], order: dict[str, int],
) -> pd.DataFrame:
    """The table rows of ``block``'s words in one slice (with sort keys ``_w`` and ``_s``)."""
    k = best.shape[1]
    return pd.DataFrame(
        {
            "word": np.repeat(np.asarray(block, dtype=object), k),
            "slice": label,
            "rank": np.tile(np.arange(1, k + 1, dtype=np.int64), len(block)),
            "neighbour": np.asarray(cands, dtype=object)[best.ravel()],
            "similarity": sims.ravel().astype(np.float64),
            "_w": np.repeat([order[w] for w in block], k),
            "_s": at,
        }
    )


def _ordered_table(frames: list[pd.DataFrame]) -> pd.DataFrame:
    """The frames' rows by word order, slice and rank, without the sort keys."""
    frames = [frame for frame in frames if len(frame)]
    if not frames:
        return empty_table()
    table = pd.concat(frames, ignore_index=True).sort_values(["_w", "_s", "rank"], kind="stable")
    return table[NEIGHBOUR_COLUMNS].reset_index(drop=True)


def empty_table() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "word": pd.Series(dtype=object),
            "slice": pd.Series(dtype=object),
            "rank": pd.Series(dtype=np.int64),
            "neighbour": pd.Series(dtype=object),
            "similarity": pd.Series(dtype=np.float64),
        }
    )


def write_neighbours_table(
    run: str | Path, words: Sequence[str], k: int = PAGE_K, models: RunModels | None = None,
    listed: tuple[Sequence[str], Sequence[dict[str, Neighbours]]] | None = None,
) -> Path:
    """Compute the neighbours of ``words`` and write RUN/neighbours.parquet; return its path.

    ``listed`` (the rank stage's measured words and its per-seed neighbour lists) spares a
    second full search (:func:`table_from_lists`)."""
    models = models or load_run_models(run)
    if listed is None:
        table = compute_neighbours(models, words, k)
    else:
        table = table_from_lists(models, words, listed[0], listed[1], k)
    return runfolder.write_table(Path(run), "neighbours", table)


def read_neighbours(run: str | Path) -> pd.DataFrame | None:
    """RUN/neighbours.parquet, or None for a run ranked before the table existed."""
    path = runfolder.RunPaths(Path(run)).neighbours_parquet
    if not path.exists():
        return None
    if runfolder.stale_reason(Path(run), "rank") is not None:
        return None  # made from older models or slices: never shown, recomputed from the models
    table = runfolder.read_table(Path(run), "neighbours")
    for column in ("word", "slice", "neighbour"):
        table[column] = table[column].astype(str).astype(object)
    return table


def stored_k(table: pd.DataFrame | None) -> int:
    """The k the stored table holds (0 when there is none)."""
    return 0 if table is None or table.empty else int(table["rank"].max())


def neighbours_for(
    run: str | Path,
    words: Sequence[str],
    k: int = PAGE_K,
    models: RunModels | None = None,
) -> pd.DataFrame:
    """The top ``k`` neighbours of ``words`` per slice: from neighbours.parquet where it holds
    them, otherwise computed from the models (loaded once for all the missing words)."""
    k = check_k(k)
    words = list(dict.fromkeys(words))
    table = read_neighbours(run)
    found = empty_table()
    missing = words
    if table is not None and stored_k(table) >= k:
        found = table[table["word"].isin(words) & (table["rank"] <= k)]
        have = set(found["word"])
        missing = [w for w in words if w not in have]
    if missing:
        models = models or load_run_models(run)
        found = pd.concat([found, compute_neighbours(models, missing, k)], ignore_index=True)
    order = {w: i for i, w in enumerate(words)}
    # rows of one word are already in slice and rank order; keep it, order the words as asked
    found = found.assign(_w=found["word"].map(order)).sort_values("_w", kind="stable")
    return found[NEIGHBOUR_COLUMNS].reset_index(drop=True)


def word_neighbours(run: str | Path, word: str, k: int = 10) -> pd.DataFrame:
    """Columns ``slice, rank, neighbour, similarity`` for one word; an unknown word is an error
    that suggests close matches."""
    k = check_k(k)
    table = read_neighbours(run)
    if table is not None and stored_k(table) >= k and (table["word"] == word).any():
        rows = neighbours_for(run, [word], k)
    else:
        models = load_run_models(run)
        if not models.knows(word):
            raise unknown_word_error(word, models.vocabulary(), where="any slice of this run")
        rows = neighbours_for(run, [word], k, models=models)
    return rows.drop(columns="word").reset_index(drop=True)


def top_list(rows: pd.DataFrame, label: str, k: int) -> list[str]:
    """The word's neighbours in slice ``label``, best first, at most ``k``."""
    part = rows[(rows["slice"] == label) & (rows["rank"] <= k)].sort_values("rank")
    return [str(w) for w in part["neighbour"]]


def gained_and_lost(rows: pd.DataFrame, slice_from: str, slice_to: str, k: int) -> tuple[
    list[str], list[str]
]:
    """Neighbours among the top ``k`` in ``slice_to`` but not in ``slice_from`` (gained), and the
    reverse (lost), strongest first; ``rows`` are one word's rows of the neighbours table."""
    before, after = top_list(rows, slice_from, k), top_list(rows, slice_to, k)
    return [w for w in after if w not in before], [w for w in before if w not in after]


def turnover(rows: pd.DataFrame, slice_from: str, slice_to: str, k: int) -> float:
    """Jaccard distance between the word's top-``k`` sets of two slices (NaN if one is empty)."""
    before, after = set(top_list(rows, slice_from, k)), set(top_list(rows, slice_to, k))
    if not before or not after:
        return float("nan")
    return 1.0 - len(before & after) / len(before | after)
