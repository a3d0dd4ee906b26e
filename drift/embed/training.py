"""STAGE train: one Word2Vec model per slice and seed, plus the time-shuffled control pair.

Each model is trained by gensim in ``corpus_file`` mode straight from ``slices/<label>.txt`` and
its word vectors are saved as ``models/<label>/seed-<k>.npy`` (a float32 matrix, memory-mapped
when read) with ``seed-<k>.vocab.parquet`` (words and counts), never as pickles. The control pair
pools the lines of the two compared slices, shuffles them with a recorded seed and splits them into
two slices of the original token sizes (``control/slices/control-a.txt``, ``control-b.txt``);
their models go to ``control/control-a/seed-<k>.npy`` and ``control/control-b/seed-<k>.npy``.

Every model has a small JSON sidecar (``seed-<k>.json``) written after the ``.npy`` is in place.
It holds a fingerprint of the slice file and the parameters, so a model whose inputs did not
change is reused, and a run killed half-way resumes with the models it had finished.
"""

from __future__ import annotations

import hashlib
import json
import mmap
import re
import threading
import time
from collections.abc import Callable, Sequence
from contextlib import ExitStack
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from drift import options, runfolder
from drift.embed import engines
from drift.errors import DriftError, close_matches
from drift.options import TrainOptions, check_between
from drift.progress import progress_bars
from drift.runfolder import RunPaths

if TYPE_CHECKING:
    import pandas as pd

ARCHITECTURES = options.ARCHITECTURES
CONTROL_LABELS = ("control-a", "control-b")
#: The shuffle seed of control split j (1, 2, ...) is the base seed plus this times (j - 1).
SPLIT_SEED_STEP = 7777
#: Bumped when the way a model is trained or saved changes, so older models are retrained.
MODEL_FORMAT = 2  # 2: vectors in .npy and vocabulary in .vocab.parquet (1: gensim pickles)
#: Every model is trained on its slice's lines in a random order drawn from the run's base seed
#: (:func:`write_shuffled_lines`); part of each model's parameters, so older models retrain.
LINE_ORDER = "shuffled"
CONTROL_FORMAT = 1
RESULT_COLUMNS = ["group", "label", "seed", "path", "vocabulary", "seconds", "reused", "threads"]
_LABEL_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
#: Modules a local pool worker imports once, before its first task.
POOL_PRELOAD = ("drift.embed.training", "gensim.models.word2vec")
_SEED_LIMIT = 2**32  # gensim seeds numpy's RandomState, which takes 0 .. 2**32 - 1


# ---------------------------------------------------------------------------- parameters


@dataclass(frozen=True)
class TrainParams:
    """The parameters that decide what a model is (not where or how fast it is trained)."""

    architecture: str
    dim: int
    window: int
    negative: int
    sample: float
    epochs: int
    min_count: int
    seeds: int
    base_seed: int

    def model(self, seed_index: int) -> dict[str, Any]:
        """The parameters of one model; gensim's seed is ``base_seed + seed_index``."""
        record = asdict(self)
        record.pop("seeds")
        record.pop("base_seed")
        record["seed"] = self.base_seed + seed_index
        record["line_order"] = LINE_ORDER
        # every seed of a slice sees the same order (gensim breaks ties in word counts by first
        # occurrence, and the seeds of a slice must share one vocabulary in one order)
        record["line_order_seed"] = self.base_seed
        return record


def validate_params(
    *,
    architecture: str,
    dim: int,
    window: int,
    negative: int,
    sample: float,
    epochs: int,
    min_count: int,
    seeds: int,
    base_seed: int,
) -> TrainParams:
    """Check every training parameter, raising a DriftError that names the first bad one."""
    TrainOptions(
        architecture=architecture, dim=dim, window=window, negative=negative, sample=sample,
        epochs=epochs, min_count=min_count, seeds=seeds, base_seed=base_seed,
    )
    return TrainParams(
        architecture=architecture,
        dim=int(dim),
        window=int(window),
        negative=int(negative),
        sample=float(sample),
        epochs=int(epochs),
        min_count=int(min_count),
        seeds=int(seeds),
        base_seed=int(base_seed),
    )


def stable_hash(text: str) -> int:
    """A hash of ``text`` that is the same in every process (Python's hash() is salted).

    Passed to gensim as ``hashfxn`` so that nothing in training depends on PYTHONHASHSEED.
    """
    return int.from_bytes(hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest(), "little")


# ---------------------------------------------------------------------------- slices and labels


def checked_slice_labels(paths: RunPaths) -> list[str]:
    """Slice labels in time order (from the slice stage), each with a non-empty slice file."""
    labels = [str(label) for label in runfolder.slice_labels(paths.root)]
    if not labels:
        raise DriftError(
            f"{paths.root} lists no slices; make them with 'drift slice SOURCE --out {paths.root}'."
        )
    for label in labels:
        if not _LABEL_RE.match(label):
            raise DriftError(
                f"Slice label '{label}' in {paths.root} is not a safe file name; "
                "rerun 'drift slice' to rebuild the slices."
            )
    for label in labels:
        slice_file = paths.slice_file(label)
        if not slice_file.is_file():
            raise DriftError(
                f"Slice file {slice_file} is missing; rerun 'drift slice' to rebuild the slices."
            )
        if slice_file.stat().st_size == 0:
            raise DriftError(
                f"Slice '{label}' is empty; rerun 'drift slice' with larger time bins."
            )
    return labels


