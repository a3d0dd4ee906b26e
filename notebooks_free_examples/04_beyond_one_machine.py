"""Going beyond one machine: the same run on a Dask cluster, from many files.

The story: the Pellmarrow archive is small, but the regional archive it belongs to is not, and
it arrives as one compressed file per decade. drift reads the files as one archive, slices them
on a Dask cluster (one task per file) and trains there too (one task per slice and seed). The
run folder is the same as on one machine.

Where the cluster comes from (``--cluster``):

- ``auto`` (default): a batch scheduler's cluster through dask-jobqueue when ``sbatch``
  (SLURM), ``qsub`` (PBS) or ``bsub`` (LSF) is on the PATH and dask-jobqueue is installed
  (``pip install dask-jobqueue``); otherwise a LocalCluster on this machine.
- ``slurm``, ``pbs``, ``lsf``: that batch scheduler, through dask-jobqueue (an error if it is
  missing);
- ``local``: a LocalCluster.

On a batch scheduler each worker is one job of one core and ``--memory`` of memory (see the
README, "Sizing a cluster"); the run folder must be on a file system every job sees. From the
shell, the same run is:

    drift run 'parts/*.csv.gz' --out RUN --engine dask --scheduler tcp://HOST:8786

    python notebooks_free_examples/04_beyond_one_machine.py [--archive FILE] [--out RUN]
        [--cluster auto|local|slurm|pbs|lsf] [--workers 2] [--memory 4GB] [--quick]
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

import pandas as pd
from dask.distributed import LocalCluster

from drift.compare.ranking import rank_run
from drift.embed.training import train_run
from drift.ingest.slicing import read_counts, slice_archive
from drift.pipeline import demo_archive

BATCH_SYSTEMS = {"slurm": ("sbatch", "SLURMCluster"), "pbs": ("qsub", "PBSCluster"),
                 "lsf": ("bsub", "LSFCluster")}


def batch_cluster(kind: str, workers: int, memory: str):
    """A dask-jobqueue cluster of ``workers`` one-core jobs, or None when ``kind`` is auto and
    no batch scheduler (or no dask-jobqueue) is found here."""
    auto = kind == "auto"
    if auto:
        found = [name for name, (command, _) in BATCH_SYSTEMS.items() if shutil.which(command)]
        if not found:
            return None
        kind = found[0]
    command, class_name = BATCH_SYSTEMS[kind]
    if not shutil.which(command):
        raise SystemExit(f"--cluster {kind}: there is no {command} on the PATH here.")
    try:
        import dask_jobqueue  # imported only when a batch scheduler is there
    except ImportError:
        if not auto:
            raise SystemExit(f"--cluster {kind} needs dask-jobqueue: pip install dask-jobqueue") \
                from None
        print(f"found {command} but not dask-jobqueue (pip install dask-jobqueue); using a "
              "LocalCluster")
        return None
    cluster = getattr(dask_jobqueue, class_name)(
        cores=1, processes=1, memory=memory, walltime="02:00:00"
    )
    cluster.scale(jobs=workers)
    return cluster


def split_by_decade(archive: Path, folder: Path) -> list[Path]:
    """The archive as one gzipped CSV per decade (as a large archive arrives)."""
    folder.mkdir(parents=True, exist_ok=True)
    frame = pd.read_csv(archive, dtype=str)
    decade = frame["date"].str[:3]
    paths = []
    for value, part in frame.groupby(decade, sort=True):
        path = folder / f"pellmarrow-{value}0s.csv.gz"
        part.to_csv(path, index=False)
        paths.append(path)
    return paths


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", default=None, help="CSV of dated texts (default: the demo)")
    parser.add_argument("--out", default="runs/on-a-cluster", help="run folder (shared by workers)")
    parser.add_argument("--cluster", default="auto", choices=["auto", "local", *BATCH_SYSTEMS])
    parser.add_argument("--workers", type=int, default=2, help="workers (batch jobs)")
    parser.add_argument("--memory", default="4GB", help="memory per batch job")
    parser.add_argument("--quick", action="store_true", help="tiny models for a smoke run")
    args = parser.parse_args()
    archive = Path(args.archive or demo_archive())
    out = Path(args.out)
    training = {"dim": 32, "epochs": 2, "min_count": 5} if args.quick else {}

    parts = split_by_decade(archive, out.parent / f"{out.name}-parts")
    print(f"the archive in {len(parts)} files: {', '.join(p.name for p in parts)}")
    cluster = None if args.cluster == "local" else batch_cluster(
        args.cluster, args.workers, args.memory
    )
    if cluster is None:
        cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                               dashboard_address=None)
    with cluster:
        address = cluster.scheduler_address
        print(f"{type(cluster).__name__}, scheduler at {address}")
        summary = slice_archive(str(parts[0].parent / "*.csv.gz"), out, by="decade",
                                engine="dask", scheduler=address, quiet=True)
        print(summary[["label", "documents", "tokens"]].to_string(index=False))
        models = train_run(out, engine="dask", scheduler=address, workers=1, quiet=True,
                           **training)
    print(models[["group", "label", "seed", "seconds"]].to_string(index=False))
    scores = rank_run(out, quiet=True)
    print("top 5:", ", ".join(scores["word"].head(5)))
    vocabulary = int((read_counts(out) >= training.get("min_count", 20)).any(axis=1).sum())
    dim = training.get("dim", 100)
    megabytes = vocabulary * (500 + 2 * dim * 4) / 1e6  # gensim's Word2Vec.estimate_memory
    print(f"sizing: at most {vocabulary:,} words a model, about {megabytes:.1f} MB a model "
          f"(dim {dim}); see the README, 'Sizing a cluster'")


if __name__ == "__main__":
    main()
