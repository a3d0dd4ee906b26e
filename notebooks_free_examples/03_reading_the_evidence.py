"""Reading the evidence: the null from the control, z and q, the seed spread, example sentences.

The story: a lexicographer at the Pellmarrow museum wants to write that 'screen' changed meaning
in the town's press, and that 'herring' merely became rarer. What does drift's evidence say, and
how sure can she be?

    python notebooks_free_examples/03_reading_the_evidence.py [--archive FILE] [--out RUN] [--quick]
"""

from __future__ import annotations

import argparse

from drift.compare.ranking import rank_record, rank_run, read_timeline
from drift.embed.training import train_run
from drift.ingest.slicing import slice_archive
from drift.pipeline import demo_archive
from drift.publish.evidence import example_sentences


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", default=None, help="CSV of dated texts (default: the demo)")
    parser.add_argument("--out", default="runs/evidence", help="run folder")
    parser.add_argument("--quick", action="store_true", help="tiny models for a smoke run")
    parser.add_argument("--words", nargs="+", default=["screen", "herring"])
    args = parser.parse_args()
    archive = args.archive or demo_archive()
    training = {"dim": 32, "epochs": 2, "min_count": 5} if args.quick else {}

    slice_archive(archive, args.out, by="decade", quiet=True)
    train_run(args.out, quiet=True, **training)
    scores = rank_run(args.out, quiet=True).set_index("word")

    # The control pair: the compared decades' documents pooled, shuffled and split in two. No
    # time separates the halves, so any displacement there is noise. The null is that noise as
    # a function of word frequency; z says how far above it a word sits, q controls the false
    # discovery rate over all words (Benjamini-Hochberg). With the default measure, evidence,
    # z combines two such z per word: of its displacement and of its local neighbourhood change.
    flagged = rank_record(args.out).get("control_flagged")
    print(f"words the control itself would flag as changed: {flagged} (should be few)")
    print(f"words significant at q < 0.05: {int(scores['significant'].sum())} of {len(scores)}")

    timeline = read_timeline(args.out)
    for word in args.words:
        if word not in scores.index:
            print(f"\n{word}: not measured in both compared slices (too rare with these settings)")
            continue
        row = scores.loc[word]
        print(f"\n== {word}: rank {row['rank']}, displacement {row['displacement']:.3f} "
              f"(seed spread {row['displacement_sd']:.3f}), "
              f"null centre {row['null_centre']:.3f}, z {row['z']:.1f}, q {row['q']:.2g}, "
              f"counts {row['count_from']} -> {row['count_to']}")
        print(f"   change point: {row['change_point']} (step {row['change_step']:.3f}); "
              f"gained: {row['gained']}; lost: {row['lost']}")
        print(timeline[timeline["word"] == word][["slice", "distance", "count", "null_p95"]]
              .to_string(index=False))
        # Statistics point; sentences persuade. Read them before concluding.
        for _, example in example_sentences(args.out, word, per_slice=1).iterrows():
            print(f"   [{example['slice']}] {example['sentence']}")


if __name__ == "__main__":
    main()
