"""Benchmark of loading models: drift's .npy + Parquet files against gensim's pickled format.

Run by hand (never in the test suite):

    python benchmarks/load_bench.py                      # 10 models x 100,000 words x 100 dims
    python benchmarks/load_bench.py --words 20000        # quicker

Ten random models (float32 vectors, Zipf-like counts, invented word strings) are written twice:
as drift writes them (``drift.embed.training.save_model``: ``seed-0.npy`` and a Parquet
vocabulary) and as gensim's ``KeyedVectors.save`` writes them (a pickle, with the vectors in a
side ``.npy`` as gensim does for large arrays), which is what run folders held before format 2.
Each way is timed in its own subprocess (peak memory from ``os.wait4``), twice:

- **load**: open all ten models (drift: ``read_model``, vectors memory-mapped; gensim:
  ``KeyedVectors.load``, vectors read into memory);
- **load + read**: the same, then read every vector once (the sum of each matrix), so the
  memory map's deferred reads are counted too.

drift is timed twice: as a fresh process that has imported only ``pyarrow.parquet``, and with
pandas and ``pyarrow.dataset`` imported before the clock, as they are in every drift command;
the second is the per-model cost alone.

The operating system's file cache is warm for both (the files were just written): the figures
compare the work of the two formats, not the disk.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

DRIFT_LOADER = """
import sys, time
from pathlib import Path
{imports}
from drift.embed.training import read_model
started = time.perf_counter()
models = [read_model(path) for path in sorted(Path(sys.argv[1]).glob("m*/seed-0.npy"))]
if sys.argv[2] == "read":
    total = sum(float(vectors.sum(dtype="float64")) for _, vectors, _ in models)
print(time.perf_counter() - started)
"""

LOADERS = {
    # imported before the clock starts, as gensim is for the pickles
    "drift": DRIFT_LOADER.format(imports="import pyarrow.parquet"),
    # what every drift command has imported before it opens models
    "drift, pandas imported": DRIFT_LOADER.format(imports="import pandas, pyarrow.dataset"),
    "pickle": """
import sys, time
from pathlib import Path
from gensim.models import KeyedVectors
started = time.perf_counter()
models = [KeyedVectors.load(str(path)) for path in sorted(Path(sys.argv[1]).glob("m*.kv"))]
if sys.argv[2] == "read":
    total = sum(float(kv.vectors.sum(dtype="float64")) for kv in models)
print(time.perf_counter() - started)
""",
}


def write_models(folder: Path, models: int, words: int, dim: int) -> None:
    from gensim.models import KeyedVectors

    from drift.embed.training import save_model

    rng = np.random.default_rng(0)
    vocabulary = [f"w{i:06d}" for i in range(words)]
    counts = (1_000_000 / np.arange(1, words + 1)).astype(np.int64) + 5
    for m in range(models):
        vectors = rng.standard_normal((words, dim), dtype=np.float32)
        save_model(folder / f"m{m}" / "seed-0.npy", vocabulary, vectors, counts)
        kv = KeyedVectors(dim, count=words)
        kv.add_vectors(vocabulary, vectors)
        kv.expandos["count"] = counts.copy()  # as gensim keeps a model's counts
        kv.save(str(folder / f"m{m}.kv"))


def measure(kind: str, folder: Path, mode: str) -> tuple[float, float]:
    """(seconds inside the process, peak resident MB of the process)."""
    process = subprocess.Popen([sys.executable, "-c", LOADERS[kind], str(folder), mode],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(process.stderr.read().decode())
    return float(process.stdout.read().decode().split()[-1]), usage.ru_maxrss / 1024


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", type=int, default=10)
    parser.add_argument("--words", type=int, default=100_000)
    parser.add_argument("--dim", type=int, default=100)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="drift-load-bench-", dir="/tmp") as folder:
        folder = Path(folder)
        clock = time.perf_counter()
        write_models(folder, args.models, args.words, args.dim)
        print(f"{args.models} models x {args.words:,} words x {args.dim} dims written in "
              f"{time.perf_counter() - clock:.0f} s; load average {os.getloadavg()[0]:.2f} on "
              f"{os.cpu_count()} CPUs")
        for mode in ("load", "read"):
            found: dict[str, list[tuple[float, float]]] = {kind: [] for kind in LOADERS}
            for _ in range(args.rounds):  # alternating, so both meet the same load
                for kind in found:
                    found[kind].append(measure(kind, folder, mode))
            medians = {k: (float(np.median([s for s, _ in v])), max(m for _, m in v))
                       for k, v in found.items()}
            p = medians["pickle"]
            label = "load" if mode == "load" else "load + read every vector"
            for kind in ("drift", "drift, pandas imported"):
                d = medians[kind]
                print(f"{label:26s} {kind:22s} {d[0]:7.3f} s, peak {d[1]:6.0f} MB | pickle "
                      f"{p[0]:7.3f} s, peak {p[1]:6.0f} MB | "
                      f"pickle / drift time {p[0] / d[0]:6.1f}x")


if __name__ == "__main__":
    main()
