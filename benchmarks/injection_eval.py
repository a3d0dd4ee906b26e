"""Synthetic change injection benchmark: which measure and which k find injected changes best.

Protocol (after Shoemark et al. 2019; sense injection as in Dubossarsky et al. 2019): real
English text shipped with gensim (the shortened Wikipedia dump and lee_background.cor from
gensim/test/test_data, about 520,000 tokens) is cut into slices at random, so nothing really
changed; in the later slice a share of each donor word's occurrences is replaced by its target
word (shares 0.25, 0.5, 0.75, 1.0), and half of the occurrences of other words are deleted (a
frequency change only). The whole pipeline (slice -> train -> rank) runs on the dated CSV, once
with the injections and once on the same text without them.

Printed per measure and k, ranked as drift ranks (by score) and by z: average precision and
recall at 10 of the injected targets (and recall at 10 of the targets with share >= 0.5), the
false positive rate (untouched words significant at q <= 0.05), the frequency-only words and
donors that came out significant, and the false positive rate on the un-injected text.

    python benchmarks/injection_eval.py [--repeats 1] [--epochs 10] [--dim 50] [--ks 10,25]

Run by hand, never in the test suite.
"""

from __future__ import annotations

import argparse
import os
import platform
import tempfile
import time
from pathlib import Path

import pandas as pd

from drift.validate.injection import (
    ProtocolSettings,
    plan_archive,
    protocol_table,
    reference_documents,
    run_protocol,
)


def parse_args() -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument(
        "--repeats", type=int, default=1, help="protocol seeds (new words, new slices)"
    )
    parser.add_argument("--first-repeat", type=int, default=0, help="protocol seed to start at")
    parser.add_argument("--epochs", type=int, default=5)
    parser.add_argument("--dim", type=int, default=50)
    parser.add_argument("--min-count", type=int, default=20)
    parser.add_argument("--seeds", type=int, default=1, help="training seeds per slice")
    parser.add_argument("--ks", default="10,25", help="neighbour counts to compare")
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 2)
    parser.add_argument("--out", type=Path, default=None, help="keep the runs in this folder")
    return parser.parse_args()


def main() -> None:
    args = parse_args()
    ks = [int(k) for k in args.ks.split(",")]
    train_options = dict(
        dim=args.dim, epochs=args.epochs, min_count=args.min_count, seeds=args.seeds,
        workers=args.workers,
    )
    started = time.perf_counter()
    documents = reference_documents()
    print(f"text: {len(documents):,} documents, {sum(map(len, documents)):,} tokens "
          f"(gensim test data: Wikipedia dump + lee_background.cor)")
    workroot = Path(args.out or tempfile.mkdtemp(prefix="drift-injection-"))
    injected_tables, null_tables = [], []
    for repeat in range(args.first_repeat, args.first_repeat + args.repeats):
        settings = ProtocolSettings(seed=repeat)
        archive = plan_archive(documents, settings)
        print(f"repeat {repeat}: pairs {archive.pairs} shares {archive.shares}; "
              f"frequency-only {archive.frequency_only}")
        scored = run_protocol(archive, workroot / f"injected-{repeat}", ks=ks,
                              train_options=train_options, seed=repeat)
        injected_tables.append(protocol_table(archive, scored).assign(repeat=repeat))
        for measure_k, scores in scored.items():
            top = scores.sort_values("rank").head(10)["word"].tolist()
            print(f"  top 10 {measure_k}: {' '.join(top)}")
        shuffled = plan_archive(documents, settings, inject=False)
        scored_null = run_protocol(shuffled, workroot / f"shuffled-{repeat}", ks=ks,
                                   train_options=train_options, seed=repeat)
        null_tables.append(protocol_table(shuffled, scored_null).assign(repeat=repeat))
    keys = ["measure", "k", "ranked_by"]
    injected = pd.concat(injected_tables).groupby(keys, sort=False).mean(numeric_only=True)
    null = pd.concat(null_tables).groupby(keys, sort=False)["false_positive_rate"].mean()
    table = injected.drop(columns=["repeat", "words"]).assign(
        false_positive_rate_shuffled=null
    )
    pd.set_option("display.width", 200)
    print()
    print(table.round(3).to_string())
    machine = platform.processor() or platform.machine()
    print(f"\n{args.repeats} repeat(s), epochs {args.epochs}, dim {args.dim}, min count "
          f"{args.min_count}, {args.seeds} training seed(s); {machine}, {os.cpu_count()} cores; "
          f"{time.perf_counter() - started:.0f} s; runs in {workroot}")


if __name__ == "__main__":
    main()