def check_more_than_one_slice(paths: RunPaths, labels: list[str]) -> None:
    """Refuse a run of one slice before any training: drift compares periods, and the advice
    names a way to cut the same archive into two or more."""
    if len(labels) > 1:
        return
    from drift.ingest.slicing import read_summary

    record = runfolder.read_manifest(paths.root).get("stages", {}).get("slice", {})
    source = record.get("source") or "SOURCE"
    row = read_summary(paths.root).iloc[0]
    start, end = str(row["start"]), str(row["end"])
    other = ", or with --by year" if start[:4] != end[:4] else ""
    raise DriftError(
        f"{paths.root} has one slice ({labels[0]}: {start} to {end}), and drift measures change "
        f"between slices; cut the archive into two or more periods, e.g. 'drift slice {source} "
        f"--out {paths.root} --by even:2' (two periods of equal size){other}."
    )


def resolve_between(labels: list[str], between: tuple[str, str] | list[str] | None) -> list[str]:
    """The two slices the control pair stands for: ``between`` or the first and last slice."""
    if between is None:
        return [labels[0], labels[-1]]
    pair = check_between(labels, between)
    return pair


# ---------------------------------------------------------------------------- control pair


def control_slice_file(paths: RunPaths, name: str) -> Path:
    return paths.control_slice_file(name)


def control_split_labels(split: int) -> tuple[str, str]:
    """The two control models' labels of control split ``split`` (1: control-a, control-b;
    2: control-a-2, control-b-2; ...)."""
    if split == 1:
        return CONTROL_LABELS
    return (f"{CONTROL_LABELS[0]}-{split}", f"{CONTROL_LABELS[1]}-{split}")


def split_shuffle_seed(base_seed: int, split: int) -> int:
    """The seed that pools and splits the compared slices for control split ``split``."""
    return int(base_seed) + SPLIT_SEED_STEP * (split - 1)


def _control_record_file(paths: RunPaths, split: int = 1) -> Path:
    if split == 1:
        return paths.control_record
    return paths.control_record.with_name(f"control-{split}.json")


def line_index(path: Path, chunk_size: int = 1 << 22) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Byte ranges and token counts of the non-empty lines of a slice file.

    Returns ``(starts, ends, tokens)``: line i is ``bytes[starts[i]:ends[i]]`` without its
    newline, with ``tokens[i]`` space-separated tokens. Reads the file in chunks; memory is a few
    integers per line, not the text.
    """
    newline_at: list[np.ndarray] = []
    spaces_to_newline: list[np.ndarray] = []
    offset = 0
    spaces_before = 0
    with Path(path).open("rb") as handle:
        while chunk := handle.read(chunk_size):
            data = np.frombuffer(chunk, dtype=np.uint8)
            newlines = np.flatnonzero(data == 10)
            spaces = np.cumsum(data == 32, dtype=np.int64)
            newline_at.append(newlines.astype(np.int64) + offset)
            spaces_to_newline.append(spaces[newlines] + spaces_before)
            spaces_before += int(spaces[-1])
            offset += len(data)
    no_lines = np.zeros(0, np.int64)
    ends = np.concatenate(newline_at) if newline_at else no_lines
    spaces_at_end = np.concatenate(spaces_to_newline) if spaces_to_newline else no_lines
    if offset and (len(ends) == 0 or ends[-1] != offset - 1):  # a last line without newline
        ends = np.append(ends, offset)
        spaces_at_end = np.append(spaces_at_end, spaces_before)
    if len(ends) == 0:
        return no_lines, no_lines, no_lines
    starts = np.concatenate([[0], ends[:-1] + 1]).astype(np.int64)
    spaces_in_line = np.diff(np.concatenate([[0], spaces_at_end]))
    lengths = ends - starts
    tokens = np.where(lengths > 0, spaces_in_line + 1, 0)
    keep = tokens > 0
    return starts[keep], ends[keep], tokens[keep]


def split_point(tokens_in_order: np.ndarray, target_tokens: int) -> int:
    """How many leading lines make a total closest to ``target_tokens`` (at least one each side)."""
    totals = np.cumsum(tokens_in_order)
    cut = int(np.argmin(np.abs(totals - target_tokens))) + 1
    return min(max(cut, 1), len(tokens_in_order) - 1)


def _write_lines(
    target: Path,
    picks: np.ndarray,
    sources: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    texts: list[Any],
) -> None:
    with runfolder.atomic_path(target) as tmp, tmp.open("wb", buffering=1 << 20) as out:
        for source, start, end in zip(
            sources[picks].tolist(), starts[picks].tolist(), ends[picks].tolist(), strict=True
        ):
            out.write(texts[source][start:end])
            out.write(b"\n")


def _control_sources(paths: RunPaths, pair: list[str], shuffle_seed: int) -> dict[str, Any]:
    return {
        "format": CONTROL_FORMAT,
        "between": list(pair),
        "shuffle_seed": int(shuffle_seed),
        "sources": {label: runfolder.content_print(paths.slice_file(label)) for label in pair},
    }


def current_control_slices(
    paths: RunPaths, pair: list[str], shuffle_seed: int, split: int = 1
) -> dict[str, Any] | None:
    """The record of a control split's slices when they exist and match ``pair`` and the seed."""
    record_file = _control_record_file(paths, split)
    try:
        record = json.loads(record_file.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None
    expected = _control_sources(paths, pair, shuffle_seed)
    if any(record.get(key) != value for key, value in expected.items()):
        return None
    for name in control_split_labels(split):
        text = control_slice_file(paths, name)
        if not text.is_file() or record.get("outputs", {}).get(name) != runfolder.content_print(
            text
        ):
            return None
    return record


def build_control_slices(
    paths: RunPaths, pair: list[str], shuffle_seed: int, split: int = 1
) -> dict[str, Any]:
    """Pool the lines of the two slices in ``pair``, shuffle, and split them at their sizes.

    ``control-a`` gets as many tokens as slice A (to the nearest whole line) and ``control-b``
    the rest, which is the size of slice B (``control-a-2``, ``control-b-2`` for ``split`` 2,
    and so on). Only line offsets are held in memory.
    """
    names = control_split_labels(split)
    first, second = (line_index(paths.slice_file(label)) for label in pair)
    sizes = [len(first[0]), len(second[0])]
    if min(sizes) == 0:
        empty = pair[sizes.index(0)]
        raise DriftError(f"Slice '{empty}' has no text; rerun 'drift slice' with larger bins.")
    sources = np.concatenate([np.zeros(sizes[0], np.int8), np.ones(sizes[1], np.int8)])
    starts = np.concatenate([first[0], second[0]])
    ends = np.concatenate([first[1], second[1]])
    tokens = np.concatenate([first[2], second[2]])
    order = np.random.default_rng(shuffle_seed).permutation(len(tokens))
    cut = split_point(tokens[order], int(first[2].sum()))
    picks = {names[0]: order[:cut], names[1]: order[cut:]}
    with ExitStack() as stack:
        texts = []
        for label in pair:
            handle = stack.enter_context(paths.slice_file(label).open("rb"))
            text = mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ)
            texts.append(stack.enter_context(text))
        for name, chosen in picks.items():
            _write_lines(control_slice_file(paths, name), chosen, sources, starts, ends, texts)
    record = {
        **_control_sources(paths, pair, shuffle_seed),
        "lines": {name: int(len(chosen)) for name, chosen in picks.items()},
        "tokens": {name: int(tokens[chosen].sum()) for name, chosen in picks.items()},
        "source_lines": dict(zip(pair, sizes, strict=True)),
        "source_tokens": {pair[0]: int(first[2].sum()), pair[1]: int(second[2].sum())},
        "outputs": {
            name: runfolder.content_print(control_slice_file(paths, name)) for name in names
        },
    }
    runfolder.write_json_atomic(_control_record_file(paths, split), record)
    return record


