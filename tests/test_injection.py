"""The synthetic change injection protocol (after Shoemark et al. 2019; sense injection as in
Dubossarsky et al. 2019) on real text shipped with gensim (gensim/test/test_data: the shortened
English Wikipedia dump and lee_background.cor).

The first part checks the manipulations themselves; the last part runs the protocol through the
real pipeline (slice -> train -> rank) and checks what drift finds.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pandas as pd
import pytest

from drift import runfolder
from drift.compare.ranking import DEFAULT_K, DEFAULT_MEASURE
from drift.errors import DriftError
from drift.validate.injection import (
    ProtocolSettings,
    assign_random_slices,
    average_precision,
    build_archive,
    choose_pairs,
    choose_words,
    delete_share,
    evaluate,
    inject_changes,
    plan_archive,
    ranked_words,
    recall_at,
    reference_documents,
    run_protocol,
    word_counts,
    write_dated_csv,
)


@pytest.fixture(scope="session")
def real_documents():
    """Real English text bundled with gensim, read once per session."""
    return reference_documents()


LINES = [
    "the cat sat on the mat".split(),
    "a dog saw the cat and the other cat".split(),
    "no animals here".split(),
    "cat cat dog".split(),
]


# ---------------------------------------------------------------------------- the real text


def test_reference_text_is_real_and_large(real_documents):
    counts = word_counts(real_documents)
    assert sum(counts.values()) > 400_000
    assert len(real_documents) > 4_000
    # Lower-cased alphabetic tokens, no wiki markup left.
    assert all(t.isalpha() and t == t.lower() for t in real_documents[0])
    assert counts["the"] == max(counts.values())


def test_chosen_words_respect_the_count_range(real_documents):
    counts = word_counts(real_documents)
    rng = np.random.default_rng(0)
    pairs = choose_pairs(counts, 6, rng, 300, 800, donor_ratio=(2.0, 4.0))
    targets = [t for t, _ in pairs]
    donors = [d for _, d in pairs]
    assert len(set(targets + donors)) == 12
    assert all(300 <= counts[t] <= 800 for t in targets)
    assert all(2 * counts[t] <= counts[d] <= 4 * counts[t] for t, d in pairs)
    others = choose_words(counts, 5, rng, 300, 800, exclude=targets + donors)
    assert not set(others) & set(targets + donors)


def test_too_narrow_a_count_range_is_a_plain_error():
    with pytest.raises(DriftError, match="Only 0 words"):
        choose_words(Counter({"cat": 3}), 1, np.random.default_rng(0), 10, 20)


# ---------------------------------------------------------------------------- the manipulations


@pytest.mark.parametrize("share, replaced", [(0.0, 0), (0.5, 2), (1.0, 5)])
def test_injection_replaces_exactly_the_share(share, replaced):
    out = inject_changes(LINES, [("dog", "cat")], share, np.random.default_rng(1))
    before, after = word_counts(LINES), word_counts(out)
    assert before["cat"] == 5
    assert after["cat"] == 5 - replaced
    assert after["dog"] == before["dog"] + replaced
    assert sum(after.values()) == sum(before.values())
    # Only donor positions changed, and the input was left alone.
    for old, new in zip(LINES, out, strict=True):
        assert len(old) == len(new)
        assert all(a == b or (a, b) == ("cat", "dog") for a, b in zip(old, new, strict=True))
    assert word_counts(LINES)["cat"] == 5


def test_injection_takes_one_share_per_pair():
    pairs = [("dog", "cat"), ("animals", "the")]
    out = inject_changes(LINES, pairs, [1.0, 0.0], np.random.default_rng(0))
    assert word_counts(out)["cat"] == 0
    assert word_counts(out)["the"] == word_counts(LINES)["the"]


@pytest.mark.parametrize(
    "pairs, shares, message",
    [
        ([("dog", "cat")], [0.5, 0.5], "1 target and donor pairs but 2 shares"),
        ([("dog", "cat"), ("cat", "mat")], 0.5, "different word"),
        ([("dog", "cat")], 1.5, "between 0 and 1"),
    ],
)
def test_bad_injections_are_plain_errors(pairs, shares, message):
    with pytest.raises(DriftError, match=message):
        inject_changes(LINES, pairs, shares, np.random.default_rng(0))


def test_deletion_removes_exactly_the_share():
    out = delete_share(LINES, ["cat", "the"], 0.6, np.random.default_rng(2))
    before, after = word_counts(LINES), word_counts(out)
    assert after["cat"] == 5 - 3 and after["the"] == 4 - 2
    assert {w: c for w, c in after.items() if w not in {"cat", "the"}} == {
        w: c for w, c in before.items() if w not in {"cat", "the"}
    }


def test_random_slices_are_balanced():
    slices = assign_random_slices(101, 3, np.random.default_rng(0))
    assert sorted(Counter(slices.tolist()).values()) == [33, 34, 34]
    with pytest.raises(DriftError, match="at least 2 slices"):
        assign_random_slices(10, 1, np.random.default_rng(0))
    with pytest.raises(DriftError, match="cannot fill"):
        assign_random_slices(2, 3, np.random.default_rng(0))


def test_archive_changes_only_the_later_slices(tmp_path):
    documents = [["cat", "dog", "cat", "mat"] for _ in range(40)]
    archive = build_archive(
        documents, 2, np.random.default_rng(3), [("dog", "cat")], 1.0, ["mat"], 1.0
    )
    early = [d for d, k in zip(archive.documents, archive.slice_of_document, strict=True) if k == 0]
    late = [d for d, k in zip(archive.documents, archive.slice_of_document, strict=True) if k == 1]
    assert all(d == ["cat", "dog", "cat", "mat"] for d in early)
    assert all(d == ["dog", "dog", "dog"] for d in late)
    assert archive.targets == ["dog"] and archive.donors == ["cat"]
    path = write_dated_csv(archive, tmp_path / "archive.csv", np.random.default_rng(0))
    table = pd.read_csv(path)
    assert list(table.columns) == ["date", "text"]
    years = pd.to_datetime(table["date"]).dt.year
    assert sorted(years.unique()) == [2001, 2002]
    assert (table.loc[years == 2002, "text"] == "dog dog dog").all()
    with pytest.raises(DriftError, match="both injected and frequency-only"):
        build_archive(documents, 2, np.random.default_rng(3), [("dog", "cat")], 1.0, ["cat"])


# ---------------------------------------------------------------------------- scoring a ranking


def test_average_precision_and_recall_by_hand():
    ranking = ["a", "x", "b", "y", "z"]
    # Relevant words at ranks 1 and 3: precision 1/1 and 2/3, averaged.
    assert average_precision(ranking, {"a", "b"}) == pytest.approx((1 + 2 / 3) / 2)
    # A relevant word never ranked contributes precision 0.
    assert average_precision(ranking, {"a", "q"}) == pytest.approx(0.5)
    assert recall_at(ranking, {"a", "y", "q"}, k=3) == pytest.approx(1 / 3)
    with pytest.raises(DriftError):
        average_precision(ranking, set())


def test_evaluate_counts_what_was_flagged():
    scores = pd.DataFrame(
        {
            "word": ["t1", "f1", "u1", "t2", "u2", "d1", "u3", "u4"],
            "rank": [1, 2, 3, 4, 5, 6, 7, 8],
            "significant": [True, True, True, False, False, True, False, False],
        }
    )
    result = evaluate(scores, ["t1", "t2", "t3"], ["f1"], ["d1"])
    assert result["average_precision"] == pytest.approx((1 / 1 + 2 / 4) / 3)
    assert result["recall_at_10"] == pytest.approx(2 / 3)
    assert result["false_positive_rate"] == pytest.approx(1 / 4)  # u1 among u1..u4
    assert result["frequency_only_significant"] == 1
    assert result["donors_significant"] == 1
    assert result["missing"] == ["t3"]


def test_evaluate_needs_a_word_column():
    with pytest.raises(DriftError, match="no 'word' column"):
        evaluate(pd.DataFrame({"term": ["a"]}), ["a"])


# ---------------------------------------------------------------------------- through the pipeline

#: Small, fast models: one seed, dimension 50, 5 epochs. With 4 models and 2 workers every model
#: trains on one thread, so gensim's result is reproducible (seeded, with drift's stable hash).
TRAIN = dict(dim=50, epochs=5, min_count=20, seeds=1, workers=2)
SETTINGS = ProtocolSettings(seed=0)


@pytest.fixture(scope="module")
def injected_run(real_documents, tmp_path_factory):
    archive = plan_archive(real_documents, SETTINGS)
    workdir = tmp_path_factory.mktemp("injected")
    scored = run_protocol(
        archive, workdir, measures=[DEFAULT_MEASURE], ks=[DEFAULT_K], train_options=TRAIN
    )
    return archive, scored[(DEFAULT_MEASURE, DEFAULT_K)], workdir / "run"


@pytest.fixture(scope="module")
def shuffled_run(real_documents, tmp_path_factory):
    archive = plan_archive(real_documents, SETTINGS, inject=False)
    workdir = tmp_path_factory.mktemp("shuffled")
    scored = run_protocol(
        archive, workdir, measures=[DEFAULT_MEASURE], ks=[DEFAULT_K], train_options=TRAIN
    )
    return scored[(DEFAULT_MEASURE, DEFAULT_K)], workdir / "run"


@pytest.mark.slow
def test_injected_targets_come_first(injected_run):
    """Synthetic change injection (Shoemark et al. 2019): targets given a donor's contexts in the
    later slice must lead the frequency-matched ranking (by z against the control's null)."""
    archive, scores, _ = injected_run
    strong = archive.targets_with_share_at_least(0.5)
    by_z = ranked_words(scores, "z")
    # The bounds come from chance, not from a measured run: the ranking must beat a random order
    # of the same words at p < 0.001. Hits in the top 10 under a random order follow the
    # hypergeometric distribution (scipy.stats.hypergeom); the average precision of a random
    # order is simulated (2,000 shuffles).
    from scipy.stats import hypergeom

    hits = round(recall_at(by_z, strong, 10) * len(strong))
    assert hypergeom.sf(hits - 1, len(by_z), len(strong), 10) < 0.001, f"{hits} hits in the top 10"
    observed = average_precision(by_z, archive.targets)
    rng = np.random.default_rng(2019)
    shuffled = [average_precision(list(rng.permutation(by_z)), archive.targets)
                for _ in range(2000)]
    assert observed > np.quantile(shuffled, 0.999), (observed, np.quantile(shuffled, 0.999))
    # Every strong target moves more than 90% of the untouched words: by chance alone each would
    # with probability 0.1, all of them with probability 0.1 ** len(strong) (1e-6 for six).
    untouched = scores[~scores["word"].isin(archive.targets + archive.donors)]
    top_decile = untouched["z"].quantile(0.9)
    assert (scores.set_index("word").loc[strong, "z"] > top_decile).all()


@pytest.mark.slow
def test_frequency_only_changes_are_not_significant(injected_run):
    """Words that only lost half their occurrences (and the donors, which lost a share) keep
    their meaning, so the frequency-matched null must not flag them."""
    archive, scores, _ = injected_run
    result = evaluate(scores, archive.targets, archive.frequency_only, archive.donors)
    measured = set(scores["word"])
    assert len(measured & set(archive.frequency_only)) >= 6  # they were measured at all
    assert result["frequency_only_significant"] == 0
    assert result["donors_significant"] == 0
    assert result["false_positive_rate"] <= 0.05


@pytest.mark.slow
def test_shuffled_text_stays_calibrated(shuffled_run):
    """Without injections the two slices differ by chance only: at most 1% of the words may be
    significant at q <= 0.05, the level the README states (Benjamini-Hochberg on a complete null
    lets through about none)."""
    scores, run = shuffled_run
    assert len(scores) > 1000
    assert scores["significant"].fillna(False).astype(bool).mean() <= 0.01
    assert scores["p"].between(0, 1).all()
    flagged = runfolder.read_manifest(run)["stages"]["rank"]["control_flagged"]
    assert flagged <= 0.05 * len(scores)
