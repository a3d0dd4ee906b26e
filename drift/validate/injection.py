"""Synthetic change injection: validate drift on a corpus where the true changes are known.

The protocol (after Shoemark et al. 2019, EMNLP; sense injection as in Dubossarsky et al. 2019,
ACL; both recalled from memory):

1. Give every document of a real corpus a random time slice, so that the slices differ by
   chance only (:func:`assign_random_slices`).
2. In the later slices, replace a share of a *donor* word's occurrences with a *target* word
   (:func:`inject_changes`): the target gains the donor's contexts, a new sense, and should rank
   at the top. Several target and donor pairs at several shares show how strong a change must be
   to be found.
3. Delete a share of some other words' occurrences in the later slices (:func:`delete_share`):
   their frequency changes, their meaning does not, so they must not come out significant.
4. Write a dated CSV (:func:`write_dated_csv`) and run the ordinary pipeline on it
   (``drift slice`` -> ``drift train`` -> ``drift rank``), then score the ranking with
   :func:`evaluate`.

Run on text without any injection, step 1 alone checks calibration: with no real change, at most
about ``alpha`` of the words may come out significant.

:func:`reference_documents` reads real English text that ships with gensim (its test data): a
shortened English Wikipedia dump and the Lee background corpus.
"""

from __future__ import annotations

import bz2
import csv
import datetime as dt
import re
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift.errors import DriftError
from drift.runfolder import atomic_path

Document = list[str]

WIKI_DUMP = "enwiki-latest-pages-articles1.xml-p000000010p000030302-shortened.bz2"
LEE_CORPUS = "lee_background.cor"
MIN_PARAGRAPH_TOKENS = 10
_PARAGRAPH_BREAK = re.compile(r"\n\s*\n")


# ---------------------------------------------------------------------------- real text


def _gensim_test_file(name: str) -> Path:
    from gensim.test.utils import datapath

    path = Path(datapath(name))
    if not path.exists():
        raise DriftError(
            f"gensim's bundled test file {name} is missing; reinstall gensim (pip install gensim)."
        )
    return path


def _tokens(text: str) -> Document:
    from gensim.utils import tokenize

    return list(tokenize(text, lowercase=True))


def wiki_documents(min_tokens: int = MIN_PARAGRAPH_TOKENS) -> list[Document]:
    """Paragraphs of the shortened English Wikipedia dump bundled with gensim, as token lists.

    Markup is removed with gensim's ``filter_wiki``; tokens are gensim's lower-cased alphabetic
    tokens; paragraphs shorter than ``min_tokens`` (headings, list debris) are left out.
    """
    from gensim.corpora.wikicorpus import extract_pages, filter_wiki

    documents: list[Document] = []
    with bz2.open(_gensim_test_file(WIKI_DUMP)) as dump:
        for _title, text, _page_id in extract_pages(dump):
            for paragraph in _PARAGRAPH_BREAK.split(filter_wiki(text)):
                tokens = _tokens(paragraph)
                if len(tokens) >= min_tokens:
                    documents.append(tokens)
    return documents


def lee_documents(min_tokens: int = MIN_PARAGRAPH_TOKENS) -> list[Document]:
    """The Lee background corpus bundled with gensim (news stories, one a line), as token lists."""
    lines = _gensim_test_file(LEE_CORPUS).read_text(encoding="utf-8", errors="replace").splitlines()
    return [tokens for tokens in map(_tokens, lines) if len(tokens) >= min_tokens]


def reference_documents() -> list[Document]:
    """Real English text shipped with gensim: Wikipedia paragraphs, then Lee news stories."""
    return wiki_documents() + lee_documents()


# ---------------------------------------------------------------------------- choosing words


def word_counts(documents: Iterable[Sequence[str]]) -> Counter[str]:
    counts: Counter[str] = Counter()
    for document in documents:
        counts.update(document)
    return counts


