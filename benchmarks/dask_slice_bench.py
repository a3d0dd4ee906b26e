"""Benchmark of ``drift slice --engine dask`` on many compressed files.

Run by hand (never in the test suite):

    python benchmarks/dask_slice_bench.py                          # 2 GB in 200 .csv.gz files
    python benchmarks/dask_slice_bench.py --megabytes 300 --files 60   # a few minutes on 2 cores
    python benchmarks/dask_slice_bench.py --megabytes 400 --files 1 --plain  # one large CSV

With ``--plain`` the files are uncompressed CSV; a file over 64 MB is then read in pieces that
start at a row (one Dask task each), so even one large file spreads over the workers.

It writes ``--files`` gzipped CSV files (id, date, text) of synthetic documents (the generator of
``slice_bench.py``) holding ``--megabytes`` MB of CSV text in all into a temporary folder under
/tmp, then slices the folder three ways, each in its own subprocess, one after another:

- the local engine (``drift slice FOLDER --out RUN``: one process, two tokenizing threads);
- ``--engine dask`` on a LocalCluster of 1 worker process (one thread);
- ``--engine dask`` on a LocalCluster of 2 worker processes (one thread each).

For each it reports the wall time, the throughput in MB of CSV text per second, and the peak
resident memory of the client process, of its largest child process (a Dask worker) and of
the whole process tree, sampled every 0.1 s with psutil, the CPU seconds of the client and of
its child processes (the last values seen before each process ended), and it checks that the
three run folders hold the same slice files, counts and document index. Goals (issue 14): Dask
with 2 workers at least 1.8 times as fast as with 1 worker; no slower than the local engine;
peak memory per worker under 600 MB. The load average is printed: the machine may be shared.
"""

from __future__ import annotations

import argparse
import filecmp
import gzip
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import psutil

sys.path.insert(0, str(Path(__file__).resolve().parent))
from slice_bench import document_pool  # noqa: E402

DASK_RUN = (
    "import sys; from drift.ingest.slicing import slice_archive; "
    "slice_archive(sys.argv[1], sys.argv[2], quiet=True, engine='dask', "
    "dask_workers=int(sys.argv[3]))"
)


