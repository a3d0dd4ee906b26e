"""What the context change adds to the rank stage: its time beside the embedding measures'.

On a trained run folder (e.g. the calibration benchmark's real archive), side by side in one
process: ``measure_run`` without the context change, then the context change alone
(``drift.compare.contexts.context_change`` on the compared pair's slice files), ``--rounds``
times each, alternating; prints medians and the peak resident memory of a context-only process.

    python benchmarks/context_bench.py bench-out/calib/real-seed1 [--rounds 3]

Run by hand, never in the test suite.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

ONLY_CONTEXT = """
import sys
from drift.compare.ranking import read_run_inputs, load_slice_vectors, measure_contexts
inputs = read_run_inputs(sys.argv[1])
pair = (inputs.labels[0], inputs.labels[-1])
first = load_slice_vectors(inputs.paths, pair[0], inputs.seeds[0])
last = load_slice_vectors(inputs.paths, pair[1], inputs.seeds[0])
words = [w for w in first.words if w in last.index]
measure_contexts(inputs, pair, words, first, last, [])
import resource
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("run", type=Path)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()

    import drift.compare.ranking as ranking
    from drift.compare.alignment import parse_anchors

    inputs = ranking.read_run_inputs(args.run)
    pair = (inputs.labels[0], inputs.labels[-1])
    tokens = sum(inputs.tokens[label] for label in pair)
    counting = ranking.measure_contexts
    embedding, context = [], []
    for _ in range(args.rounds):
        ranking.measure_contexts = lambda *a, **k: None  # the embedding measures alone
        started = time.perf_counter()
        measured = ranking.measure_run(inputs, pair, pair[0], 50, parse_anchors(None), quiet=True)
        embedding.append(time.perf_counter() - started)
        ranking.measure_contexts = counting
        started = time.perf_counter()
        counting(inputs, pair, measured.words, measured.vocab_from, measured.vocab_to, [])
        context.append(time.perf_counter() - started)
    peak_kib = int(subprocess.run([sys.executable, "-c", ONLY_CONTEXT, str(args.run)],
                                  capture_output=True, text=True, check=True).stdout.split()[-1])
    e, c = statistics.median(embedding), statistics.median(context)
    print(f"{args.run}: {len(measured.words):,} words, {tokens:,} tokens in the compared pair")
    print(f"embedding measures (measure_run without contexts): {e:.1f} s (median of "
          f"{args.rounds})")
    print(f"context change: {c:.1f} s, {c / e:.2f}x the embedding measures' time; "
          f"peak memory of a process doing only it {peak_kib / 1024:.0f} MB")
    print(f"load average {open('/proc/loadavg').read().split()[0]}; this process peak "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