def choose_words(
    counts: Counter[str],
    n: int,
    rng: np.random.Generator,
    min_count: int,
    max_count: int,
    exclude: Iterable[str] = (),
    min_length: int = 3,
) -> list[str]:
    """``n`` distinct words drawn at random among those with ``min_count <= count <= max_count``.

    Words shorter than ``min_length`` letters are skipped (mostly markup debris and function words).
    """
    excluded = set(exclude)
    pool = sorted(
        word
        for word, count in counts.items()
        if min_count <= count <= max_count and len(word) >= min_length and word not in excluded
    )
    if len(pool) < n:
        raise DriftError(
            f"Only {len(pool)} words have between {min_count} and {max_count} occurrences, "
            f"{n} are needed; use a larger corpus or widen the count range."
        )
    return [pool[i] for i in rng.choice(len(pool), size=n, replace=False)]


def choose_pairs(
    counts: Counter[str],
    n: int,
    rng: np.random.Generator,
    min_count: int,
    max_count: int,
    exclude: Iterable[str] = (),
    donor_ratio: tuple[float, float] = (2.0, 4.0),
) -> list[tuple[str, str]]:
    """``n`` (target, donor) pairs: mid-frequency targets, donors ``donor_ratio`` times as common.

    A donor more frequent than its target makes the injected sense a large share of the target's
    later occurrences. Each donor is drawn at random among unused words (of at least 3 letters)
    whose count lies within ``donor_ratio`` of the target's; failing that, the unused word whose
    count is closest to the middle of that range.
    """
    excluded = set(exclude)
    targets = choose_words(counts, n, rng, min_count, max_count, excluded)
    excluded.update(targets)
    pool = sorted(w for w in counts if len(w) >= 3 and w not in excluded)
    low, high = donor_ratio
    pairs = []
    for target in targets:
        if not pool:
            raise DriftError("Too few words left to give every target a donor; use more text.")
        wanted = counts[target] * np.array([low, high])
        fitting = [i for i, w in enumerate(pool) if wanted[0] <= counts[w] <= wanted[1]]
        if fitting:
            best = fitting[int(rng.integers(len(fitting)))]
        else:
            middle = wanted.mean()
            best = min(range(len(pool)), key=lambda i: abs(counts[pool[i]] - middle))
        pairs.append((target, pool.pop(best)))
    return pairs


# ---------------------------------------------------------------------------- the manipulations


def assign_random_slices(n_documents: int, n_slices: int, rng: np.random.Generator) -> np.ndarray:
    """A slice index (0 .. n_slices-1) per document, at random and in near-equal numbers."""
    if n_slices < 2:
        raise DriftError(f"The protocol needs at least 2 slices (got {n_slices}).")
    if n_documents < n_slices:
        raise DriftError(f"{n_documents} documents cannot fill {n_slices} slices; use more text.")
    return rng.permutation(np.arange(n_documents) % n_slices)


def _positions(lines: Sequence[Sequence[str]], word: str) -> list[tuple[int, int]]:
    return [(i, j) for i, line in enumerate(lines) for j, token in enumerate(line) if token == word]


def _chosen(positions: list[tuple[int, int]], share: float, rng: np.random.Generator):
    if not 0.0 <= share <= 1.0:
        raise DriftError(f"A share must lie between 0 and 1 (got {share}).")
    k = int(round(share * len(positions)))
    picked = rng.choice(len(positions), size=k, replace=False) if k else []
    return [positions[i] for i in sorted(picked)]


def inject_changes(
    lines: Sequence[Sequence[str]],
    targets_donors: Sequence[tuple[str, str]],
    shares: float | Sequence[float],
    rng: np.random.Generator,
) -> list[Document]:
    """Replace ``share`` of each donor's occurrences in ``lines`` by its target (a new sense).

    ``shares`` is one share for every pair or one per pair. Exactly ``round(share * n)`` of the
    donor's ``n`` occurrences, chosen at random, are replaced. Returns new lists; the input is
    left as it was.
    """
    if isinstance(shares, (int, float)):
        shares = [float(shares)] * len(targets_donors)
    if len(shares) != len(targets_donors):
        raise DriftError(
            f"{len(targets_donors)} target and donor pairs but {len(shares)} shares; "
            "give one share, or one per pair."
        )
    words = [w for pair in targets_donors for w in pair]
    if len(set(words)) != len(words):
        raise DriftError("Every target and donor must be a different word.")
    out = [list(line) for line in lines]
    for (target, donor), share in zip(targets_donors, shares, strict=True):
        for i, j in _chosen(_positions(out, donor), share, rng):
            out[i][j] = target
    return out


