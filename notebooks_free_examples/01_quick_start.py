"""Quick start: from a CSV of dated texts to the ranked table and one chart.

The story: the Pellmarrow Gazette archive (an invented harbour town, 1950-2009) has been scanned
into one CSV with a date column and a text column. Which words changed meaning?

    python notebooks_free_examples/01_quick_start.py [--archive FILE.csv.gz] [--out RUN]

``--quick`` trains tiny models (a smoke run, not a result).
"""

from __future__ import annotations

import argparse

from drift.compare.ranking import rank_run
from drift.embed.training import train_run
from drift.ingest.slicing import slice_archive
from drift.pipeline import demo_archive
from drift.publish.report import chart_word


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", default=None, help="CSV of dated texts (default: the demo)")
    parser.add_argument("--out", default="runs/quick-start", help="run folder")
    parser.add_argument("--quick", action="store_true", help="tiny models for a smoke run")
    args = parser.parse_args()
    archive = args.archive or demo_archive()
    training = {"dim": 32, "epochs": 2, "min_count": 5} if args.quick else {}

    # 1. One slice per decade; the columns 'date' and 'text' are found by their names.
    summary = slice_archive(archive, args.out, by="decade", quiet=True)
    print(summary[["label", "documents", "tokens", "types"]].to_string(index=False))

    # 2. One skip-gram model per decade and seed, plus the time-shuffled control pair.
    train_run(args.out, quiet=True, **training)

    # 3. Align the decades and rank the words of the first against the last decade.
    scores = rank_run(args.out, quiet=True)
    columns = ["rank", "word", "score", "displacement", "turnover", "q", "change_point"]
    print(scores[columns].head(10).to_string(index=False))

    # 4. One interactive page for the most-shifted word (opens from file:// with no network).
    page = chart_word(args.out, scores["word"].iloc[0])
    print(f"chart of '{scores['word'].iloc[0]}': {page}")


if __name__ == "__main__":
    main()