# ---------------------------------------------------------------------------- one model (the task)


def sidecar_file(model_file: Path) -> Path:
    """The JSON file beside a model that says it is finished and what it was made from."""
    return Path(model_file).with_suffix(".json")


def model_fingerprint(model_params: dict[str, Any], corpus: Path) -> str:
    corpus_print = runfolder.content_print(corpus)
    return runfolder.fingerprint_params(
        {"format": MODEL_FORMAT, "model": model_params, "corpus": corpus_print}
    )


def finished_model(model_file: Path, fingerprint: str) -> dict[str, Any] | None:
    """The sidecar of a finished model made from the same inputs, else None."""
    try:
        record = json.loads(sidecar_file(model_file).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return None
    if record.get("fingerprint") != fingerprint or not Path(model_file).is_file():
        return None
    if not vocabulary_file(model_file).is_file():
        return None
    return record


def vocabulary_file(model_file: str | Path) -> Path:
    """The Parquet file beside a model's vectors: its words and their counts, in row order."""
    return Path(model_file).with_suffix(".vocab.parquet")


def save_model(target: str | Path, words: list[str], vectors: np.ndarray, counts: Any) -> None:
    """Store one model without pickles: ``target`` (``.npy``, the vectors as a float32 matrix,
    row ``i`` for ``words[i]``) and :func:`vocabulary_file` (Parquet: ``word``, ``count``).

    Both are renamed into place when complete, the vocabulary first; numpy and pandas (or any
    Parquet reader) read them without drift, and reading them never runs code.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    target = Path(target)
    matrix = np.ascontiguousarray(vectors, dtype=np.float32)
    if matrix.ndim != 2 or matrix.shape[0] != len(words):
        raise ValueError(f"{len(words)} words but vectors of shape {matrix.shape}")
    table = pa.Table.from_arrays(
        [_string_array(words), _int64_array(counts)], names=["word", "count"]
    )
    with runfolder.atomic_path(vocabulary_file(target)) as tmp:
        pq.write_table(table, tmp)
    with runfolder.atomic_path(target) as tmp, tmp.open("wb") as handle:
        np.save(handle, matrix, allow_pickle=False)


def _string_array(words: Sequence[str]) -> Any:
    """A pyarrow string array of ``words`` built from its buffers: ``pa.array`` on a list
    imports pandas (about a quarter second) to look for pandas types."""
    import pyarrow as pa

    encoded = [word.encode("utf-8") for word in words]
    offsets = np.zeros(len(encoded) + 1, dtype=np.int32)
    np.cumsum([len(word) for word in encoded], out=offsets[1:])
    return pa.Array.from_buffers(
        pa.string(), len(encoded), [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
    )


def _int64_array(values: Any) -> Any:
    """A pyarrow int64 array of ``values`` from its buffer (see :func:`_string_array`)."""
    import pyarrow as pa

    column = np.ascontiguousarray(values, dtype=np.int64)
    return pa.Array.from_buffers(pa.int64(), len(column), [None, pa.py_buffer(column)])


def save_keyed_vectors(vectors: Any, target: str | Path) -> None:
    """Store gensim KeyedVectors with :func:`save_model` (counts from its ``count`` attribute)."""
    words = list(vectors.index_to_key)
    if "count" in getattr(vectors, "expandos", {}):
        counts = np.asarray(vectors.expandos["count"], dtype=np.int64)
    else:
        counts = np.zeros(len(words), dtype=np.int64)
    save_model(target, words, vectors.vectors, counts)


def _tampered(path: Path, why: str) -> DriftError:
    return DriftError(
        f"{path} is not a model file as drift writes it ({why}); nothing in it was run. Retrain "
        "with 'drift train' into a new run folder, or ask whoever shared the run for its models."
    )


def read_model(model_file: str | Path) -> tuple[list[str], np.ndarray, np.ndarray]:
    """(words, vectors, counts) of one stored model; the vectors are memory-mapped read-only.

    Only plain numbers and strings are read: ``np.load(..., allow_pickle=False)`` and Parquet.
    A file that holds anything else (a pickle, an object array, a shape that does not match the
    vocabulary) is refused with a DriftError, and nothing in it is executed.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    model_file = Path(model_file)
    vocab_file = vocabulary_file(model_file)
    for path in (model_file, vocab_file):
        if not path.is_file():
            raise DriftError(f"{path} is missing; rerun 'drift train' to complete the run.")
    try:
        vectors = np.load(model_file, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise _tampered(model_file, str(exc).split("\n")[0][:120]) from None
    if not isinstance(vectors, np.ndarray) or vectors.ndim != 2 or vectors.dtype.kind != "f":
        raise _tampered(model_file, "not a two-dimensional array of floating-point numbers")
    try:  # ParquetFile, not read_table: that imports pyarrow.dataset and pandas (~0.5 s once)
        with pq.ParquetFile(vocab_file) as parquet:
            table = parquet.read()
    except (pa.ArrowException, OSError) as exc:
        raise _tampered(vocab_file, str(exc).split("\n")[0][:120]) from None
    schema = table.schema
    if (
        schema.names[:2] != ["word", "count"]
        or not pa.types.is_string(schema.field("word").type)
        or not pa.types.is_integer(schema.field("count").type)
    ):
        raise _tampered(vocab_file, "not the columns word (text) and count (whole numbers)")
    if table.num_rows != vectors.shape[0]:
        shape = f"{vectors.shape[0]} vectors for {table.num_rows} words in {vocab_file.name}"
        raise _tampered(model_file, shape)
    counts = table.column("count").combine_chunks().cast(pa.int64())
    if counts.null_count:
        raise _tampered(vocab_file, "a word without a count")
    words = table.column("word").to_pylist()
    return words, vectors, _int64_values(counts)


def _int64_values(array: Any) -> np.ndarray:
    """A copy of a null-free Arrow int64 array as numpy, read from its data buffer.

    ``Array.to_numpy`` would import pandas (about 0.5 s) in a process that has not yet.
    """
    data = array.buffers()[1]
    if data is None:  # an empty array
        return np.zeros(0, dtype=np.int64)
    return np.frombuffer(data, dtype=np.int64, count=len(array), offset=array.offset * 8).copy()


def _epoch_callback(report: Callable[[int, int], None], total: int) -> Any:
    from gensim.models.callbacks import CallbackAny2Vec

    class EpochReport(CallbackAny2Vec):
        def __init__(self) -> None:
            self.done = 1

        def on_epoch_end(self, model: Any) -> None:
            self.done += 1
            report(self.done, total)

    return EpochReport()


def _empty_vocabulary_error(task: dict[str, Any]) -> DriftError:
    min_count = task["model"]["min_count"]
    if task["group"] == "control":
        what = f"Control slice '{task['label']}' (lines pooled from the compared slices)"
    else:
        what = f"Slice '{task['label']}'"
    return DriftError(
        f"{what} has no word that occurs at least {min_count} times; lower --min-count "
        "or slice into larger time bins."
    )


def train_one_model(
    task: dict[str, Any], report: Callable[[int, int], None] | None = None
) -> dict[str, Any]:
    """Train, save and describe one model: the task both engines run.

    ``task`` holds plain values only: ``key, group, label, seed, corpus, output, model`` (the
    parameters from :meth:`TrainParams.model`), ``threads`` and ``fingerprint``. Writes the
    ``.vocab.parquet`` and ``.npy`` files, then the sidecar; returns a small dict describing it.
    The model sees the slice's lines in a random order (:func:`write_shuffled_lines`, a
    temporary file beside the model).
    """
    corpus, output, params = Path(task["corpus"]), Path(task["output"]), task["model"]
    if not corpus.is_file():
        raise DriftError(
            f"Slice file {corpus} cannot be read here; with --engine dask the run folder must be "
            "on a file system that every worker sees at the same path."
        )
    output.parent.mkdir(parents=True, exist_ok=True)
    shuffled = output.with_suffix(".lines-shuffled.txt")
    try:
        write_shuffled_lines(corpus, shuffled, params["line_order_seed"])
        return _train_on(task, shuffled, output, params, report)
    finally:
        shuffled.unlink(missing_ok=True)


def write_shuffled_lines(corpus: Path, target: Path, seed: int) -> int:
    """Write the lines of ``corpus`` to ``target`` in a random order drawn from ``seed``;
    returns how many lines.

    Word2vec's learning rate falls as training goes through the file, so text that comes in
    clusters (one source's documents one after another, as a slice file keeps them in the
    archive's order) weighs by its place in the file. The control slices are drawn in random
    order; training every model on its lines in random order makes a slice and a control slice
    differ only by their text (see README: the calibration benchmark).
    """
    if corpus.stat().st_size == 0:
        target.write_bytes(b"")
        return 0
    starts, ends, _ = line_index(corpus)
    order = np.random.default_rng([int(seed), 0x5EED]).permutation(len(starts))
    sources = np.zeros(len(starts), np.int8)
    with corpus.open("rb") as handle:
        with mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as text:
            _write_lines(target, order, sources, starts, ends, [text])
    return len(order)


def _train_on(
    task: dict[str, Any], corpus: Path, output: Path, params: dict[str, Any],
    report: Callable[[int, int], None] | None,
) -> dict[str, Any]:
    """Train one model on ``corpus`` (the task's lines in training order) and save it."""
    from gensim import __version__ as gensim_version
    from gensim.models import Word2Vec

    started = time.perf_counter()
    steps = params["epochs"] + 1  # the vocabulary scan, then one step per epoch
    if report is not None:
        report(0, steps)
    model = Word2Vec(
        sg=1 if params["architecture"] == "skipgram" else 0,
        hs=0,
        vector_size=params["dim"],
        window=params["window"],
        negative=params["negative"],
        sample=params["sample"],
        min_count=params["min_count"],
        epochs=params["epochs"],
        seed=params["seed"],
        workers=task["threads"],
        hashfxn=stable_hash,
    )
    model.build_vocab(corpus_file=str(corpus))
    if len(model.wv) == 0:
        raise _empty_vocabulary_error(task)
    if report is not None:
        report(1, steps)
    model.train(
        corpus_file=str(corpus),
        total_examples=model.corpus_count,
        total_words=model.corpus_total_words,
        epochs=model.epochs,
        callbacks=[_epoch_callback(report, steps)] if report is not None else [],
    )
    vectors, words = model.wv, int(model.corpus_total_words)
    del model
    seconds = time.perf_counter() - started
    save_keyed_vectors(vectors, output)
    summary = {
        "key": task["key"],
        "group": task["group"],
        "label": task["label"],
        "seed": task["seed"],
        "path": str(output),
        "vocabulary": len(vectors),
        "words": words,
        "seconds": round(seconds, 3),
        "threads": task["threads"],
    }
    sidecar = {
        **summary,
        "fingerprint": task["fingerprint"],
        "model": params,
        "gensim": gensim_version,
        "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    runfolder.write_json_atomic(sidecar_file(output), sidecar)
    return summary


# ---------------------------------------------------------------------------- the stage


def _model_tasks(
    paths: RunPaths, params: TrainParams, labels: list[str], control_splits: int
) -> list[dict[str, Any]]:
    """Every model of the run, slices first (time order, then seed), then the control pairs
    (``control_splits`` of them; 0 without control)."""
    groups = [("slice", label, paths.slice_file(label), paths.model_file, 0) for label in labels]
    for split in range(1, control_splits + 1):
        groups += [
            ("control", name, control_slice_file(paths, name), paths.control_model_file, split)
            for name in control_split_labels(split)
        ]
    tasks = []
    for group, label, corpus, locate, split in groups:
        for seed in range(params.seeds):
            output = locate(label, seed)
            tasks.append(
                {
                    "key": f"{group}/{label}/seed-{seed}",
                    "group": group,
                    "label": label,
                    "seed": seed,
                    "corpus": str(corpus.resolve()),
                    "output": str(output.resolve()),
                    "model": params.model(seed),
                    "threads": 1,
                    "fingerprint": None,
                    "split": split,
                }
            )
    return tasks


def _result_row(task: dict[str, Any], result: dict[str, Any], reused: bool) -> dict[str, Any]:
    return {
        "group": task["group"],
        "label": task["label"],
        "seed": task["seed"],
        "path": task["output"],
        "vocabulary": int(result.get("vocabulary", 0)),
        "seconds": float(result.get("seconds", 0.0)),
        "reused": reused,
        "threads": int(result.get("threads", task["threads"])),
    }


def _slices_fingerprint(paths: RunPaths, labels: list[str]) -> str:
    return runfolder.fingerprint_params(
        {label: runfolder.content_print(paths.slice_file(label)) for label in labels}
    )


def _resolve_workers(workers: int | None) -> int:
    if workers is None:
        return engines.available_cores()
    if workers < 1:
        raise DriftError(f"--workers must be at least 1 (got {workers}).")
    return int(workers)


class _TaskBars:
    """One progress bar per running task plus the overall bar; safe to call from any thread."""

    def __init__(self, progress: Any, overall: Any) -> None:
        self.progress, self.overall = progress, overall
        self.bars: dict[str, Any] = {}
        self.finished: set[str] = set()
        self.lock = threading.Lock()

    def on_event(self, key: str, completed: int, total: int) -> None:
        with self.lock:
            if key in self.finished:
                return
            if key not in self.bars:
                self.bars[key] = self.progress.add_task(f"  {key}", total=total)
            self.progress.update(self.bars[key], completed=completed, total=total)

    def done(self, key: str) -> None:
        with self.lock:
            self.finished.add(key)
            bar = self.bars.pop(key, None)
            if bar is not None:
                self.progress.remove_task(bar)
            self.progress.advance(self.overall)


def remove_stale_temporaries(paths: RunPaths) -> int:
    """Delete temporary files that a killed run left behind (call while holding the run lock)."""
    patterns = ("models/*/.*.tmp", "control/*/.*.tmp")
    stale = [path for pattern in patterns for path in paths.root.glob(pattern)]
    for path in stale:
        path.unlink(missing_ok=True)
    return len(stale)


@dataclass
class _Plan:
    """What one call of train_run will do: every model, the finished ones, the ones to train."""

    tasks: list[dict[str, Any]]
    rows: dict[str, dict[str, Any]]
    pending: list[dict[str, Any]]
    #: each control split's record (None: its control slices must be built)
    control_records: dict[int, dict[str, Any] | None]


def _plan_models(
    paths: RunPaths,
    params: TrainParams,
    labels: list[str],
    pair: list[str] | None,
    control_splits: int,
) -> _Plan:
    """Split the run's models into finished ones (same slice file, same parameters) and the rest.

    Control models whose control slices must be rebuilt are all pending; their fingerprints are
    filled in once the new control slices exist.
    """
    splits = range(1, control_splits + 1) if pair else range(0)
    records = {
        split: current_control_slices(
            paths, pair, split_shuffle_seed(params.base_seed, split), split
        )
        for split in splits
    }
    tasks = _model_tasks(paths, params, labels, len(records))
    rows: dict[str, dict[str, Any]] = {}
    pending = []
    for task in tasks:
        if task["group"] == "control" and records[task["split"]] is None:
            pending.append(task)
            continue
        task["fingerprint"] = model_fingerprint(task["model"], Path(task["corpus"]))
        done = finished_model(Path(task["output"]), task["fingerprint"])
        if done is None:
            pending.append(task)
        else:
            rows[task["key"]] = _result_row(task, done, reused=True)
    return _Plan(tasks, rows, pending, records)


def _train_pending(
    paths: RunPaths,
    plan: _Plan,
    pair: list[str] | None,
    base_seed: int,
    *,
    engine: str,
    scheduler: str | None,
    processes: int,
    quiet: bool,
) -> None:
    """Build the control slices if needed and train every pending model, with progress bars."""
    with progress_bars(quiet) as progress, ExitStack() as stack:
        overall = progress.add_task(
            "train: models", total=len(plan.tasks), completed=len(plan.rows)
        )
        bars = _TaskBars(progress, overall)
        runner = None
        if plan.pending:  # connect first: an unreachable scheduler fails before any write
            runner = stack.enter_context(
                engines.open_engine(
                    engine,
                    processes=processes,
                    scheduler=scheduler,
                    on_event=None if quiet else bars.on_event,
                    preload=POOL_PRELOAD,
                )
            )
        for split, record in plan.control_records.items():
            if record is None:
                progress.update(overall, description="train: pooling the control pair")
                plan.control_records[split] = build_control_slices(
                    paths, pair, split_shuffle_seed(base_seed, split), split
                )
                progress.update(overall, description="train: models")
        for task in plan.pending:
            if task["fingerprint"] is None:
                task["fingerprint"] = model_fingerprint(task["model"], Path(task["corpus"]))
        # largest slices first, so that no long task starts last and runs alone
        plan.pending.sort(key=lambda task: -Path(task["corpus"]).stat().st_size)
        by_key = {task["key"]: task for task in plan.pending}
        if runner is not None:
            for result in runner.run(train_one_model, plan.pending):
                plan.rows[result["key"]] = _result_row(by_key[result["key"]], result, False)
                bars.done(result["key"])


_TRAIN = TrainOptions()  # the defaults of train_run's keyword arguments


def train_run(
    run: str | Path,
    *,
    architecture: str = _TRAIN.architecture,
    dim: int = _TRAIN.dim,
    window: int = _TRAIN.window,
    negative: int = _TRAIN.negative,
    sample: float = _TRAIN.sample,
    epochs: int = _TRAIN.epochs,
    min_count: int = _TRAIN.min_count,
    seeds: int = _TRAIN.seeds,
    workers: int | None = _TRAIN.workers,
    between: tuple[str, str] | list[str] | None = None,
    control: bool = True,
    control_splits: int = _TRAIN.control_splits,
    engine: str = _TRAIN.engine,
    scheduler: str | None = _TRAIN.scheduler,
    base_seed: int = _TRAIN.base_seed,
    quiet: bool = False,
) -> pd.DataFrame:
    """Train every slice-by-seed model of a run (and the control pairs), reusing finished ones.

    One gensim Word2Vec model per slice and seed (seed ``base_seed + k`` for model k), plus the
    time-shuffled control pair that stands for the two compared slices. Models already finished
    with the same slice and parameters are kept, so a killed run resumes. Defaults and help
    texts of the options: :class:`drift.options.TrainOptions`.

    Parameters
    ----------
    run : str or Path
        A run folder sliced with :func:`drift.slice_archive`.
    architecture : str
        ``skipgram`` (skip-gram with negative sampling) or ``cbow``.
    dim, window, negative, epochs : int
        Vector dimension, context words on each side, noise words per positive example, passes.
    sample : float
        Sub-sampling threshold (0 turns it off).
    min_count : int
        Words rarer than this in a slice are left out of its model.
    seeds : int
        Models per slice; the spread between them is the optimisation noise.
    workers : int, optional
        Cores to use (default: all); with ``scheduler``, gensim threads per model.
    between : pair of str, optional
        The two slices the control pair stands for (default: the first and the last).
    control : bool
        Train the control pair (without it ranking gives no z, p or q).
    control_splits : int
        Control pairs to draw (each a new random split of the pooled compared slices,
        ``control-a-2``/``control-b-2`` and so on after the first); ranking averages each
        word's own control measure over them.
    engine : str
        ``local`` (a process pool) or ``dask``.
    scheduler : str, optional
        Address of a Dask scheduler (default with ``engine="dask"``: a LocalCluster).
    base_seed : int
        gensim seed of the first model (``--seed`` on the command line).
    quiet : bool
        No progress bars.

    Returns
    -------
    pandas.DataFrame
        One row per model: ``group`` ('slice' or 'control'), ``label``, ``seed``, ``path``,
        ``vocabulary`` (words kept), ``seconds`` (training time), ``reused`` and ``threads``
        (gensim threads of that model; 1 means the vectors are reproducible from the seed).

    Raises
    ------
    DriftError
        A value out of range (named as on the command line), a run without slices, an empty
        vocabulary (lower ``min_count``), an unreachable scheduler, a folder in use.

    Examples
    --------
    >>> import drift
    >>> models = drift.train_run(run, dim=16, epochs=2, seeds=2, min_count=5, quiet=True)
    >>> models.groupby("group").size().to_dict()
    {'control': 4, 'slice': 12}
    >>> bool(models["reused"].all())  # the run was trained with these options already
    True
    """
    given = dict(locals())  # first: the arguments as given, passed on unchanged
    import pandas as pd  # here, not at the top: pool workers import this module and need no pandas

    rows = train_models(**given)
    return pd.DataFrame(rows, columns=RESULT_COLUMNS)


def train_models(
    run: str | Path,
    *,
    architecture: str = _TRAIN.architecture,
    dim: int = _TRAIN.dim,
    window: int = _TRAIN.window,
    negative: int = _TRAIN.negative,
    sample: float = _TRAIN.sample,
    epochs: int = _TRAIN.epochs,
    min_count: int = _TRAIN.min_count,
    seeds: int = _TRAIN.seeds,
    workers: int | None = _TRAIN.workers,
    between: tuple[str, str] | list[str] | None = None,
    control: bool = True,
    control_splits: int = _TRAIN.control_splits,
    engine: str = _TRAIN.engine,
    scheduler: str | None = _TRAIN.scheduler,
    base_seed: int = _TRAIN.base_seed,
    quiet: bool = False,
) -> list[dict[str, Any]]:
    """:func:`train_run` without pandas: its rows as dicts, keys :data:`RESULT_COLUMNS`
    (the command line's path; importing pandas costs a short run about a quarter second)."""
    started = time.perf_counter()
    params = validate_params(
        architecture=architecture,
        dim=dim,
        window=window,
        negative=negative,
        sample=sample,
        epochs=epochs,
        min_count=min_count,
        seeds=seeds,
        base_seed=base_seed,
    )
    TrainOptions(engine=engine, scheduler=scheduler, workers=workers,
                 control_splits=control_splits)
    remote = engine == "dask" and bool(scheduler)
    cores = _resolve_workers(workers)
    paths = runfolder.existing_run(Path(run), needs="slices")
    labels = checked_slice_labels(paths)
    check_more_than_one_slice(paths, labels)
    pair = resolve_between(labels, between) if control else None
    stage_params = {**asdict(params), "control": bool(control), "between": pair}
    if control and control_splits > 1:  # absent for one split, as in runs made before the option
        stage_params["control_splits"] = int(control_splits)
    inputs = _slices_fingerprint(paths, labels)

    with runfolder.run_lock(paths.root):
        if not runfolder.stage_is_current(paths.root, "train", stage_params, inputs):
            runfolder.forget_stage(paths.root, "train")  # never leave a record of other models
        remove_stale_temporaries(paths)
        plan = _plan_models(paths, params, labels, pair, control_splits)
        processes, threads = engines.plan_workers(len(plan.pending), cores)
        if remote:  # the cluster decides the processes; --workers is gensim threads per model
            processes, threads = 0, cores if workers else 1
        for task in plan.pending:
            task["threads"] = threads
        _train_pending(
            paths,
            plan,
            pair,
            params.base_seed,
            engine=engine,
            scheduler=scheduler,
            processes=processes,
            quiet=quiet,
        )
        rows = [plan.rows[task["key"]] for task in plan.tasks]
        runfolder.record_stage(
            paths.root,
            "train",
            stage_params,
            inputs,
            time.perf_counter() - started,
            extra={
                "control": _control_summary(pair, params.base_seed, plan.control_records),
                "labels": labels,
                "execution": {
                    "engine": engine,
                    "scheduler": scheduler or ("LocalCluster" if engine == "dask" else None),
                    "workers": None if remote else cores,
                    "processes": processes,
                    "threads_per_model": sorted({row["threads"] for row in rows}),
                },
                "outputs": runfolder.fingerprint_params(
                    {
                        task["key"]: runfolder.content_print(Path(task["output"]))
                        for task in plan.tasks
                    }
                ),
                "models": {"total": len(plan.tasks), "trained": len(plan.pending)},
            },
        )
    return rows


def _control_summary(
    pair: list[str] | None, base_seed: int, records: dict[int, dict[str, Any] | None]
) -> dict[str, Any] | None:
    """What run.json says about the control pair (None with --no-control): the first split's
    labels, seed and sizes, and with more than one split each further split's."""
    if not pair or not records or records.get(1) is None:
        return None
    first = records[1]
    summary = {
        "between": pair,
        "shuffle_seed": split_shuffle_seed(base_seed, 1),
        "labels": list(CONTROL_LABELS),
        "lines": first["lines"],
        "tokens": first["tokens"],
    }
    if len(records) > 1:
        summary["splits"] = len(records)
        summary["more_splits"] = [
            {
                "labels": list(control_split_labels(split)),
                "shuffle_seed": split_shuffle_seed(base_seed, split),
                "lines": record["lines"],
                "tokens": record["tokens"],
            }
            for split, record in sorted(records.items())
            if split > 1 and record is not None
        ]
    return summary


def control_labels_of(record: dict[str, Any] | None) -> list[tuple[str, str]]:
    """The control pairs of a run's train record's ``control`` entry: one pair per split,
    the first split first (none with --no-control)."""
    if not record:
        return []
    more = [tuple(split["labels"]) for split in record.get("more_splits", [])]
    return [tuple(record.get("labels", CONTROL_LABELS)), *more]


# ---------------------------------------------------------------------------- reading results


def _train_record(run: str | Path) -> dict[str, Any]:
    root = Path(run)
    paths = runfolder.existing_run(root, needs="models")
    runfolder.check_current(paths.root, "train")  # models made from the slices there now
    record = runfolder.read_manifest(paths.root).get("stages", {}).get("train")
    if not record:
        raise DriftError(f"{root} has no finished training; run 'drift train {root}'.")
    return record


def trained_seeds(run: str | Path) -> list[int]:
    """Seed indices k of the finished models (``seed-<k>.npy``), from run.json."""
    return list(range(int(_train_record(run)["params"]["seeds"])))


def control_info(run: str | Path) -> dict[str, Any] | None:
    """The control pair of a trained run, or None when it was trained with --no-control.

    ``{"between": [A, B], "shuffle_seed": s, "labels": ["control-a", "control-b"], ...}``
    """
    return _train_record(run).get("control")


def read_keyed_vectors(model_file: str | Path) -> Any:
    """gensim KeyedVectors built from one stored model, its vectors memory-mapped (read-only).

    Raises
    ------
    DriftError
        The files are missing or are not what drift writes (see :func:`read_model`).
    """
    from gensim.models import KeyedVectors

    words, vectors, counts = read_model(model_file)
    kv = KeyedVectors(vector_size=int(vectors.shape[1]), count=0, dtype=vectors.dtype)
    kv.index_to_key = words
    kv.key_to_index = {word: i for i, word in enumerate(words)}
    kv.vectors = vectors
    kv.allocate_vecattrs(attrs=["count"], types=[np.int64])
    kv.expandos["count"][:] = counts
    return kv


def load_vectors(run: str | Path, label: str, seed: int, control: bool = False) -> Any:
    """The vectors of one trained model.

    Parameters
    ----------
    run : str or Path
        A run folder trained with :func:`drift.train_run`.
    label : str
        A slice label, or with ``control=True`` ``control-a`` or ``control-b``.
    seed : int
        The model's index, 0 to ``seeds - 1``.
    control : bool
        Load a model of the control pair.

    Returns
    -------
    gensim.models.KeyedVectors
        The raw (unaligned) vectors; a word's count in its slice is
        ``kv.get_vecattr(word, "count")``.

    Raises
    ------
    DriftError
        An unknown label (with close matches), a seed that was not trained, a run trained
        without the control pair.

    Examples
    --------
    >>> import drift
    >>> vectors = drift.load_vectors(run, "1950s", 0)
    >>> vectors.vector_size
    16
    >>> int(vectors.get_vecattr("the", "count")) > 1000
    True
    """
    paths = RunPaths(Path(run))
    record = _train_record(run)
    if control:
        known = [name for names in control_labels_of(record.get("control")) for name in names]
        model_file = paths.control_model_file(label, seed)
    else:
        known = list(record.get("labels", []))
        model_file = paths.model_file(label, seed)
    if label not in known:
        if control and not known:
            raise DriftError(
                f"{run} was trained with --no-control; rerun 'drift train {run}' without it."
            )
        hint = close_matches(label, known, n=3)
        suggestion = f"did you mean {', '.join(hint)}? " if hint else ""
        raise DriftError(
            f"'{label}' is not a trained {'control ' if control else ''}slice of {run}; "
            f"{suggestion}the labels are {', '.join(known)}."
        )
    seeds = range(int(record["params"]["seeds"]))
    if seed not in seeds or not model_file.is_file():
        raise DriftError(
            f"No model for seed {seed} of '{label}' in {run} "
            f"(trained seeds: 0 to {len(seeds) - 1}); "
            f"rerun 'drift train {run}' to complete it."
        )
    return read_keyed_vectors(model_file)
