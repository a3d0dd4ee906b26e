"""Calibration benchmark on real text: is `significant` powerful on injected change, restrained
on corpus-wide drift, fair across frequencies and stable across seeds?

Text (real, written by no one on the team, gathered at benchmark time, never stored in the
repository): the change logs and documentation files that installed Debian packages carry
(``benchmarks/real_text.py``; each package's own licence, see /usr/share/doc/<pkg>/copyright)
plus the English text gensim ships for its tests (a shortened Wikipedia dump and the Lee
background corpus; gensim is LGPL-2.1), about 5.5 million tokens on the machine the README names.

Two steps, so that the trained models serve every candidate method:

    python benchmarks/calibration_eval.py build --out bench-out/calib [--repeats 4]
    python benchmarks/calibration_eval.py evaluate --out bench-out/calib

``build`` makes, for each protocol seed, the text shuffled into four pseudo-years with eight
target words given a second sense in the last year (a share of 0.4 to 0.8 of a donor word's
occurrences become the target; Shoemark et al. 2019 protocol), and the same shuffle without any
injection; and, once, the real dated change-log archive cut into three periods, trained twice
with different seeds. ``evaluate`` ranks every run with every candidate calibration and prints
the figures issue #9 asks for.

Run by hand, never in the test suite.
"""

from __future__ import annotations

import argparse
import json
import os
import pickle
import platform
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent))

from real_text import documents as doc_text  # noqa: E402
from real_text import write_dated_csv  # noqa: E402

from drift.compare.seedmeasures import DEFAULT_ANCHOR_TRIM  # noqa: E402
from drift.validate.injection import (  # noqa: E402
    InjectedArchive,
    build_archive,
    choose_pairs,
    choose_words,
    reference_documents,
    word_counts,
)
from drift.validate.injection import write_dated_csv as write_protocol_csv  # noqa: E402

#: Four pseudo-years; the change is injected into the last one only.
SLICES = 4
SHARES = (0.4, 0.5, 0.6, 0.8)
#: Target counts over the whole text (about 125 to 500 per pseudo-year) and donors 2 to 6 times
#: as common, so that at share 0.5 a third to three quarters of a target's last-year
#: occurrences carry the donor's contexts.
TARGET_COUNTS = (500, 2000)
DONOR_RATIO = (2.0, 6.0)
#: The real archive's three periods (edges), chosen for near-equal token counts (about 1.1 to 1.2
#: million each) on the benchmark machine.
REAL_EDGES = "edges:1990,2013,2020,2027"
REAL_TRAIN_SEEDS = (1, 101)


def injection_text() -> list[list[str]]:
    return doc_text() + reference_documents()


def plan(documents: list[list[str]], seed: int, inject: bool) -> InjectedArchive:
    rng = np.random.default_rng(seed)
    if not inject:
        return build_archive(documents, SLICES, rng, changed_from_slice=SLICES - 1)
    counts = word_counts(documents)
    pairs = choose_pairs(counts, 8, rng, *TARGET_COUNTS, donor_ratio=DONOR_RATIO)
    used = [w for pair in pairs for w in pair]
    frequency_only = choose_words(counts, 8, rng, *TARGET_COUNTS, exclude=used)
    shares = [SHARES[i % len(SHARES)] for i in range(len(pairs))]
    return build_archive(documents, SLICES, rng, pairs, shares, frequency_only, 0.5,
                         changed_from_slice=SLICES - 1)


def _truth(archive: InjectedArchive) -> dict:
    return {
        "pairs": archive.pairs, "shares": archive.shares,
        "frequency_only": archive.frequency_only, "labels": archive.year_labels(),
    }


