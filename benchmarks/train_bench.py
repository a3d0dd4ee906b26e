"""Benchmark of the train stage (run by hand, never in the test suite).

Trains the same slices with the same parameters, side by side in one run:

* ``bare``: bare gensim calls in a plain loop, one model after the other, each with all cores as
  gensim threads (what one would write by hand), saving each model's KeyedVectors;
* ``drift``: ``drift train RUN --workers <all cores>`` (local engine);
* ``drift-1``: ``drift train RUN --workers 1`` (local engine on one core);
* ``bare-1``: the bare loop with one gensim thread: ``bare-1 / bare`` is what the cores of this
  machine give gensim itself at the time of the run, the ceiling for any engine's speed-up.

Each variant runs as its own Python process (interpreter start and imports included for all),
on a fresh copy of the run folder, so nothing is reused. With ``--rounds N`` the variants are
interleaved N times and the median is reported, which evens out other load on a shared machine.

Text: gensim's bundled shortened English Wikipedia dump and the Lee corpora (real text), cut
into equal slices.

    python benchmarks/train_bench.py [--slices 4] [--seeds 2] [--epochs 5] [--rounds 1]
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

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

PARAMS = {"dim": 100, "window": 5, "negative": 5, "sample": 1e-3, "min_count": 5}


def build_run(root: Path, n_slices: int) -> Path:
    from train_fixtures import LEE_BACKGROUND, corpus_lines, make_run, wiki_lines

    lines = wiki_lines() + corpus_lines(LEE_BACKGROUND) + corpus_lines("lee.cor")
    size = -(-len(lines) // n_slices)
    slices = {str(2001 + i): lines[i * size : (i + 1) * size] for i in range(n_slices)}
    return make_run(root, slices)


def bare_loop(run: Path, seeds: int, epochs: int, threads: int) -> None:
    """Bare gensim: one Word2Vec per slice and seed in a plain loop (this runs in a subprocess)."""
    from gensim.models import Word2Vec

    labels = json.loads((run / "run.json").read_text())["stages"]["slice"]["labels"]
    out = run / "bare"
    out.mkdir(exist_ok=True)
    for label in labels:
        for seed in range(seeds):
            model = Word2Vec(
                corpus_file=str(run / "slices" / f"{label}.txt"),
                sg=1,
                hs=0,
                vector_size=PARAMS["dim"],
                window=PARAMS["window"],
                negative=PARAMS["negative"],
                sample=PARAMS["sample"],
                min_count=PARAMS["min_count"],
                epochs=epochs,
                seed=1 + seed,
                workers=threads,
            )
            model.wv.save(str(out / f"{label}-seed-{seed}.kv"))


def timed(command: list[str]) -> tuple[float, float]:
    """Wall and CPU seconds (user + system) of one command and every process it starts.

    CPU time is sampled from the process tree every 0.1 s (psutil), because pool workers forked
    by a fork server are not children that the kernel's rusage would count for us.
    """
    import psutil

    cpu_by_pid: dict[int, float] = {}
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL)
    root = psutil.Process(process.pid)
    while process.poll() is None:
        try:
            tree = [root, *root.children(recursive=True)]
        except psutil.NoSuchProcess:
            break
        for member in tree:
            try:
                times = member.cpu_times()
                cpu_by_pid[member.pid] = times.user + times.system
            except psutil.NoSuchProcess:
                pass
        time.sleep(0.1)
    wall = time.perf_counter() - started
    if process.wait() != 0:
        raise SystemExit(f"{command[:4]} failed")
    return wall, sum(cpu_by_pid.values())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--slices", type=int, default=4)
    parser.add_argument("--seeds", type=int, default=2)
    parser.add_argument("--epochs", type=int, default=5)
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--bare", type=Path, help=argparse.SUPPRESS)  # internal: run bare loop
    parser.add_argument("--threads", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args()

    from drift.embed.engines import available_cores

    cores = available_cores()
    if args.bare:
        bare_loop(args.bare, args.seeds, args.epochs, args.threads or cores)
        return

    workdir = Path(tempfile.mkdtemp(prefix="drift-train-bench-"))
    try:
        source = build_run(workdir / "source", args.slices)
        tokens = sum(len(p.read_text().split()) for p in (source / "slices").glob("*.txt"))
        common = [
            "--dim", str(PARAMS["dim"]), "--window", str(PARAMS["window"]),
            "--negative", str(PARAMS["negative"]), "--sample", str(PARAMS["sample"]),
            "--min-count", str(PARAMS["min_count"]), "--epochs", str(args.epochs),
            "--seeds", str(args.seeds), "--no-control", "--quiet",
        ]  # fmt: skip
        variants = {
            "bare": lambda run: [sys.executable, __file__, "--bare", str(run),
                                 "--seeds", str(args.seeds), "--epochs", str(args.epochs)],
            "drift": lambda run: [sys.executable, "-m", "drift", "train", str(run), *common,
                                  "--workers", str(cores)],
            "drift-1": lambda run: [sys.executable, "-m", "drift", "train", str(run), *common,
                                    "--workers", "1"],
            "bare-1": lambda run: [sys.executable, __file__, "--bare", str(run), "--threads", "1",
                                   "--seeds", str(args.seeds), "--epochs", str(args.epochs)],
        }  # fmt: skip
        times: dict[str, list[tuple[float, float]]] = {name: [] for name in variants}
        load_before = os.getloadavg()
        for round_ in range(args.rounds):
            for name, command in variants.items():
                run = workdir / f"{name}-{round_}"
                shutil.copytree(source, run)
                times[name].append(timed(command(run)))
                shutil.rmtree(run)
                print(f"round {round_ + 1} {name:8s} wall {times[name][-1][0]:6.1f} s "
                      f"cpu {times[name][-1][1]:6.1f} s", flush=True)  # fmt: skip
        load_after = os.getloadavg()
    finally:
        shutil.rmtree(workdir, ignore_errors=True)

    wall = {name: statistics.median(w for w, _ in values) for name, values in times.items()}
    cpu = {name: statistics.median(c for _, c in values) for name, values in times.items()}
    print()
    print(f"{args.slices} slices x {args.seeds} seeds, {tokens:,} tokens in all, skip-gram, "
          f"dim {PARAMS['dim']}, {args.epochs} epochs; {cores} cores; "
          f"median of {args.rounds} round(s)")  # fmt: skip
    print(f"load average before {load_before[0]:.2f}, after {load_after[0]:.2f} "
          "(other work on the same machine)")  # fmt: skip
    for name in variants:
        print(f"  {name:8s} wall {wall[name]:6.1f} s   cpu {cpu[name]:6.1f} s")
    print(f"drift / bare wall time:            {wall['drift'] / wall['bare']:.2f} "
          "(target at most 1.10)")  # fmt: skip
    print(f"drift 1 core / {cores} cores wall time:   {wall['drift-1'] / wall['drift']:.2f} "
          "(target at least 1.7 on 2 cores)")  # fmt: skip
    print(f"bare 1 thread / {cores} threads wall time: {wall['bare-1'] / wall['bare']:.2f} "
          "(what this machine gives gensim itself)")  # fmt: skip
    print("per round (the load from other work changes between rounds):")
    for round_ in range(args.rounds):
        w = {name: values[round_][0] for name, values in times.items()}
        print(f"  round {round_ + 1}: drift/bare {w['drift'] / w['bare']:.2f}, "
              f"drift 1 core/{cores} cores {w['drift-1'] / w['drift']:.2f}, "
              f"bare 1 thread/{cores} threads {w['bare-1'] / w['bare']:.2f}")  # fmt: skip


if __name__ == "__main__":
    main()