def delete_share(
    lines: Sequence[Sequence[str]],
    words: Iterable[str],
    share: float,
    rng: np.random.Generator,
) -> list[Document]:
    """Delete ``share`` of each word's occurrences from ``lines`` (a frequency change only)."""
    out = [list(line) for line in lines]
    doomed: set[tuple[int, int]] = set()
    for word in words:
        doomed.update(_chosen(_positions(out, word), share, rng))
    return [[t for j, t in enumerate(line) if (i, j) not in doomed] for i, line in enumerate(out)]


# ---------------------------------------------------------------------------- the dated archive


@dataclass
class InjectedArchive:
    """What was done to the text: the ground truth for :func:`evaluate`."""

    pairs: list[tuple[str, str]]
    shares: list[float]
    frequency_only: list[str]
    deletion_share: float
    slice_of_document: np.ndarray
    documents: list[Document] = field(repr=False)
    first_year: int = 2001

    @property
    def targets(self) -> list[str]:
        return [target for target, _ in self.pairs]

    @property
    def donors(self) -> list[str]:
        return [donor for _, donor in self.pairs]

    def targets_with_share_at_least(self, share: float) -> list[str]:
        return [t for (t, _), s in zip(self.pairs, self.shares, strict=True) if s >= share]

    def year_labels(self) -> list[str]:
        return [str(self.first_year + k) for k in range(int(self.slice_of_document.max()) + 1)]


def build_archive(
    documents: Sequence[Sequence[str]],
    n_slices: int,
    rng: np.random.Generator,
    pairs: Sequence[tuple[str, str]] = (),
    shares: float | Sequence[float] = 0.5,
    frequency_only: Sequence[str] = (),
    deletion_share: float = 0.5,
    changed_from_slice: int | None = None,
    first_year: int = 2001,
) -> InjectedArchive:
    """Slice ``documents`` at random and apply the injections to the later slices.

    Slices ``changed_from_slice`` .. ``n_slices - 1`` (by default the second half) are changed:
    donors replaced by targets at ``shares``, ``frequency_only`` words deleted at
    ``deletion_share``. With no pairs and no frequency-only words the text is only shuffled.
    """
    slice_of_document = assign_random_slices(len(documents), n_slices, rng)
    start = n_slices // 2 if changed_from_slice is None else changed_from_slice
    if not 1 <= start < n_slices:
        raise DriftError(f"changed_from_slice must lie between 1 and {n_slices - 1} (got {start}).")
    if isinstance(shares, (int, float)):
        shares = [float(shares)] * len(pairs)
    later = np.flatnonzero(slice_of_document >= start)
    changed = [list(documents[i]) for i in later]
    if pairs:
        changed = inject_changes(changed, pairs, shares, rng)
    if frequency_only:
        overlap = set(frequency_only) & {w for pair in pairs for w in pair}
        if overlap:
            raise DriftError(
                f"{sorted(overlap)} are both injected and frequency-only; pick other words."
            )
        changed = delete_share(changed, frequency_only, deletion_share, rng)
    out = [list(d) for d in documents]
    for i, document in zip(later, changed, strict=True):
        out[i] = document
    return InjectedArchive(
        pairs=list(pairs),
        shares=list(shares),
        frequency_only=list(frequency_only),
        deletion_share=deletion_share,
        slice_of_document=slice_of_document,
        documents=out,
        first_year=first_year,
    )


def write_dated_csv(archive: InjectedArchive, path: Path, rng: np.random.Generator) -> Path:
    """Write ``date,text`` rows: slice k becomes year ``first_year + k`` (a random day in it).

    ``drift slice PATH --by year`` then recovers exactly the random slices.
    """
    path = Path(path)
    with atomic_path(path) as tmp, tmp.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["date", "text"])
        for document, k in zip(archive.documents, archive.slice_of_document, strict=True):
            if not document:
                continue
            day = dt.date(archive.first_year + int(k), 1, 1) + dt.timedelta(
                days=int(rng.integers(0, 365))
            )
            writer.writerow([day.isoformat(), " ".join(document)])
    return path


