"""Finished Dask slicing tasks kept on disk, so that a rerun after a lost cluster resumes.

A task's result (its batch outcomes without their text, its word counts, the slice keys it
wrote) is written beside its part files when the task ends: numbers as a NumPy ``.npz`` file
(read with ``allow_pickle=False``), Arrow arrays and tables as Arrow IPC files, and the rest as
JSON that names which of a fixed set of classes to rebuild. Nothing in these files is code: a
result file that was damaged or tampered with fails to read, and its task is simply run again.

A task is known by :func:`task_fingerprint` (its file's size and modification time, the piece
of the file, the reader and slicing options), so a rerun with other options or a changed file
slices it afresh.
"""

from __future__ import annotations

import collections
import dataclasses
import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from drift import runfolder

#: The file that marks a finished task (written last); it holds the task's fingerprint.
DONE_FILE = "done.json"
_ARRAYS_FILE = "arrays.npz"
_RESULT_FILE = "result.json"


def task_fingerprint(task: dict[str, Any]) -> str:
    """What makes a task's result valid: its file (size, modification time), its piece, and
    the options it reads and slices with."""
    stat = Path(task["path"]).stat()
    identity = {
        key: task[key] for key in ("path", "piece", "fmt", "time_col", "text_col", "encoding",
                                   "delimiter", "extra_cols", "source")
    }
    identity.update(size=stat.st_size, mtime_ns=stat.st_mtime_ns, settings=repr(task["settings"]))
    return hashlib.sha256(repr(sorted(identity.items())).encode()).hexdigest()[:20]


def _classes() -> dict[str, type]:
    from drift.ingest import documents, slicing, timeparse

    found = [slicing._BatchOutcome, slicing._Part, slicing.BatchCounts,
             documents.BatchDocuments, timeparse.BadDates]
    return {cls.__name__: cls for cls in found}


class _Encoder:
    """Turns a result into JSON, with its arrays and Arrow data set aside."""

    def __init__(self) -> None:
        self.arrays: list[np.ndarray] = []
        self.tables: list[pa.Table] = []

    def encode(self, value: Any) -> Any:
        if value is None or isinstance(value, bool | str):
            return value
        if isinstance(value, int | np.integer):
            return int(value)
        if isinstance(value, float | np.floating):
            return {"float": float(value)}
        if isinstance(value, np.ndarray):
            self.arrays.append(value)
            return {"array": len(self.arrays) - 1}
        if isinstance(value, pa.Table):
            self.tables.append(value)
            return {"table": len(self.tables) - 1}
        if isinstance(value, pa.Array | pa.ChunkedArray):
            self.tables.append(pa.table({"values": value}))
            return {"arrow": len(self.tables) - 1}
        if isinstance(value, collections.Counter):
            return {"counter": [[self.encode(k), self.encode(v)] for k, v in value.items()]}
        if dataclasses.is_dataclass(value) and not isinstance(value, type):
            fields = {f.name: self.encode(getattr(value, f.name))
                      for f in dataclasses.fields(value)}
            return {"object": type(value).__name__, "fields": fields}
        if isinstance(value, tuple):
            return {"tuple": [self.encode(v) for v in value]}
        if isinstance(value, list):
            return [self.encode(v) for v in value]
        if isinstance(value, dict):
            return {"dict": [[self.encode(k), self.encode(v)] for k, v in value.items()]}
        raise TypeError(f"cannot keep a {type(value).__name__} in a task result")


def _decode(value: Any, arrays: Any, tables: list[pa.Table], classes: dict[str, type]) -> Any:
    def walk(item: Any) -> Any:
        if isinstance(item, list):
            return [walk(v) for v in item]
        if not isinstance(item, dict):
            return item
        if "float" in item:
            return float(item["float"])
        if "array" in item:
            return arrays[f"a{int(item['array'])}"]
        if "table" in item:
            return tables[int(item["table"])]
        if "arrow" in item:
            return tables[int(item["arrow"])].column("values").combine_chunks()
        if "counter" in item:
            return collections.Counter({walk(k): walk(v) for k, v in item["counter"]})
        if "tuple" in item:
            return tuple(walk(v) for v in item["tuple"])
        if "dict" in item:
            return {walk(k): walk(v) for k, v in item["dict"]}
        cls = classes[item["object"]]  # a name outside the fixed set: KeyError, task redone
        return cls(**{name: walk(v) for name, v in item["fields"].items()})

    return walk(value)


def save_result(folder: Path, fingerprint: str, result: dict[str, Any]) -> None:
    """Keep a finished task's ``result`` in its part ``folder``; :data:`DONE_FILE` last."""
    folder = Path(folder)
    encoder = _Encoder()
    encoded = encoder.encode(result)
    with runfolder.atomic_path(folder / _ARRAYS_FILE) as tmp, tmp.open("wb") as handle:
        np.savez(handle, **{f"a{i}": a for i, a in enumerate(encoder.arrays)})
    for number, table in enumerate(encoder.tables):
        with runfolder.atomic_path(folder / f"table-{number}.arrow") as tmp, \
                pa.OSFile(str(tmp), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
            writer.write_table(table)
    runfolder.write_json_atomic(folder / _RESULT_FILE, encoded)
    runfolder.write_json_atomic(folder / DONE_FILE, {"fingerprint": fingerprint,
                                                      "tables": len(encoder.tables)})


def load_result(folder: Path, fingerprint: str) -> dict[str, Any] | None:
    """The result kept in ``folder`` for a task with ``fingerprint``; None when there is none,
    it belongs to another task, or it does not read (the task is then run again)."""
    folder = Path(folder)
    try:
        done = json.loads((folder / DONE_FILE).read_text(encoding="utf-8"))
        if done.get("fingerprint") != fingerprint:
            return None
        tables = []
        for number in range(int(done["tables"])):
            with pa.memory_map(str(folder / f"table-{number}.arrow")) as source:
                tables.append(pa.ipc.open_file(source).read_all())
        with np.load(folder / _ARRAYS_FILE, allow_pickle=False) as stored:
            arrays = {name: stored[name] for name in stored.files}
        encoded = json.loads((folder / _RESULT_FILE).read_text(encoding="utf-8"))
        result = _decode(encoded, arrays, tables, _classes())
    except (OSError, ValueError, KeyError, TypeError, AttributeError, pa.ArrowException):
        return None
    if not isinstance(result, dict) or not {"outcomes", "keys", "counts"} <= set(result):
        return None
    for key in result["keys"]:
        if not (folder / f"{key}.txt").is_file():
            return None
    return result


def is_finished(folder: Path) -> bool:
    return (Path(folder) / DONE_FILE).is_file()


def remove_unfinished(root: Path) -> None:
    """Remove the task folders under ``root`` that hold no finished result (a task still
    running sees its folder gone and stops)."""
    if not Path(root).is_dir():
        return
    for folder in Path(root).iterdir():
        if folder.is_dir() and not is_finished(folder):
            shutil.rmtree(folder, ignore_errors=True)


__all__ = ["DONE_FILE", "is_finished", "load_result", "remove_unfinished", "save_result",
           "task_fingerprint"]
