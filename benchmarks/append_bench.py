"""Benchmark of a growing archive: appending one year to a twenty-year run.

Run by hand (never in the test suite):

    python benchmarks/append_bench.py                  # 20 years of about 300k tokens each
    python benchmarks/append_bench.py --tokens 100000  # quicker

Text: synthetic documents (Zipf-distributed random words, the generator of slice_bench.py), one
CSV of twenty years (2000-2019) and one CSV of the year 2020. The question is cost, not meaning,
so invented text is enough here.

Steps, each ``python -m drift ...`` in a subprocess (wall seconds and CPU seconds from
``os.wait4``):

1. the twenty-year run: ``slice --by year`` and ``train`` (not timed against anything);
2. the append: ``slice 2020.csv --out RUN --append`` then ``train RUN`` (only the new slice's
   models are trained; the others are reused);
3. the new slice's own cost, two ways:
   a. slicing the new year's file into a fresh folder (``--by even:2``; a run of one slice
      cannot be trained, and slicing costs the same however the year is cut) plus the seconds
      the train stage recorded for the new model in step 2 (``models/2020/seed-0.json``: the
      vocabulary scan and the epochs; not the import of gensim, the shuffled copy of the lines
      or the saving);
   b. the same slicing plus a bare training of the new year's text in a process of its own
      (``python -c`` with gensim alone, ``BARE_TRAIN``: start Python, import gensim, train with
      the same parameters and threads, save the vectors with numpy). Training one year always
      costs a process and gensim's import; this is the cost of the year without drift.

Target: step 2 costs at most step 3 plus 10% (the rest of step 2 is drift's overhead: starting,
checking the twenty kept slices, merging the tables). Both ratios are printed; (b) is the
year's whole cost, (a) leaves the fixed costs of any training out of it. Training runs with
``--no-control``: the control pair is made from the first and last compared slices, and the
last slice is the new one, so a control would add the same two models to both sides. Steps 2
and 3 run ``--rounds`` times (fresh copies of the twenty-year run) and the medians are compared.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from slice_bench import document_pool  # noqa: E402  (the same synthetic text)

TRAIN = ["--seeds", "1", "--no-control", "--dim", "100", "--epochs", "5", "--quiet"]
#: Step 3b: one year's model trained by gensim alone, with drift's default parameters (skip-gram,
#: window 5, negative 5, sub-sampling 1e-3, min count 20) and TRAIN's, on as many threads as drift
#: gave the new model (its sidecar's ``threads``); argv: slice file, output, threads.
BARE_TRAIN = """
import sys, numpy as np
from gensim.models import Word2Vec
model = Word2Vec(corpus_file=sys.argv[1], sg=1, vector_size=100, window=5, negative=5,
                 sample=1e-3, min_count=20, epochs=5, seed=1, workers=int(sys.argv[3]))
np.save(sys.argv[2], model.wv.vectors)
"""


def write_years(path: Path, years: range, tokens_per_year: int, pool: list[str], seed: int) -> int:
    """A CSV (id, date, text) with about ``tokens_per_year`` tokens in each of ``years``."""
    rng = np.random.default_rng(seed)
    lengths = np.array([len(doc.split()) for doc in pool])
    total = 0
    with open(path, "w", encoding="utf-8", newline="") as out:
        out.write("id,date,text\n")
        row = 0
        for year in years:
            tokens = 0
            while tokens < tokens_per_year:
                pick = int(rng.integers(0, len(pool)))
                month, day = int(rng.integers(1, 13)), int(rng.integers(1, 29))
                out.write(f'{row},{year}-{month:02d}-{day:02d},"{pool[pick]}"\n')
                tokens += int(lengths[pick])
                row += 1
            total += tokens
    return total


def drift(*args: str) -> tuple[float, float]:
    """Run ``python -m drift ARGS``; (wall seconds, CPU seconds) of the process and children."""
    started = time.perf_counter()
    process = subprocess.Popen([sys.executable, "-m", "drift", *args],
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    seconds = time.perf_counter() - started
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"drift {' '.join(args)} failed: {process.stderr.read().decode()}")
    return seconds, usage.ru_utime + usage.ru_stime


def bare_train(corpus: Path, output: Path, threads: int) -> tuple[float, float]:
    """Step 3b's training: ``BARE_TRAIN`` in a process of its own; (wall, CPU) seconds."""
    started = time.perf_counter()
    process = subprocess.Popen([sys.executable, "-c", BARE_TRAIN, str(corpus), str(output),
                                str(threads)],
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(process.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"bare training failed: {process.stderr.read().decode()}")
    return time.perf_counter() - started, usage.ru_utime + usage.ru_stime


def add(a: tuple[float, float], b: tuple[float, float]) -> tuple[float, float]:
    return a[0] + b[0], a[1] + b[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tokens", type=int, default=300_000, help="tokens per year")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="drift-append-bench-", dir="/tmp") as folder:
        folder = Path(folder)
        pool = document_pool(np.random.default_rng(0))
        old, new = folder / "2000-2019.csv", folder / "2020.csv"
        old_tokens = write_years(old, range(2000, 2020), args.tokens, pool, seed=1)
        new_tokens = write_years(new, range(2020, 2021), args.tokens, pool, seed=2)
        print(f"text: {old_tokens:,} tokens in 20 years, {new_tokens:,} in the new year; "
              f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs")
        base = folder / "base"
        first = add(drift("slice", str(old), "--out", str(base), "--by", "year", "--quiet"),
                    drift("train", str(base), *TRAIN))
        print(f"twenty-year run: slice + train {first[0]:.1f} s wall, {first[1]:.1f} s CPU")
        appended, alone, bare = [], [], []
        for round_number in range(args.rounds):
            run = folder / f"grown-{round_number}"
            shutil.copytree(base, run)
            appended.append(add(
                drift("slice", str(new), "--out", str(run), "--append", "--quiet"),
                drift("train", str(run), *TRAIN),
            ))
            fresh = folder / f"fresh-{round_number}"
            sliced = drift("slice", str(new), "--out", str(fresh), "--by", "even:2", "--quiet")
            record = json.loads((run / "models" / "2020" / "seed-0.json").read_text())
            alone.append((sliced[0] + float(record["seconds"]), sliced[1]))
            trained = bare_train(run / "slices" / "2020.txt", folder / f"bare-{round_number}.npy",
                                 int(record["threads"]))
            bare.append(add(sliced, trained))
            print(f"round {round_number + 1}: append + train {appended[-1][0]:.1f} s; the new "
                  f"slice's own cost (a) {alone[-1][0]:.1f} s (slicing {sliced[0]:.1f} s + its "
                  f"model's recorded {float(record['seconds']):.1f} s), (b) {bare[-1][0]:.1f} s "
                  f"(slicing + gensim alone in its own process {trained[0]:.1f} s)")
        appended_median = statistics.median(a[0] for a in appended)
        for name, own in (("(a) recorded model seconds", alone), ("(b) gensim alone", bare)):
            ratio = appended_median / statistics.median(a[0] for a in own)
            print(f"append + train / the new slice's own cost {name} (medians): {ratio:.2f}x "
                  "(target at most 1.10x)")
        print(f"load average after {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