# ---------------------------------------------------------------------------- scoring the ranking


def average_precision(ranked_words: Sequence[str], relevant: Iterable[str]) -> float:
    """Non-interpolated average precision: the mean, over the relevant words, of the precision
    at the rank where each is found (a relevant word never ranked contributes 0). The usual
    information-retrieval definition (Manning, Raghavan and Schuetze 2008, ch. 8; from memory).
    """
    relevant = set(relevant)
    if not relevant:
        raise DriftError("average precision needs at least one relevant word.")
    hits, total = 0, 0.0
    for position, word in enumerate(ranked_words, start=1):
        if word in relevant:
            hits += 1
            total += hits / position
    return total / len(relevant)


def recall_at(ranked_words: Sequence[str], relevant: Iterable[str], k: int = 10) -> float:
    """Share of the relevant words found among the first ``k`` ranked words."""
    relevant = set(relevant)
    if not relevant:
        raise DriftError("recall needs at least one relevant word.")
    return len(relevant.intersection(ranked_words[:k])) / len(relevant)


def ranked_words(scores: pd.DataFrame, by: str | None = None) -> list[str]:
    """Words best first: by column ``by`` (descending), else by ``rank``, else by ``score``."""
    columns = ", ".join(map(str, scores.columns))
    if "word" not in scores.columns:
        raise DriftError(f"The scores have no 'word' column (columns: {columns}).")
    if by is None and "rank" in scores.columns:
        return scores.sort_values("rank", kind="stable")["word"].tolist()
    by = by or "score"
    if by not in scores.columns:
        raise DriftError(f"The scores have no '{by}' column (columns: {columns}).")
    ordered = scores.sort_values(by, ascending=False, kind="stable", na_position="last")
    return ordered["word"].tolist()


def evaluate(
    scores: pd.DataFrame,
    injected: Iterable[str],
    frequency_only: Iterable[str] = (),
    donors: Iterable[str] = (),
    by: str | None = None,
    k: int = 10,
) -> dict[str, Any]:
    """How well a scores table finds the injected targets and leaves the rest alone.

    Returns ``average_precision`` and ``recall_at_10`` (recall at ``k``) of the injected targets
    in the ranking; ``false_positive_rate``, the share of untouched words (neither injected,
    frequency-only nor donors) that are significant; ``frequency_only_significant`` and
    ``donors_significant``, how many of those words are significant; and ``missing``, injected
    targets absent from the table (they count as never found).
    """
    injected, frequency_only, donors = set(injected), set(frequency_only), set(donors)
    words = ranked_words(scores, by)
    significant = (
        set(scores.loc[scores["significant"].fillna(False).astype(bool), "word"])
        if "significant" in scores.columns
        else set()
    )
    untouched = [w for w in words if w not in injected | frequency_only | donors]
    result: dict[str, Any] = {
        "average_precision": average_precision(words, injected) if injected else float("nan"),
        "recall_at_10": recall_at(words, injected, k) if injected else float("nan"),
        "false_positive_rate": (
            sum(w in significant for w in untouched) / len(untouched) if untouched else float("nan")
        ),
        "frequency_only_significant": len(frequency_only & significant),
        "donors_significant": len(donors & significant),
        "missing": sorted(injected - set(words)),
    }
    return result


# ---------------------------------------------------------------------------- the whole protocol


@dataclass(frozen=True)
class ProtocolSettings:
    """Which words are manipulated, and how much (counts are over the whole corpus).

    The defaults suit about half a million tokens (gensim's bundled text): targets of 100 to 300
    occurrences, donors 8 to 16 times as common, so that at share 0.5 most of a target's later
    occurrences carry the donor's contexts. With weaker doses (donors 2 to 4 times as common)
    the changes of a corpus this small drown in the noise of the control (see the benchmark).
    """

    pairs: int = 8
    shares: tuple[float, ...] = (0.25, 0.5, 0.75, 1.0)
    frequency_only: int = 8
    deletion_share: float = 0.5
    min_count: int = 100
    max_count: int = 300
    donor_ratio: tuple[float, float] = (8.0, 16.0)
    slices: int = 2
    seed: int = 0


