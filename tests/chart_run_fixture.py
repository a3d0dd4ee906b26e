"""A small run folder written directly per the run-folder contract (DEVELOPERS.md), for chart tests.

Real text: gensim's bundled Lee background corpus (gensim/test/test_data/lee_background.cor, 300
news documents) cut into three consecutive slices. Tiny gensim Word2Vec models per slice and
seed. The rank-stage files (scores, timeline, terms) hold values computed plainly here (Procrustes
from SciPy, Jaccard turnover, a per-frequency-bin null); they are plausible inputs for the charts,
not a reimplementation of the ranking stage under test. Every table is written through
drift.runfolder's writers, which check its columns against the contract; a column the fixture
does not compute (local change, the drift null, seed noise) is left missing.

Hostile tokens (markup, a path) are added to every slice so the pages can be tested with words
that are data from strangers.
"""

from __future__ import annotations

import atexit
import random
import re
import shutil
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from gensim.models import Word2Vec
from gensim.test.utils import datapath
from scipy import stats
from scipy.linalg import orthogonal_procrustes

from drift import runfolder
from drift.compare.neighbours import write_neighbours_table
from drift.embed.training import save_keyed_vectors

LABELS = ("2001", "2002", "2003")
SEEDS = 2
K = 10

#: Tokens that must show as text and never run or become a path.
HOSTILE_WORDS = (
    "<script>alert(1)</script>",
    "<script>document.body.dataset.pwned=1</script>",
    '"><img/src=x/onerror=document.body.dataset.pwned=2>',
    "../../etc/passwd",
    "<b>bold</b>&amp;",
)

_TOKEN_RE = re.compile(r"\w+")


def _slice_lines() -> dict[str, list[str]]:
    """The Lee corpus documents, lower-cased word tokens, in three consecutive slices."""
    with open(datapath("lee_background.cor"), encoding="utf-8") as handle:
        docs = [" ".join(_TOKEN_RE.findall(line.lower())) for line in handle if line.strip()]
    per = len(docs) // len(LABELS)
    slices = {label: docs[i * per : (i + 1) * per] for i, label in enumerate(LABELS)}
    # The hostile tokens get ordinary contexts so that every model learns them; in the last
    # slice the contexts change, so they shift and reach the top of the ranking.
    for label, lines in slices.items():
        extra = []
        for i in range(12):
            for word in HOSTILE_WORDS:
                if label == LABELS[-1]:
                    extra.append(f"{word} cricket team won the match at the ground in over {i}")
                else:
                    extra.append(f"the {word} was reported by police in sydney on day {i}")
        slices[label] = lines + extra
    return slices


def _unit_centred(matrix: np.ndarray) -> np.ndarray:
    matrix = matrix / np.linalg.norm(matrix, axis=1, keepdims=True)
    matrix = matrix - matrix.mean(axis=0)
    return matrix / np.linalg.norm(matrix, axis=1, keepdims=True)


def _top_k(kv, word: str, k: int = K) -> set[str]:
    return {w for w, _ in kv.most_similar(word, topn=k)}


def _train(corpus: Path, target: Path, seed: int):
    """A tiny skip-gram model of one text file, saved as KeyedVectors at ``target``."""
    model = Word2Vec(
        corpus_file=str(corpus), vector_size=16, window=5, min_count=5, sg=1, negative=5,
        epochs=3, workers=1, seed=1 + seed,
    )
    target.parent.mkdir(parents=True, exist_ok=True)
    save_keyed_vectors(model.wv, target)
    return model.wv


def _displacement(kvs_from: list, kvs_to: list, words: list[str]) -> np.ndarray:
    """Cosine distance per word and seed after orthogonal Procrustes (SciPy) of "to" onto "from"."""
    per_seed = []
    for kv_from, kv_to in zip(kvs_from, kvs_to, strict=True):
        ref = _unit_centred(kv_from[words])
        other = _unit_centred(kv_to[words])
        rotation, _ = orthogonal_procrustes(other, ref)
        aligned = other @ rotation
        cosine = np.sum(aligned * ref, axis=1) / (
            np.linalg.norm(aligned, axis=1) * np.linalg.norm(ref, axis=1)
        )
        per_seed.append(1.0 - cosine)
    return np.stack(per_seed, axis=1)


class _BinnedNull:
    """Control displacements in four bins of log count (of the rarer side): median, sd, 95th."""

    def __init__(self, values: np.ndarray, counts: np.ndarray):
        self.values, self.counts = values, counts
        edges = np.quantile(np.log(counts), [0.25, 0.5, 0.75])
        self.edges = edges
        which = np.digitize(np.log(counts), edges)
        self.stats = [
            (np.median(values[which == b]), values[which == b].std(ddof=1),
             np.quantile(values[which == b], 0.95))
            for b in range(4)
        ]

    def _column(self, counts: np.ndarray, i: int) -> np.ndarray:
        which = np.digitize(np.log(np.maximum(counts, 1)), self.edges)
        return np.array([self.stats[b][i] for b in which])

    def p95(self, counts: np.ndarray) -> np.ndarray:
        return self._column(counts, 2)

    def score(self, values: np.ndarray, counts: np.ndarray):
        centre, spread = self._column(counts, 0), self._column(counts, 1)
        z = (values - centre) / spread
        p = stats.norm.sf(z)
        return centre, spread, z, p, stats.false_discovery_control(p)