def write_parts(
    folder: Path, megabytes: float, files: int, pool: list[str], plain: bool = False
) -> float:
    """``files`` gzipped (``plain``: uncompressed) CSV files holding about ``megabytes`` MB of
    CSV text; returns the MB of CSV text written."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(3)
    per_file = megabytes * 1e6 / files
    total = 0
    row = 0
    for number in range(files):
        lines = ["id,date,text\n"]
        size = len(lines[0])
        while size < per_file:
            pick = int(rng.integers(0, len(pool)))
            year, month, day = rng.integers(1990, 2020), rng.integers(1, 13), rng.integers(1, 29)
            line = f'{row},{year}-{month:02d}-{day:02d},"{pool[pick]}"\n'
            row += 1
            lines.append(line)
            size += len(line.encode("utf-8"))
        data = "".join(lines).encode("utf-8")
        total += len(data)
        if plain:
            (folder / f"part-{number:04d}.csv").write_bytes(data)
        else:
            (folder / f"part-{number:04d}.csv.gz").write_bytes(gzip.compress(data, compresslevel=6))
    return total / 1e6


def _cpu(proc: psutil.Process) -> float:
    times = proc.cpu_times()
    return times.user + times.system


def _sample(pid: int, peaks: dict[str, float], cpu: dict[int, float],
            stop: threading.Event) -> None:
    """Peak RSS of the process ``pid`` (the client), of its largest descendant (a Dask worker
    or nanny) and of the whole tree, and the last CPU seconds seen of each process, sampled
    every 0.1 s."""
    try:
        root = psutil.Process(pid)
    except psutil.NoSuchProcess:
        return
    while not stop.is_set():
        try:
            own = root.memory_info().rss / 1e6
            cpu[pid] = _cpu(root)
            others = []
            for proc in root.children(recursive=True):
                try:
                    others.append(proc.memory_info().rss / 1e6)
                    cpu[proc.pid] = _cpu(proc)
                except psutil.NoSuchProcess:
                    pass
        except psutil.NoSuchProcess:
            return
        peaks["client"] = max(peaks.get("client", 0.0), own)
        peaks["worker"] = max(peaks.get("worker", 0.0), max(others, default=0.0))
        peaks["tree"] = max(peaks.get("tree", 0.0), own + sum(others))
        stop.wait(0.1)


def measure(command: list[str], megabytes: float) -> dict[str, float]:
    """Run ``command``; wall seconds, MB/s and peak memory (one process, the tree)."""
    peaks: dict[str, float] = {}
    cpu: dict[int, float] = {}
    stop = threading.Event()
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    sampler = threading.Thread(
        target=_sample, args=(process.pid, peaks, cpu, stop), daemon=True
    )
    sampler.start()
    _, err = process.communicate()
    seconds = time.perf_counter() - started
    stop.set()
    sampler.join()
    if process.returncode != 0:
        raise SystemExit(f"{' '.join(command)} failed: {err.decode()[-2000:]}")
    return {
        "seconds": seconds,
        "mb_per_s": megabytes / seconds,
        "peak_client_mb": peaks.get("client", 0.0),
        "peak_worker_mb": peaks.get("worker", 0.0),
        "peak_tree_mb": peaks.get("tree", 0.0),
        "client_cpu_s": cpu.get(process.pid, 0.0),
        "others_cpu_s": sum(v for k, v in cpu.items() if k != process.pid),
    }


def same_outputs(first: Path, second: Path) -> bool:
    names = [p.relative_to(first) for p in (first / "slices").glob("*")] + [
        Path("counts.parquet"), Path("documents.parquet")
    ]
    return all(filecmp.cmp(first / n, second / n, shallow=False) for n in names)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--megabytes", type=float, default=2000, help="MB of CSV text in all")
    parser.add_argument("--files", type=int, default=200, help="number of .csv.gz files")
    parser.add_argument("--plain", action="store_true", help="uncompressed .csv files")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="drift-dask-slice-bench-", dir="/tmp") as folder:
        folder = Path(folder)
        clock = time.perf_counter()
        pool = document_pool(np.random.default_rng(0))
        csv_mb = write_parts(folder / "parts", args.megabytes, args.files, pool, args.plain)
        packed = sum(p.stat().st_size for p in (folder / "parts").iterdir()) / 1e6
        print(
            f"generated {args.files} files: {csv_mb:.0f} MB of CSV, {packed:.0f} MB on disk, "
            f"in {time.perf_counter() - clock:.0f} s"
        )
        print(f"machine: {os.cpu_count()} CPUs, {psutil.virtual_memory().total / 1e9:.1f} GB")
        print(f"load average before: {os.getloadavg()[0]:.2f}")
        parts = str(folder / "parts")
        runs = {
            "local": [sys.executable, "-m", "drift", "slice", parts, "--out",
                      str(folder / "run-local"), "--quiet"],
            "dask-1": [sys.executable, "-c", DASK_RUN, parts, str(folder / "run-dask-1"), "1"],
            "dask-2": [sys.executable, "-c", DASK_RUN, parts, str(folder / "run-dask-2"), "2"],
        }
        results = {}
        for name, command in runs.items():
            results[name] = r = measure(command, csv_mb)
            print(
                f"{name:7s} {r['seconds']:7.1f} s  {r['mb_per_s']:6.1f} MB/s  "
                f"peak RSS: client {r['peak_client_mb']:5.0f} MB, largest worker "
                f"{r['peak_worker_mb']:5.0f} MB, all {r['peak_tree_mb']:5.0f} MB; CPU seconds: "
                f"client {r['client_cpu_s']:5.1f}, workers {r['others_cpu_s']:5.1f}"
            )
        print(f"load average after: {os.getloadavg()[0]:.2f}")
        same = all(
            same_outputs(folder / "run-local", folder / f"run-{name}")
            for name in ("dask-1", "dask-2")
        )
        print(f"slice files, counts.parquet and documents.parquet identical: {same}")
        two_vs_one = results["dask-1"]["seconds"] / results["dask-2"]["seconds"]
        two_vs_local = results["local"]["seconds"] / results["dask-2"]["seconds"]
        print(f"dask 2 workers against 1 worker: {two_vs_one:.2f}x faster (goal >= 1.8)")
        print(f"dask 2 workers against the local engine: {two_vs_local:.2f}x (goal >= 1.0)")


if __name__ == "__main__":
    main()
