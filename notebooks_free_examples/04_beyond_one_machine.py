"""Going beyond one machine: the same run on a Dask cluster.

The story: the Pellmarrow archive is small, but the regional archive it belongs to is not.
Training is the expensive stage, one task per slice and seed; drift can hand those tasks to a
Dask cluster. Here a LocalCluster stands in for the cluster.

To use a real cluster instead, start a scheduler and workers that all see the run folder on a
shared file system, then pass its address:

    # on a SLURM or PBS cluster, with dask-jobqueue:
    #   from dask_jobqueue import SLURMCluster
    #   cluster = SLURMCluster(cores=8, memory="16GB"); cluster.scale(jobs=4)
    #   address = cluster.scheduler_address
    # or from the shell:  drift train RUN --engine dask --scheduler tcp://HOST:8786

    python notebooks_free_examples/04_beyond_one_machine.py [--archive FILE] [--out RUN] [--quick]
"""

from __future__ import annotations

import argparse

from dask.distributed import LocalCluster

from drift.compare.ranking import rank_run
from drift.embed.training import train_run
from drift.ingest.slicing import slice_archive
from drift.pipeline import demo_archive


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", default=None, help="CSV of dated texts (default: the demo)")
    parser.add_argument("--out", default="runs/on-a-cluster", help="run folder (shared by workers)")
    parser.add_argument("--quick", action="store_true", help="tiny models for a smoke run")
    args = parser.parse_args()
    archive = args.archive or demo_archive()
    training = {"dim": 32, "epochs": 2, "min_count": 5} if args.quick else {}

    slice_archive(archive, args.out, by="decade", quiet=True)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True) as cluster:
        print(f"scheduler at {cluster.scheduler_address}")
        models = train_run(args.out, engine="dask", scheduler=cluster.scheduler_address,
                           workers=1, quiet=True, **training)
    print(models[["group", "label", "seed", "seconds"]].to_string(index=False))
    scores = rank_run(args.out, quiet=True)
    print("top 5:", ", ".join(scores["word"].head(5)))


if __name__ == "__main__":
    main()
