"""Benchmark of ``drift slice``: peak memory and throughput on a 100 MB and a 1 GB CSV.

Run by hand (never in the test suite):

    python benchmarks/slice_bench.py            # 100 MB and 1 GB
    python benchmarks/slice_bench.py --small 20 --large 200   # quicker

It writes two CSV files (id, date, text) of synthetic documents into a temporary folder under
/tmp, runs ``python -m drift slice FILE --out RUN --quiet`` on each in a subprocess, and reports
the wall time, throughput and the subprocess's peak resident memory (``ru_maxrss`` from
``os.wait4``), then deletes the folder. The goal: peak memory on the large file at most 1.2 times
that on the small one and under 600 MB; throughput at least 20 MB/s. Both runs happen side by
side in one invocation, so the ratio is measured under the same machine load (the load average
is printed too: the CPU may be shared).
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

VOCABULARY = 50_000
POOL_DOCUMENTS = 20_000


def synthetic_vocabulary(rng: np.random.Generator) -> np.ndarray:
    """Random letter strings (2 to 10 letters), plus a few capitalised and accented ones."""
    letters = np.array(list("abcdefghijklmnopqrstuvwxyz"))
    lengths = rng.integers(2, 11, VOCABULARY)
    words = np.array(["".join(rng.choice(letters, n)) for n in lengths], dtype=object)
    words[::97] = [w.capitalize() for w in words[::97]]
    words[::1009] = [w + "é" for w in words[::1009]]
    return words


def document_pool(rng: np.random.Generator) -> list[str]:
    """Documents of 50 to 400 Zipf-distributed words with commas, full stops and line breaks."""
    words = synthetic_vocabulary(rng)
    weights = 1.0 / np.arange(1, VOCABULARY + 1) ** 1.05
    weights /= weights.sum()
    lengths = rng.integers(50, 400, POOL_DOCUMENTS)
    ids = rng.choice(VOCABULARY, int(lengths.sum()), p=weights)
    tokens = words[ids]
    tokens[12::15] = [t + "," for t in tokens[12::15]]
    tokens[40::97] = [t + ".\n" for t in tokens[40::97]]
    ends = np.cumsum(lengths)
    return [" ".join(tokens[a:b]) + "." for a, b in zip(np.r_[0, ends[:-1]], ends, strict=False)]


def write_csv(path: Path, target_bytes: int, pool: list[str], seed: int) -> int:
    """Write rows (id, date, quoted text) from ``pool`` up to ``target_bytes``; returns the size."""
    rng = np.random.default_rng(seed)
    written = 0
    row = 0
    with open(path, "w", encoding="utf-8", newline="") as out:
        out.write("id,date,text\n")
        while written < target_bytes:
            picks = rng.integers(0, len(pool), 5_000)
            years = rng.integers(1990, 2020, 5_000)
            months = rng.integers(1, 13, 5_000)
            days = rng.integers(1, 29, 5_000)
            chunk = "".join(
                f'{row + i},{y}-{m:02d}-{d:02d},"{pool[p]}"\n'
                for i, (p, y, m, d) in enumerate(zip(picks, years, months, days, strict=False))
            )
            row += 5_000
            out.write(chunk)
            written += len(chunk.encode("utf-8"))
    return path.stat().st_size


def measure(source: Path, run: Path) -> dict[str, float]:
    """Run drift slice in a subprocess; wall seconds, MB/s and peak RSS (MB) of that process."""
    command = [sys.executable, "-m", "drift", "slice", str(source), "--out", str(run), "--quiet"]
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - started
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"drift slice failed on {source}: {process.stderr.read().decode()}")
    size_mb = source.stat().st_size / 1e6
    return {
        "size_mb": size_mb,
        "seconds": seconds,
        "mb_per_s": size_mb / seconds,
        "peak_rss_mb": usage.ru_maxrss / 1024,  # Linux reports KiB
        "cpu_seconds": usage.ru_utime + usage.ru_stime,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--small", type=float, default=100, help="size of the small CSV in MB")
    parser.add_argument("--large", type=float, default=1000, help="size of the large CSV in MB")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="drift-slice-bench-", dir="/tmp") as folder:
        folder = Path(folder)
        clock = time.perf_counter()
        pool = document_pool(np.random.default_rng(0))
        sizes = {"small": args.small, "large": args.large}
        files = {}
        for name, megabytes in sizes.items():
            files[name] = folder / f"{name}.csv"
            write_csv(files[name], int(megabytes * 1e6), pool, seed=1 if name == "small" else 2)
        print(f"generated the CSV files in {time.perf_counter() - clock:.0f} s")
        print(f"load average before: {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs")
        results = {}
        for name in ("small", "large"):
            results[name] = measure(files[name], folder / f"run-{name}")
            r = results[name]
            print(
                f"{name:5s} {r['size_mb']:8.1f} MB  {r['seconds']:7.1f} s  "
                f"{r['mb_per_s']:6.1f} MB/s  "
                f"peak RSS {r['peak_rss_mb']:6.0f} MB  CPU {r['cpu_seconds']:6.1f} s"
            )
        print(f"load average after: {os.getloadavg()[0]:.2f}")
        ratio = results["large"]["peak_rss_mb"] / results["small"]["peak_rss_mb"]
        print(f"peak memory ratio large/small: {ratio:.2f} (goal <= 1.2)")
        print(
            f"peak memory on the large file: {results['large']['peak_rss_mb']:.0f} MB (goal < 600)"
        )
        print(f"throughput on the large file: {results['large']['mb_per_s']:.1f} MB/s (goal >= 20)")


if __name__ == "__main__":
    main()