def plan_archive(
    documents: Sequence[Sequence[str]], settings: ProtocolSettings, inject: bool = True
) -> InjectedArchive:
    """Choose the words and build the randomly sliced archive (no manipulation when not ``inject``).

    Pairs get the shares in turn (pair i gets ``shares[i % len(shares)]``).
    """
    rng = np.random.default_rng(settings.seed)
    if not inject:
        return build_archive(documents, settings.slices, rng)
    counts = word_counts(documents)
    pairs = choose_pairs(
        counts, settings.pairs, rng, settings.min_count, settings.max_count,
        donor_ratio=settings.donor_ratio,
    )
    used = [w for pair in pairs for w in pair]
    frequency_only = choose_words(
        counts, settings.frequency_only, rng, settings.min_count, settings.max_count, used
    )
    shares = [settings.shares[i % len(settings.shares)] for i in range(len(pairs))]
    return build_archive(
        documents, settings.slices, rng, pairs, shares, frequency_only, settings.deletion_share
    )


def run_protocol(
    archive: InjectedArchive,
    workdir: Path,
    *,
    measures: Sequence[str] = ("displacement", "turnover", "local", "combined"),
    ks: Sequence[int] | None = None,
    train_options: dict[str, Any] | None = None,
    seed: int = 0,
    quiet: bool = True,
) -> dict[tuple[str, int], pd.DataFrame]:
    """Write ``archive`` as a dated CSV in ``workdir`` and run slice -> train -> rank on it.

    Compares the first and the last slice. Returns the scores table for every measure and every
    number of neighbours ``k`` (displacement does not use k and is ranked once, with the first).
    ``train_options`` go to :func:`drift.embed.training.train_run`.
    """
    from drift.compare.ranking import DEFAULT_K, rank_run
    from drift.embed.training import train_run
    from drift.ingest.slicing import slice_archive

    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    source = write_dated_csv(archive, workdir / "archive.csv", np.random.default_rng(seed))
    run = workdir / "run"
    slice_archive(source, run, by="year", quiet=True)
    train_run(run, quiet=quiet, **(train_options or {}))
    labels = archive.year_labels()
    between = [labels[0], labels[-1]]
    results: dict[tuple[str, int], pd.DataFrame] = {}
    for k in ks or [DEFAULT_K]:
        for measure in measures:
            if measure == "displacement" and any(m == "displacement" for m, _ in results):
                continue
            results[(measure, k)] = rank_run(run, between=between, measure=measure, k=k, quiet=True)
    return results


def protocol_table(
    archive: InjectedArchive, scored: dict[tuple[str, int], pd.DataFrame], min_share: float = 0.5
) -> pd.DataFrame:
    """One row per measure, k and ordering (``score`` as drift ranks, ``z`` frequency-matched):
    average precision and recall at 10 of all targets and of those with share >= ``min_share``,
    false positive rate, and the frequency-only words and donors that came out significant."""
    rows = []
    strong = archive.targets_with_share_at_least(min_share)
    for (measure, k), scores in scored.items():
        for by in ("score", "z"):
            row: dict[str, Any] = {"measure": measure, "k": k, "ranked_by": by}
            if archive.pairs:
                every = evaluate(
                    scores, archive.targets, archive.frequency_only, archive.donors, by
                )
                row.update(
                    average_precision=every["average_precision"],
                    recall_at_10=every["recall_at_10"],
                    recall_at_10_strong=evaluate(scores, strong, by=by)["recall_at_10"],
                    false_positive_rate=every["false_positive_rate"],
                    frequency_only_significant=every["frequency_only_significant"],
                    donors_significant=every["donors_significant"],
                )
            else:
                row["false_positive_rate"] = float(
                    scores["significant"].fillna(False).astype(bool).mean()
                )
            row["words"] = len(scores)
            rows.append(row)
    return pd.DataFrame(rows)
