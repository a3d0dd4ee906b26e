"""Choosing slices: decades against equal-size slices, and balancing, with what changes and why.

The story: the Pellmarrow archive is not evenly spread over time in every collection. How the
archive is cut decides what a "period" means and how noisy each period's vectors are:

- ``by="decade"`` gives calendar periods a historian can name, of whatever size they happen to be;
- ``by="even:6"`` gives six slices of (nearly) equal token count, so every model sees as much
  text, at the price of boundaries that fall mid-decade;
- ``balance="smallest"`` keeps calendar periods but down-samples each to the smallest one's
  token count (seeded), because slice size is a known confound of displacement.

    python notebooks_free_examples/02_choosing_slices.py [--archive FILE] [--out FOLDER] [--quick]
"""

from __future__ import annotations

import argparse
from pathlib import Path

from scipy.stats import spearmanr

from drift.compare.ranking import rank_run
from drift.embed.training import train_run
from drift.ingest.slicing import slice_archive
from drift.pipeline import demo_archive


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", default=None, help="CSV of dated texts (default: the demo)")
    parser.add_argument("--out", default="runs/choosing-slices", help="folder for the runs")
    parser.add_argument("--quick", action="store_true", help="tiny models for a smoke run")
    args = parser.parse_args()
    archive = args.archive or demo_archive()
    out = Path(args.out)
    training = {"dim": 32, "epochs": 2, "min_count": 5} if args.quick else {}

    cuts = {"decades": {"by": "decade"}, "even": {"by": "even:6"},
            "balanced": {"by": "decade", "balance": "smallest"}}
    for name, options in cuts.items():
        summary = slice_archive(archive, out / name, quiet=True, **options)
        spread = summary["tokens"].max() / summary["tokens"].min()
        print(f"\n{name}: largest slice / smallest slice = {spread:.2f}")
        print(summary[["label", "start", "end", "tokens"]].to_string(index=False))

    # Train and rank decades and balanced decades the same way; compare their rankings.
    ranked = {}
    for name in ("decades", "balanced"):
        train_run(out / name, quiet=True, **training)
        ranked[name] = rank_run(out / name, quiet=True).set_index("word")
    shared = ranked["decades"].index.intersection(ranked["balanced"].index)
    rho = spearmanr(ranked["decades"].loc[shared, "score"], ranked["balanced"].loc[shared, "score"])
    print(f"\nSpearman correlation of the rankings over {len(shared)} words: {rho.statistic:.2f}")
    for name, scores in ranked.items():
        print(f"top 5 ({name}):", ", ".join(scores.sort_values("rank").index[:5]))
    print("Words high in one list only are the ones whose score depended on slice size.")


if __name__ == "__main__":
    main()
