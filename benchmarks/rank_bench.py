"""Benchmark of ``drift rank`` beside a bare blocked numpy top-k of the same size.

Run by hand (never in the test suite):

    python benchmarks/rank_bench.py                    # 6 slices x 50,000 words x 100 dims
    python benchmarks/rank_bench.py --words 20000      # quicker
    python benchmarks/rank_bench.py --control          # also score the control pair
    python benchmarks/rank_bench.py --once             # one bare run, not two

It writes a run folder of random vectors (one model per slice and seed, saved as drift saves
them: ``.npy`` and a Parquet vocabulary; Zipf-like counts, slices/summary.csv, counts.parquet,
run.json) into a temporary folder under /tmp, then runs, each in its own subprocess:

- ``bare``: for every model, unit-normalise and find every word's top-k neighbours among all
  words of that model, in blocks of the same memory budget as drift (64 MiB of float32
  similarities), with a matrix product and ``np.argpartition`` per block. Nothing else.
- ``rank``: ``drift.compare.ranking.rank_run`` on the run (alignment, every measure, the timeline,
  change points, gained/lost, terms, writing the parquet and csv files).

and reports wall seconds and peak resident memory (``ru_maxrss`` from ``os.wait4``) of each,
and the ratio. The two are run bare, rank, bare (bare, rank with ``--once``), and the ratio is
taken against the mean of the bare runs, since the CPU may be shared (the load average is
printed). Goal: rank at most
1.5 times the bare top-k, with peak memory under 2 GB (6 x 50,000 words) or 4 GB (10 x 100,000).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

BLOCK_BYTES = 64 * 2**20


def build_run(root: Path, slices: int, words: int, dim: int, seeds: int, control: bool) -> None:
    """A run folder of random vectors that follows the run-folder contract (DEVELOPERS.md)."""
    import pandas as pd

    from drift import runfolder
    from drift.embed.training import save_model

    rng = np.random.default_rng(0)
    paths = runfolder.prepare_run_folder(root)
    paths.slices_dir.mkdir(parents=True, exist_ok=True)
    vocabulary = [f"w{i}" for i in range(words)]
    counts = (1_000_000 / (1 + np.arange(words)) ** 1.1).astype(np.int64) + 20
    labels = [str(2000 + i) for i in range(slices)]
    summary = []
    for i, label in enumerate(labels):
        paths.slice_file(label).write_text("w0\n", encoding="utf-8")
        summary.append({"label": label, "start": f"{2000 + i}-01-01", "end": f"{2000 + i}-12-31",
                        "documents": 1, "tokens": int(counts.sum()), "types": words,
                        "dropped": 0})
    pd.DataFrame(summary).to_csv(paths.slice_summary, index=False)
    index = pd.Index(vocabulary, name="word")
    table = pd.DataFrame({label: counts for label in labels}, index=index)
    table.reset_index().to_parquet(paths.counts, index=False)
    runfolder.record_stage(root, "slice", {"bench": True}, "bench", 0.0, {"labels": labels})

    def save(target: Path) -> None:
        matrix = rng.standard_normal((words, dim)).astype(np.float32)
        save_model(target, vocabulary, matrix, counts)

    for label in labels:
        for seed in range(seeds):
            save(paths.model_file(label, seed))
    control_info = None
    if control:
        for name in ("control-a", "control-b"):
            for seed in range(seeds):
                save(paths.control_model_file(name, seed))
        control_info = {"between": [labels[0], labels[-1]], "shuffle_seed": 0}
    runfolder.record_stage(
        root, "train", {"dim": dim, "seeds": seeds, "min_count": 1}, "bench", 0.0,
        {"control": control_info, "labels": labels},
    )


def bare_top_k(root: Path, k: int) -> int:
    """Every model's blocked top-k (matrix product + argpartition), nothing else."""
    files = sorted(Path(root, "models").rglob("seed-*.npy"))
    files += sorted(Path(root, "control").rglob("seed-*.npy"))
    for path in files:
        vectors = np.load(path, mmap_mode="r", allow_pickle=False)
        vectors = (vectors / np.linalg.norm(vectors, axis=1, keepdims=True)).astype(np.float32)
        transposed = np.ascontiguousarray(vectors.T)
        n = len(vectors)
        rows = max(1, BLOCK_BYTES // (4 * n))
        best = np.empty((n, k), dtype=np.int64)
        for start in range(0, n, rows):
            block = vectors[start : start + rows] @ transposed
            best[start : start + rows] = np.argpartition(block, n - k, axis=1)[:, n - k :]
    return len(files)


def run_phase(args: list[str]) -> tuple[float, float, str]:
    """Run this script with ``args`` in a subprocess: (wall seconds, peak RSS in MiB, stdout)."""
    started = time.perf_counter()
    process = subprocess.Popen(
        [sys.executable, __file__, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE
    )
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - started
    out, err = process.stdout.read().decode(), process.stderr.read().decode()
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"phase {args[0]} failed:\n{err}")
    return seconds, usage.ru_maxrss / 1024, out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("phase", nargs="?", default="all", choices=["all", "build", "bare", "rank"])
    parser.add_argument("--root", type=Path)
    parser.add_argument("--slices", type=int, default=6)
    parser.add_argument("--words", type=int, default=50_000)
    parser.add_argument("--dim", type=int, default=100)
    parser.add_argument("--seeds", type=int, default=1)
    parser.add_argument("--control", action="store_true")
    parser.add_argument("--once", action="store_true", help="one bare run instead of two")
    parser.add_argument("--k", type=int, default=None, help="default: drift's DEFAULT_K")
    args = parser.parse_args()
    from drift.compare.ranking import DEFAULT_K

    k = args.k or DEFAULT_K

    if args.phase == "build":
        build_run(args.root, args.slices, args.words, args.dim, args.seeds, args.control)
        return
    if args.phase == "bare":
        print(json.dumps({"models": bare_top_k(args.root, k)}))
        return
    if args.phase == "rank":
        from drift.compare.ranking import rank_run

        scores = rank_run(args.root, k=k, quiet=True)
        print(json.dumps({"words": len(scores)}))
        return

    workdir = Path(tempfile.mkdtemp(prefix="drift-rank-bench-"))
    root = workdir / "run"
    try:
        shape = ["--slices", str(args.slices), "--words", str(args.words), "--dim", str(args.dim),
                 "--seeds", str(args.seeds)] + (["--control"] if args.control else [])
        build_seconds, _, _ = run_phase(["build", "--root", str(root), *shape])
        print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}; "
              f"run: {args.slices} slices x {args.words:,} words x {args.dim} dims, "
              f"{args.seeds} seed(s), control {'yes' if args.control else 'no'}, k={k} "
              f"(built in {build_seconds:.1f} s)")
        common = ["--root", str(root), "--k", str(k)]
        bare1 = run_phase(["bare", *common])
        print(f"bare top-k   {bare1[0]:7.1f} s  peak {bare1[1]:7.0f} MiB  {bare1[2].strip()}")
        rank = run_phase(["rank", *common])
        print(f"drift rank   {rank[0]:7.1f} s  peak {rank[1]:7.0f} MiB  {rank[2].strip()}")
        bare_times = [bare1[0]]
        if not args.once:
            bare2 = run_phase(["bare", *common])
            print(f"bare top-k   {bare2[0]:7.1f} s  peak {bare2[1]:7.0f} MiB")
            bare_times.append(bare2[0])
        bare_mean = sum(bare_times) / len(bare_times)
        memory_goal = "4 GB" if args.slices * args.words > 6 * 50_000 else "2 GB"
        print(f"ratio drift rank / bare top-k: {rank[0] / bare_mean:.2f} (goal <= 1.5); "
              f"peak memory {rank[1] / 1024:.2f} GiB (goal < {memory_goal}: 2 GB at 6 x "
              f"50,000 words, 4 GB at 10 x 100,000); load average now {os.getloadavg()[0]:.1f}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    main()