def build(args: argparse.Namespace) -> None:
    from drift.embed.training import train_run
    from drift.ingest.slicing import slice_archive

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    train = dict(workers=args.workers, quiet=True, control_splits=args.control_splits)
    if args.dim is not None:
        train["dim"] = args.dim
    started = time.perf_counter()
    if not args.skip_real:
        source = out / "real.csv"
        if not source.exists():
            write_dated_csv(source)
        for seed in REAL_TRAIN_SEEDS:
            run = out / f"real-seed{seed}"
            if not (run / "slices").exists():
                slice_archive(source, run, by=REAL_EDGES, quiet=True)
            t = time.perf_counter()
            train_run(run, base_seed=seed, **train)
            print(f"real archive, train seed {seed}: {time.perf_counter() - t:.0f} s", flush=True)
    documents = injection_text()
    print(f"injection text: {len(documents):,} documents, "
          f"{sum(map(len, documents)):,} tokens", flush=True)
    for repeat in range(args.first_repeat, args.first_repeat + args.repeats):
        for inject in (True, False):
            name = f"{'injected' if inject else 'shuffled'}-{repeat}"
            folder = out / name
            folder.mkdir(exist_ok=True)
            archive = plan(documents, repeat, inject)
            (folder / "truth.json").write_text(json.dumps(_truth(archive)))
            source = folder / "archive.csv"
            if not source.exists():
                write_protocol_csv(archive, source, np.random.default_rng(repeat))
            run = folder / "run"
            if not (run / "slices").exists():
                slice_archive(source, run, by="year", quiet=True)
            t = time.perf_counter()
            train_run(run, **train)
            print(f"{name}: trained in {time.perf_counter() - t:.0f} s", flush=True)
    print(f"build: {time.perf_counter() - started:.0f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = parser.add_subparsers(dest="step", required=True)
    b = sub.add_parser("build")
    b.add_argument("--out", type=Path, required=True)
    b.add_argument("--repeats", type=int, default=4)
    b.add_argument("--first-repeat", type=int, default=0)
    b.add_argument("--workers", type=int, default=os.cpu_count() or 2)
    b.add_argument("--skip-real", action="store_true")
    b.add_argument("--control-splits", type=int, default=1,
                   help="control pairs per run (drift train --control-splits)")
    b.add_argument("--dim", type=int, default=None,
                   help="vector size of every model (drift train --dim; default: drift's)")
    e = sub.add_parser("evaluate")
    e.add_argument("--out", type=Path, required=True)
    e.add_argument("--trim", type=float, default=0.1,
                   help="another anchor trim to score the default at, beside drift's default "
                   "(0: none)")
    e.add_argument("--baseline", type=Path, default=None,
                   help="a checkout of the code before these changes, with its own .venv "
                   "(pip install -e .), to score it too")
    args = parser.parse_args()
    if args.step == "build":
        build(args)
    else:
        evaluate(args)


#: Words of the real archive whose sense in these change logs moved between 1990-2012 and
#: 2020-2026, chosen from memory of how free-software projects changed their tooling (none of
#: these descriptions was checked against the text; the list was fixed before any ranking of
#: the archive was looked at, among the words common enough in both periods to be measured):
DOCUMENTED = {
    "pipeline": "a shell or rendering pipeline -> a continuous-integration pipeline (GitLab CI)",
    "merge": "merging code or upstream releases -> a merge request on a forge (GitLab, ~2018)",
    "request": "a feature or bug request -> a merge or pull request",
    "pull": "pulling from a repository -> a pull request (GitHub, from ~2008)",
    "unit": "a unit test or unit of measure -> a systemd unit (from ~2012)",
    "timer": "a timer in code -> a systemd timer replacing a cron job",
    "sanitize": "cleaning input -> compiler sanitizers (AddressSanitizer, from ~2012)",
    "secure": "secure in general -> Secure Boot (UEFI, from ~2012)",
    "app": "an abbreviation of application -> an app (app stores, AppStream, Flatpak)",
    "token": "a lexer or parser token -> an access or authentication token",
}

#: Candidate calibrations: name -> (measure, drift.compare.ranking.CalibrationOptions fields).
CANDIDATES = {
    "count only, pareto tail": (
        "displacement", dict(use_seed_noise=False, log_scale=False, tail="pareto", paired=False)),
    "count+noise, log scale, normal tail": ("displacement", dict(paired=False)),
    "local, unpaired": ("local", dict(paired=False)),
    "evidence, unpaired": ("evidence", dict(paired=False)),
    "evidence, unpaired, drift null with own control": (
        "evidence", dict(paired=False, own_control=True)),
    "displacement, paired": ("displacement", dict()),
    "local, paired": ("local", dict()),
    "evidence, paired (default)": ("evidence", dict()),
    "evidence, paired, drift null with own control": ("evidence", dict(paired_drift=True)),
    "evidence, paired, drift null with own control, without the context change (default before)": (
        "evidence", dict(paired_drift=True, context=False)),
    "evidence, paired, without the context change": ("evidence", dict(context=False)),
    "evidence, paired, GLS weights (default before)": ("evidence", dict(evidence_weights="gls")),
    "evidence, paired, equal weights (Stouffer)": ("evidence", dict(evidence_weights="equal")),
    "evidence, paired, words the control lacks not a class of their own": (
        "evidence", dict(separate_unpaired=False)),
    "evidence, paired, drift z not count-matched": ("evidence", dict(count_matched=False)),
    "evidence, paired, drift z count-matched on the rarer count": (
        "evidence", dict(matched_on="rarer")),
    # on a run trained with --control-splits N: its first one or two control splits only
    "evidence, paired, first control split only": ("evidence", dict(control_splits=1)),
    "evidence, paired, first two control splits": ("evidence", dict(control_splits=2)),
}
DEFAULT_CANDIDATE = "evidence, paired (default)"
#: Raised whenever what ``measure_run`` computes changes, so that cached measurements of an
#: older drift are not scored as if they were current (3: the context change's null deals
#: each word's own occurrences in the slices' proportion).
MEASUREMENTS_VERSION = 3

BASELINE_CODE = """
import sys
from drift.compare.ranking import read_run_inputs, compute_scores
from drift.compare.alignment import parse_anchors
inputs = read_run_inputs(sys.argv[1])
pair = (inputs.labels[0], inputs.labels[-1])
scores, *_ = compute_scores(inputs, pair, inputs.labels[0], "displacement", 50, 0.05,
                            parse_anchors(None), True)
scores.to_parquet(sys.argv[2])
"""


def baseline_scores(run: Path, baseline: Path) -> pd.DataFrame:
    """The scores of the code before this benchmark's changes (a checkout at ``baseline``)."""
    import subprocess

    out = run.parent / f"baseline-scores-{run.name}.parquet"
    if not out.exists():
        python = baseline / ".venv" / "bin" / "python"
        subprocess.run([str(python), "-c", BASELINE_CODE, str(run), str(out)], check=True,
                       cwd=baseline)
    return pd.read_parquet(out)


def _slug(name: str) -> str:
    return "".join(c if c.isalnum() else "-" for c in name)


def candidate_scores(run: Path, trims: list[float]) -> dict[str, pd.DataFrame]:
    """Scores of every candidate calibration (and anchor trim) on one trained run; kept beside
    the run (``scores-<candidate>.parquet``) so that a second evaluation reads them."""
    from drift.compare.alignment import parse_anchors
    from drift.compare.ranking import (
        CalibrationOptions,
        assemble_scores,
        measure_run,
        read_run_inputs,
    )

    cache = run.parent / f"candidates-{run.name}"
    trained = json.loads((run / "run.json").read_text())["stages"]["train"]["outputs"]
    stamp = cache / "trained-models.txt"  # the models the cache was made from
    if cache.exists() and (not stamp.exists() or stamp.read_text() != trained):
        import shutil

        shutil.rmtree(cache)  # the run was trained again since
    cache.mkdir(exist_ok=True)
    stamp.write_text(trained)
    inputs = read_run_inputs(run)
    pair = (inputs.labels[0], inputs.labels[-1])
    out = {}
    for trim in trims:
        usual = trim == DEFAULT_ANCHOR_TRIM
        wanted = [c for c in CANDIDATES if usual or c == DEFAULT_CANDIDATE]
        names = {c: c + ("" if usual else f", anchor trim {trim}") for c in wanted}
        files = {name: cache / f"scores-{_slug(full)}-trim{trim}.parquet"
                 for name, full in names.items()}
        if all(f.exists() for f in files.values()):
            out.update({names[n]: pd.read_parquet(f) for n, f in files.items()})
            continue
        # a cache of this benchmark's own making, named by the version of the measurements
        kept = cache / f"measured-{MEASUREMENTS_VERSION}-trim{trim}.pickle"
        if kept.exists():
            with kept.open("rb") as handle:
                measured = pickle.load(handle)
        else:
            measured = measure_run(inputs, pair, inputs.labels[0], 50, parse_anchors(None), trim,
                                   quiet=True)
            with kept.open("wb") as handle:
                pickle.dump(measured, handle)
        for name in wanted:
            measure, fields = CANDIDATES[name]
            fields = dict(fields)
            used = _first_splits(measured, fields.pop("control_splits", None))
            options = CalibrationOptions(**fields)
            scores, *_ = assemble_scores(inputs, used, measure, 0.05, options)
            scores.to_parquet(files[name])
            out[names[name]] = scores
    return out


def _first_splits(measured, splits: int | None):
    """``measured`` with only its first ``splits`` control splits (None: all of them)."""
    if splits is None:
        return measured
    import dataclasses

    return dataclasses.replace(measured, results=[
        dataclasses.replace(r, more_controls=list(r.more_controls[: splits - 1]))
        for r in measured.results
    ])


def _significant(scores: pd.DataFrame, column: str = "significant") -> pd.Series:
    if column == "significant":
        return scores["significant"].fillna(False).astype(bool)
    return scores[column] <= 0.05


def _frequency_rho(scores: pd.DataFrame) -> float:
    from scipy import stats

    frequency = np.log(scores["count_from"] + scores["count_to"])
    ok = scores["z"].notna()
    return float(stats.spearmanr(scores.loc[ok, "z"], frequency[ok]).statistic)


def injected_row(scores: pd.DataFrame, truth: dict) -> dict:
    from drift.validate.injection import evaluate as eval_protocol

    targets = [t for t, _ in truth["pairs"]]
    donors = [d for _, d in truth["pairs"]]
    strong = [t for (t, _), s in zip(truth["pairs"], truth["shares"], strict=True) if s >= 0.5]
    result = eval_protocol(scores.assign(significant=_significant(scores)), targets,
                           truth["frequency_only"], donors)
    significant = set(scores.loc[_significant(scores), "word"])
    ranks = dict(zip(scores["word"], scores["rank"], strict=True))
    return {
        "AP": result["average_precision"],
        "recall@10": result["recall_at_10"],
        "injected sig": np.mean([t in significant for t in strong]),
        "freq-only sig": result["frequency_only_significant"],
        "donor sig": result["donors_significant"],
        "untouched sig": result["false_positive_rate"],
        "target ranks": " ".join(str(ranks.get(t, "-")) for t in targets),
    }


def shuffled_row(scores: pd.DataFrame) -> dict:
    return {
        "shuffled sig": _significant(scores).mean(),
        "shuffled noise-null sig": _significant(scores, "noise_q").mean()
        if "noise_q" in scores else np.nan,
        "shuffled rho(z,freq)": _frequency_rho(scores),
    }


def _stability(first: pd.DataFrame, second: pd.DataFrame, runs: int = 200) -> dict:
    """How far the two training runs' z differ, and the top-50 overlap that noise of that size
    around the runs' mean z gives (simulated), at the measured noise and at half of it."""
    from scipy import stats

    both = first.merge(second, on="word", suffixes=("_a", "_b")).dropna(subset=["z_a", "z_b"])
    gap = both["z_a"] - both["z_b"]
    per_run = float(gap.std() / np.sqrt(2))
    mean = ((both["z_a"] + both["z_b"]) / 2).to_numpy()
    rng = np.random.default_rng(0)

    def overlap(noise: float) -> float:
        shared = []
        for _ in range(runs):
            a = mean + rng.normal(0, noise, len(mean))
            b = mean + rng.normal(0, noise, len(mean))
            shared.append(len(set(np.argsort(-a)[:50]) & set(np.argsort(-b)[:50])))
        return float(np.mean(shared))

    return {
        "z sd between runs": float(gap.std()),
        "Spearman of z between runs": float(stats.spearmanr(both["z_a"], both["z_b"]).statistic),
        "top-50 shared, simulated at that noise": overlap(per_run),
        "top-50 shared, simulated at half": overlap(per_run / 2),
    }


def real_row(first: pd.DataFrame, second: pd.DataFrame) -> dict:
    n = len(first)
    ranks = dict(zip(first["word"], first["rank"], strict=True))
    documented = [w for w in DOCUMENTED if w in ranks]
    top_a = set(first.sort_values("rank")["word"].head(50))
    top_b = set(second.sort_values("rank")["word"].head(50))
    return {
        "real words": n,
        "real headline sig": _significant(first).mean(),
        "real noise-null sig": _significant(first, "noise_q").mean()
        if "noise_q" in first else np.nan,
        "real drift-null sig": _significant(first, "drift_q").mean()
        if "drift_q" in first else np.nan,
        "documented median rank %": 100 * np.median([ranks[w] for w in documented]) / n,
        "documented found": f"{len(documented)}/{len(DOCUMENTED)}",
        "top-50 shared across seeds": len(top_a & top_b),
        "real rho(z,freq)": _frequency_rho(first),
        "real rho(z,freq), second seed": _frequency_rho(second),
        **_stability(first, second),
    }


def _trained(run: Path) -> bool:
    manifest = run / "run.json"
    return manifest.exists() and "train" in json.loads(manifest.read_text()).get("stages", {})


def evaluate(args: argparse.Namespace) -> None:
    out = Path(args.out)
    started = time.perf_counter()
    trims = list(dict.fromkeys([DEFAULT_ANCHOR_TRIM, args.trim]))
    per_candidate: dict[str, list[dict]] = {}
    folders = [
        f for f in sorted(out.glob("injected-*"))
        if _trained(f / "run") and _trained(out / f"shuffled-{f.name.split('-')[1]}" / "run")
    ]
    for folder in folders:
        truth = json.loads((folder / "truth.json").read_text())
        repeat = folder.name.split("-")[1]
        shuffled = out / f"shuffled-{repeat}"
        scored = candidate_scores(folder / "run", trims)
        scored_null = candidate_scores(shuffled / "run", trims)
        if args.baseline:
            scored["before (frequency null, pareto tail)"] = baseline_scores(
                folder / "run", args.baseline)
            scored_null["before (frequency null, pareto tail)"] = baseline_scores(
                shuffled / "run", args.baseline)
        for name, scores in scored.items():
            row = {"repeat": int(repeat), **injected_row(scores, truth),
                   **shuffled_row(scored_null[name])}
            per_candidate.setdefault(name, []).append(row)
            print(f"{folder.name} {name}: {row}", flush=True)
    real = [out / f"real-seed{seed}" for seed in REAL_TRAIN_SEEDS]
    real_rows: dict[str, dict] = {}
    if all((r / "run.json").exists() for r in real):
        first = candidate_scores(real[0], trims)
        second = candidate_scores(real[1], trims)
        if args.baseline:
            first["before (frequency null, pareto tail)"] = baseline_scores(real[0],
                                                                            args.baseline)
            second["before (frequency null, pareto tail)"] = baseline_scores(real[1],
                                                                             args.baseline)
        for name in first:
            real_rows[name] = real_row(first[name], second[name])
            print(f"real {name}: {real_rows[name]}", flush=True)
            if name == DEFAULT_CANDIDATE:
                top = first[name].sort_values("rank").head(25)
                print("  top 25:", " ".join(top["word"]))
                ranks = dict(zip(first[name]["word"], first[name]["rank"], strict=True))
                print("  documented:", {w: ranks.get(w) for w in DOCUMENTED})
    rows = []
    for name in real_rows:
        per_candidate.setdefault(name, [])
    for name, found in per_candidate.items():
        row = {"candidate": name}
        if found:
            frame = pd.DataFrame(found).drop(columns=["target ranks", "repeat"])
            mean, spread = frame.mean(), frame.std()
            for column in frame.columns:
                row[column] = f"{mean[column]:.3f} ± {spread[column]:.3f}"
        row.update({k: (f"{v:.3f}" if isinstance(v, float) else v)
                    for k, v in real_rows.get(name, {}).items()})
        rows.append(row)
    table = pd.DataFrame(rows).set_index("candidate").T
    pd.set_option("display.width", 250)
    pd.set_option("display.max_colwidth", 40)
    print()
    print(table.to_string())
    machine = platform.processor() or platform.machine()
    print(f"\n{len(folders)} protocol seed(s), mean ± sd; {machine}, {os.cpu_count()} cores; "
          f"{time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