def build_fixture_run(root: Path) -> Path:
    """Write slices, models and rank files for a three-slice run under ``root``; return it."""
    paths = runfolder.prepare_run_folder(root)
    slices = _slice_lines()

    # --- slice stage: slices/*.txt, summary.csv, counts.parquet
    summary_rows, counters = [], {}
    for i, (label, lines) in enumerate(slices.items()):
        paths.slices_dir.mkdir(parents=True, exist_ok=True)
        paths.slice_file(label).write_text("\n".join(lines) + "\n", encoding="utf-8")
        tokens = [t for line in lines for t in line.split(" ")]
        counts = pd.Series(tokens).value_counts()
        counters[label] = counts
        year = 2001 + i
        summary_rows.append(
            {
                "label": label,
                "start": f"{year}-01-01",
                "end": f"{year}-12-31",
                "documents": len(lines),
                "tokens": len(tokens),
                "types": len(counts),
                "dropped": 0,
            }
        )
    runfolder.write_table(root, "summary", pd.DataFrame(summary_rows))
    counts = pd.DataFrame(counters).fillna(0).astype("int64")
    counts = counts.loc[counts.sum(axis=1).sort_values(ascending=False, kind="stable").index]
    counts.index.name = "word"
    runfolder.write_table(root, "counts", counts.reset_index())
    runfolder.record_stage(root, "slice", {"by": "year"}, "fixture", 0.0, {"labels": list(LABELS)})

    # --- train stage: tiny models per slice and seed, and the time-shuffled control pair
    reference, last = LABELS[0], LABELS[-1]
    models = {
        label: [_train(paths.slice_file(label), paths.model_file(label, seed), seed)
                for seed in range(SEEDS)]
        for label in LABELS
    }
    pooled = slices[reference] + slices[last]
    random.Random(0).shuffle(pooled)
    halves = {"control-a": pooled[: len(slices[reference])],
              "control-b": pooled[len(slices[reference]) :]}
    control = {}
    for name, lines in halves.items():
        text = paths.control_slice_file(name)
        text.parent.mkdir(parents=True, exist_ok=True)
        text.write_text("\n".join(lines) + "\n", encoding="utf-8")
        control[name] = [_train(text, paths.control_model_file(name, seed), seed)
                         for seed in range(SEEDS)]
    # recorded the way drift.embed.training records it (params.seeds, labels, control)
    runfolder.record_stage(
        root,
        "train",
        {"dim": 16, "window": 5, "epochs": 3, "seeds": SEEDS, "control": True,
         "between": [reference, last]},
        "fixture",
        0.0,
        {
            "labels": list(LABELS),
            "control": {
                "between": [reference, last],
                "shuffle_seed": 0,
                "labels": list(halves),
                "lines": {name: len(lines) for name, lines in halves.items()},
                "tokens": {
                    name: sum(len(line.split()) for line in lines)
                    for name, lines in halves.items()
                },
            },
        },
    )

    # --- rank stage: timeline, scores, terms
    shared = sorted(set.intersection(*(set(models[lb][0].index_to_key) for lb in LABELS)))
    totals = {label: int(counters[label].sum()) for label in LABELS}
    control_words = sorted(
        set(control["control-a"][0].index_to_key) & set(control["control-b"][0].index_to_key)
    )
    control_disp = _displacement(control["control-a"], control["control-b"], control_words)
    control_counts = [
        np.array([kv[0].get_vecattr(w, "count") for w in control_words])
        for kv in control.values()
    ]
    null = _BinnedNull(control_disp.mean(axis=1), np.minimum(*control_counts))
    distances = {
        label: _displacement(models[reference], models[label], shared) for label in LABELS
    }
    ref_counts = np.array([counters[reference].get(w, 0) for w in shared])
    ref_sets = {w: _top_k(models[reference][0], w) for w in shared}
    rows = []
    for label in LABELS:
        counts_here = np.array([counters[label].get(w, 0) for w in shared])
        fpm = counts_here * 1e6 / totals[label]
        dist = distances[label].mean(axis=1)
        p95 = null.p95(np.minimum(ref_counts, counts_here))
        for i, word in enumerate(shared):
            other_set = _top_k(models[label][0], word)
            turnover = 1 - len(ref_sets[word] & other_set) / len(ref_sets[word] | other_set)
            rows.append(
                {
                    "word": word,
                    "slice": label,
                    "distance": float(dist[i]),
                    "distance_sd": float(distances[label][i].std(ddof=1)),
                    "turnover": float(turnover),
                    "count": int(counts_here[i]),
                    "fpm": float(fpm[i]),
                    "null_p95": float(p95[i]),
                }
            )
    timeline = pd.DataFrame(rows).reindex(columns=runfolder.TIMELINE_COLUMNS)  # typical: NaN
    runfolder.write_table(root, "timeline", timeline)

    final = timeline[timeline.slice == last].set_index("word").loc[shared]
    count_from = ref_counts
    count_to = final["count"].to_numpy()
    fpm_from = count_from * 1e6 / totals[reference]
    fpm_to = final["fpm"].to_numpy()
    disp = final["distance"].to_numpy()
    centre, spread, z, p, q = null.score(disp, np.minimum(count_from, count_to))
    control_q = null.score(null.values, null.counts)[4]
    control_flagged = int((control_q <= 0.05).sum())
    change_rows = timeline.pivot(index="word", columns="slice", values="distance").loc[shared]
    change_point, change_step = [], []
    for word in shared:
        values = change_rows.loc[word, list(LABELS)].to_numpy()
        steps = [values[i:].mean() - values[:i].mean() for i in range(1, len(values))]
        best = int(np.argmax(np.abs(steps)))
        change_point.append(LABELS[best + 1])
        change_step.append(float(steps[best]))
    gained, lost = [], []
    for word in shared:
        new = [w for w, _ in models[last][0].most_similar(word, topn=K)]
        old = [w for w, _ in models[reference][0].most_similar(word, topn=K)]
        gained.append(" ".join(w for w in new if w not in old))
        lost.append(" ".join(w for w in old if w not in new))
    scores = pd.DataFrame(
        {
            "word": shared,
            "score": disp,  # the ranking measure, displacement, as the rank stage stores it
            "displacement": disp,
            "displacement_sd": final["distance_sd"].to_numpy(),
            "turnover": final["turnover"].to_numpy(),
            "count_from": count_from.astype("int64"),
            "count_to": count_to.astype("int64"),
            "fpm_from": fpm_from,
            "fpm_to": fpm_to,
            "log_freq_ratio": np.log2(fpm_to / fpm_from),
            "null_centre": centre,
            "null_spread": spread,
            "noise_z": z,
            "noise_p": p,
            "noise_q": q,
            "z": z,
            "p": p,
            "q": q,
            "significant": q < 0.05,
            "change_point": change_point,
            "change_step": change_step,
            "gained": gained,
            "lost": lost,
        }
    )
    scores = scores.sort_values("z", ascending=False, kind="stable").reset_index(drop=True)
    scores.insert(1, "rank", np.arange(1, len(scores) + 1))
    # Columns this fixture does not compute (local change, the drift null, seed noise) are left
    # missing, as a stage leaves a value it could not compute.
    scores = scores.reindex(columns=runfolder.SCORE_COLUMNS)
    scores["significance_note"] = ""
    runfolder.write_table(root, "scores", scores)

    fpm_table = counts.div(pd.Series(totals)) * 1e6
    emerging = counts.index[(counts[reference] == 0) & (counts[last] >= 3)]
    fading = counts.index[(counts[reference] >= 3) & (counts[last] == 0)]
    term_rows = []
    for kind, words in (("emerging", emerging), ("fading", fading)):
        for word in words[:8]:
            row = {
                "word": word,
                "kind": kind,
                "count_from": int(counts.at[word, reference]),
                "count_to": int(counts.at[word, last]),
                "fpm_from": float(fpm_table.at[word, reference]),
                "fpm_to": float(fpm_table.at[word, last]),
            }
            row.update({f"fpm:{label}": float(fpm_table.at[word, label]) for label in LABELS})
            term_rows.append(row)
    # Hostile tokens also appear as a term so the report's tables meet them.
    hostile = HOSTILE_WORDS[0]
    term_rows.append(
        {
            "word": hostile,
            "kind": "emerging",
            "count_from": int(counts.at[hostile, reference]),
            "count_to": int(counts.at[hostile, last]),
            "fpm_from": float(fpm_table.at[hostile, reference]),
            "fpm_to": float(fpm_table.at[hostile, last]),
            **{f"fpm:{label}": float(fpm_table.at[hostile, label]) for label in LABELS},
        }
    )
    terms = pd.DataFrame(term_rows)
    terms.insert(6, "ratio", terms["fpm_to"] / terms["fpm_from"].where(terms["fpm_from"] > 0))
    terms.insert(7, "measured", terms["word"].isin(set(shared)))
    runfolder.write_table(root, "terms", terms)
    # The neighbours table through the rank stage's own writer (drift.compare.neighbours).
    write_neighbours_table(root, list(scores["word"]))
    runfolder.record_stage(
        root,
        "rank",
        {
            "between": [reference, last],
            "reference": reference,
            "measure": "displacement",
            "k": K,
            "alpha": 0.05,
            "anchors": None,
        },
        "fixture",
        0.0,
        {"control_flagged": control_flagged},
    )
    return Path(root)


_BUILT: dict[str, Path] = {}


def fixture_run_copy(dest: Path) -> Path:
    """A copy of the fixture run at ``dest``; the run is built once per test session."""
    if "run" not in _BUILT:
        scratch = Path(tempfile.mkdtemp(prefix="drift-chart-fixture-"))
        atexit.register(shutil.rmtree, scratch, ignore_errors=True)
        _BUILT["run"] = build_fixture_run(scratch / "run")
    shutil.copytree(_BUILT["run"], dest)
    return Path(dest)
