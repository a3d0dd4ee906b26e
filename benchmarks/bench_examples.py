"""Example sentences: one streaming pass for many words against one pass per word (run by hand).

Builds a slice file of about SIZE_MB from gensim's Lee background corpus (real news text,
repeated) and times, side by side in one run, drawing 3 examples for the top-N words with
``examples_for_words`` (one pass) and with ``example_sentences`` per word (N passes); also the peak
Python memory of the single pass.

    python benchmarks/bench_examples.py [SIZE_MB] [N]
"""

from __future__ import annotations

import re
import sys
import tempfile
import time
import tracemalloc
from collections import Counter
from pathlib import Path

from gensim.test.utils import datapath

from drift.publish import evidence


def build(folder: Path, size_mb: int) -> tuple[Path, list[str]]:
    with open(datapath("lee_background.cor"), encoding="utf-8") as handle:
        lines = [" ".join(re.findall(r"\w+", line.lower())) for line in handle if line.strip()]
    block = "\n".join(lines) + "\n"
    slices = folder / "slices"
    slices.mkdir(parents=True)
    target = slices / "big.txt"
    with open(target, "w", encoding="utf-8") as out:
        written = 0
        while written < size_mb * 1_000_000:
            out.write(block)
            written += len(block)
    (slices / "summary.csv").write_text(
        "label,start,end,documents,tokens,types,dropped\nbig,2000-01-01,2000-12-31,0,0,0,0\n"
    )
    counts = Counter(t for line in lines for t in line.split())
    # words of middling frequency, as a ranked list's top words tend to be
    words = [w for w, c in counts.most_common() if 20 <= c <= 60]
    return folder, words


def main() -> None:
    size_mb = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 20
    with tempfile.TemporaryDirectory() as tmp:
        run, words = build(Path(tmp) / "run", size_mb)
        words = words[:n]
        size = (run / "slices" / "big.txt").stat().st_size / 1e6
        started = time.perf_counter()
        evidence.examples_for_words(run, words, per_slice=3, seed=0)
        one_pass = time.perf_counter() - started
        tracemalloc.start()  # slows Python down a lot: a separate, untimed run
        evidence.examples_for_words(run, words, per_slice=3, seed=0)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        started = time.perf_counter()
        for word in words:
            evidence.example_sentences(run, word, per_slice=3, seed=0)
        per_word = time.perf_counter() - started
    print(f"slice file {size:.0f} MB, {n} words")
    print(f"one pass for all words: {one_pass:.1f} s ({size / one_pass:.0f} MB/s)")
    print(f"one pass per word:      {per_word:.1f} s ({size * n / per_word:.0f} MB/s scanned)")
    print(f"ratio per-word / one-pass: {per_word / one_pass:.1f}x")
    print(f"peak traced memory of the one pass: {peak / 1e6:.1f} MB")


if __name__ == "__main__":
    main()
