"""The rank stage: scores, timeline and terms from a trained run folder."""

from __future__ import annotations

import dataclasses
import json
import logging
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from gensim.models import KeyedVectors
from rankrun_builder import lee_documents, write_array_run, write_text_run
from scipy.stats import ortho_group, spearmanr

from drift import runfolder
from drift.compare.ranking import (
    SCORE_COLUMNS,
    TIMELINE_COLUMNS,
    CalibrationOptions,
    export_vectors,
    neighbours_by_slice,
    rank_run,
    read_scores,
    read_terms,
    read_timeline,
    top_rows,
)
from drift.errors import DriftError

LABELS = ("2001", "2002", "2003")
MOVED = [f"moved{i}" for i in range(8)]
FREQUENCY_ONLY = [f"rarer{i}" for i in range(8)]


def _geometry_run(root, control=True, seeds=2, control_counts=1):
    """Three slices of one random geometry, each in its own random rotation, with noise that
    shrinks with frequency. Eight words seen about 40 times get new vectors in 2003; eight words
    seen about 120 times only become rare in 2003 (8 times: more noise, same meaning); one word
    is new in 2003, one is gone. The control pair has the same geometry and counts, no change.
    """
    rng = np.random.default_rng(11)
    dim = 16
    stable = [f"w{i}" for i in range(380)]
    words = stable[:20] + FREQUENCY_ONLY + stable[20:40] + MOVED + stable[40:]
    counts = np.round(6000 / (1 + np.arange(len(words))) ** 1.3).astype(int) + 4  # Zipf-like
    base = rng.standard_normal((len(words), dim)) + 1.5
    new_places = rng.standard_normal((len(MOVED), dim)) + 1.5
    moved_rows = [words.index(w) for w in MOVED]
    rarer_rows = [words.index(w) for w in FREQUENCY_ONLY]

    def noisy(points, counts_now):
        sd = 2.0 / np.sqrt(counts_now)[:, None]
        matrix = points + sd * rng.standard_normal(points.shape)
        return matrix @ ortho_group.rvs(dim, random_state=int(rng.integers(1 << 30)))

    slices = {}
    for label in LABELS:
        points, counts_now = base.copy(), counts.copy()
        if label == LABELS[-1]:
            points[moved_rows] = new_places
            counts_now[rarer_rows] = 8
        vocab = list(words)
        extra = {LABELS[0]: ("oldword", 400), LABELS[-1]: ("newword", 300)}.get(label)
        if extra:
            vocab.append(extra[0])
            points = np.vstack([points, rng.standard_normal((1, dim)) + 1.5])
            counts_now = np.append(counts_now, extra[1])
        slices[label] = (vocab, [noisy(points, counts_now) for _ in range(seeds)], counts_now)
    pair = None
    if control:
        pair = {
            name: (words, [noisy(base, counts * control_counts) for _ in range(seeds)], counts)
            for name in ("control-a", "control-b")
        }
    return write_array_run(root, slices, pair)


@pytest.fixture(scope="module")
def geometry_run(tmp_path_factory):
    root = _geometry_run(tmp_path_factory.mktemp("geometry") / "run")
    scores = rank_run(root, k=10, quiet=True)
    return root, scores


@pytest.fixture
def own_geometry_run(geometry_run, tmp_path):
    """A copy of the ranked geometry run for a test that ranks it again with other options, so
    that no other test sees those results."""
    root, scores = geometry_run
    return Path(shutil.copytree(root, tmp_path / "own")), scores


def test_scores_follow_the_contract(geometry_run):
    root, scores = geometry_run
    assert list(scores.columns) == SCORE_COLUMNS
    assert scores["rank"].tolist() == list(range(1, len(scores) + 1))
    # With a control the order is by z (change beyond frequency), then by score.
    assert scores["z"].is_monotonic_decreasing
    np.testing.assert_array_equal(scores["score"], scores["displacement"])
    assert len(scores) == 396  # the 380 + 8 + 8 words known to both compared slices
    on_disk = read_scores(root)
    pd.testing.assert_frame_equal(on_disk, scores)
    from_csv = pd.read_csv(runfolder.RunPaths(root).scores_csv)
    assert from_csv["word"].tolist() == scores["word"].tolist()
    np.testing.assert_allclose(from_csv["z"], scores["z"])
    params = runfolder.read_manifest(root)["stages"]["rank"]
    assert params["params"] == {
        "between": ["2001", "2003"], "reference": "2001", "measure": "evidence", "k": 10,
        "alpha": 0.05, "anchors": None, "term_count": 20, "term_ratio": 10.0,
        "anchor_trim": 0.0, "compare": "pair",
        "calibration": dataclasses.asdict(CalibrationOptions()),
    }
    assert params["params"]["calibration"]["count_matched"] is True
    assert isinstance(params["control_flagged"], int)


def test_a_run_ranked_with_other_calibration_defaults_is_ranked_again(own_geometry_run, caplog):
    """Scores made by a drift whose calibration defaults differed (as after an upgrade) are
    not reused: run.json's rank parameters include the calibration options."""
    root, _ = own_geometry_run
    manifest = runfolder.read_manifest(root)
    before = manifest["stages"]["rank"]["finished"]
    with caplog.at_level(logging.INFO, logger="drift"):
        rank_run(root, k=10)
    assert "are current; reusing them" in caplog.text
    recorded = manifest["stages"]["rank"]
    recorded["params"]["calibration"]["count_matched"] = False
    recorded["fingerprint"] = runfolder.fingerprint_params(
        {"params": recorded["params"], "inputs": recorded["inputs"]})
    runfolder.write_json_atomic(runfolder.RunPaths(root).manifest, manifest)
    caplog.clear()
    with caplog.at_level(logging.INFO, logger="drift"):
        rank_run(root, k=10)
    assert "reusing" not in caplog.text
    again = runfolder.read_manifest(root)["stages"]["rank"]
    assert again["params"]["calibration"]["count_matched"] is True
    assert again["finished"] >= before


def test_moved_words_rank_first_and_are_significant(geometry_run):
    _, scores = geometry_run
    # Raw displacement is confounded by frequency (the rarest words are the noisiest), so the
    # moved words lead among words seen at least 30 times, and lead the calibrated z overall.
    assert set(top_rows(scores, top=len(MOVED), min_count=30)["word"]) == set(MOVED)
    top = scores.sort_values("z", ascending=False).head(len(MOVED))
    assert set(top["word"]) == set(MOVED)
    assert top["significant"].all()
    assert (top["change_point"] == "2003").all()
    assert (top["change_step"] > 0.3).all()
    # Turnover and local change see the same words: above nearly every stable word as frequent.
    stable = top_rows(scores, all_rows=True, min_count=30)
    stable = stable[stable["word"].str.startswith("w")]
    for measure in ("turnover", "local"):
        moved = scores.set_index("word").loc[MOVED, measure]
        assert moved.median() > stable[measure].quantile(0.95)
        assert moved.min() > stable[measure].median()


def test_frequency_alone_is_not_significant(geometry_run):
    _, scores = geometry_run
    rarer = scores.set_index("word").loc[FREQUENCY_ONLY]
    assert (rarer["count_to"] == 8).all()
    assert (rarer["log_freq_ratio"] < -2).all()
    assert not rarer["significant"].any()
    # Stable words stay quiet too: at most a handful of false discoveries.
    stable = scores[scores["word"].str.startswith("w")]
    assert stable["significant"].sum() <= 5


def test_timeline_rows_and_reference(geometry_run):
    root, scores = geometry_run
    timeline = read_timeline(root)
    assert list(timeline.columns) == TIMELINE_COLUMNS
    assert len(timeline) == len(scores) * len(LABELS)
    reference = timeline[timeline["slice"] == "2001"]
    np.testing.assert_array_equal(reference["distance"], 0.0)
    np.testing.assert_array_equal(reference["turnover"], 0.0)
    last = timeline[timeline["slice"] == "2003"].set_index("word")
    by_word = scores.set_index("word")
    # Reference = first slice: the timeline's last point is the compared pair's displacement.
    np.testing.assert_allclose(
        last.loc[by_word.index, "distance"], by_word["displacement"], atol=1e-9
    )
    assert (timeline["null_p95"] > 0).all()
    # The null's band narrows as words get more frequent (frequency confound, Dubossarsky et al.).
    middle = timeline[timeline["slice"] == "2002"]
    band = middle.sort_values("count")["null_p95"]
    assert band.iloc[0] > band.iloc[-1]
    assert (timeline["fpm"] == timeline["count"]).all()  # every slice holds a million tokens


def test_terms_list_emerging_and_fading(geometry_run):
    root, scores = geometry_run
    terms = read_terms(root)
    # the rule: at least 20 uses where common and a tenfold change of frequency per million
    counts = pd.read_parquet(runfolder.RunPaths(root).counts).set_index("word")
    first, last = counts["2001"], counts["2003"]
    rising = counts.index[(last >= 20) & (last >= 10 * first)]
    falling = counts.index[(first >= 20) & (first >= 10 * last)]  # equal slice sizes: fpm ~ count
    assert set(terms.loc[terms["kind"] == "emerging", "word"]) == set(rising) == {"newword"}
    assert set(terms.loc[terms["kind"] == "fading", "word"]) == set(falling)
    assert {"oldword", *FREQUENCY_ONLY} <= set(falling)
    assert terms.columns.tolist() == [
        "word", "kind", "count_from", "count_to", "fpm_from", "fpm_to", "ratio", "measured",
        "fpm:2001", "fpm:2002", "fpm:2003",
    ]
    new = terms.iloc[0]
    assert (new["count_from"], new["count_to"], new["fpm:2003"]) == (0, 300, 300.0)
    assert new["ratio"] == np.inf and not new["measured"]
    measured = set(terms.loc[terms["measured"], "word"])
    assert measured == set(FREQUENCY_ONLY) and measured <= set(scores["word"])
    on_disk = pd.read_csv(runfolder.RunPaths(root).terms_csv)
    assert on_disk["word"].tolist() == terms["word"].tolist()


def test_term_rule_options(geometry_run, tmp_path):
    import shutil

    root = tmp_path / "run"
    shutil.copytree(geometry_run[0], root)
    rank_run(root, k=10, term_count=500, quiet=True)
    assert read_terms(root).empty  # no word reaches 500 uses where it is common
    rank_run(root, k=10, term_count=350, term_ratio=30, quiet=True)
    counts = pd.read_parquet(runfolder.RunPaths(root).counts).set_index("word")
    first, last = counts["2001"], counts["2003"]
    tokens = pd.read_csv(runfolder.RunPaths(root).slice_summary, dtype={"label": str})
    size = dict(zip(tokens["label"], tokens["tokens"], strict=True))
    fpm_first, fpm_last = first / size["2001"], last / size["2003"]
    falling = set(counts.index[(first >= 350) & (fpm_first >= 30 * fpm_last)])
    assert set(read_terms(root)["word"]) == falling and "oldword" in falling
    with pytest.raises(DriftError, match="term-ratio"):
        rank_run(root, k=10, term_ratio=1, quiet=True)


def test_gained_and_lost_neighbours(geometry_run):
    _, scores = geometry_run
    row = scores.set_index("word").loc[MOVED[0]]
    gained, lost = row["gained"].split(), row["lost"].split()
    assert len(gained) >= 5 and len(lost) >= 5  # a new place: most of its 10 neighbours changed
    assert not set(gained) & set(lost)
    steady = scores.iloc[-1]
    assert len(steady["gained"].split()) < len(gained)


def test_rank_reuses_current_results_and_recomputes_on_change(own_geometry_run):
    root, _ = own_geometry_run
    paths = runfolder.RunPaths(root)
    before = paths.scores_parquet.stat().st_mtime_ns
    rank_run(root, k=10, quiet=True)
    assert paths.scores_parquet.stat().st_mtime_ns == before
    turnover = rank_run(root, k=10, measure="turnover", quiet=True)
    assert paths.scores_parquet.stat().st_mtime_ns != before
    np.testing.assert_array_equal(turnover["score"], turnover["turnover"])
    combined = rank_run(root, k=10, measure="combined", quiet=True)
    np.testing.assert_allclose(
        combined["score"], (combined["displacement"] + combined["turnover"]) / 2, atol=1e-12
    )


def test_rank_ranks_again_under_another_version_of_drift(own_geometry_run, monkeypatch):
    """Scores depend on drift's own code: results left by another version are not reused."""
    root, _ = own_geometry_run
    paths = runfolder.RunPaths(root)
    rank_run(root, k=10, quiet=True)
    before = paths.scores_parquet.stat().st_mtime_ns
    monkeypatch.setattr(runfolder, "package_version", lambda: "0.0.0-another")
    rank_run(root, k=10, quiet=True)
    assert paths.scores_parquet.stat().st_mtime_ns != before


def test_evidence_combines_the_single_measure_rankings(own_geometry_run):
    """The default measure's z per null is Stouffer's combination of the z that displacement
    and local change get when each is calibrated alone, with the correlation run.json records
    (z = (z_d + z_l) / sqrt(2 + 2r)); the drift question's z is then standardised again among
    words of similar count, the two slices' counts summed (count_matched_z), as each single
    measure's is; CalibrationOptions(matched_on="rarer") matches on the rarer count instead."""
    from drift.compare.alignment import parse_anchors
    from drift.compare.calibration import count_matched_z
    from drift.compare.ranking import CalibrationOptions, assemble_scores, measure_run
    from drift.compare.runinputs import read_run_inputs

    root, default = own_geometry_run
    record = runfolder.read_manifest(root)["stages"]["rank"]
    assert record["params"]["measure"] == "evidence"
    assert record["drift_null_count_matched"] is True
    correlation = record["evidence"]["correlation"]
    assert record["evidence"]["measures"] == ["displacement", "local"]
    inputs = read_run_inputs(root)
    measured = measure_run(inputs, (LABELS[0], LABELS[-1]), LABELS[0], 10, parse_anchors(None),
                           quiet=True)
    unmatched = CalibrationOptions(count_matched=False)
    single = {m: assemble_scores(inputs, measured, m, 0.05, unmatched)[0].set_index("word")
              for m in ("displacement", "local")}
    evidence = assemble_scores(inputs, measured, "evidence", 0.05, unmatched)[0].set_index("word")
    default = default.set_index("word").loc[evidence.index]
    total = default["count_from"] + default["count_to"]
    np.testing.assert_allclose(default["drift_z"], count_matched_z(evidence["drift_z"], total),
                               rtol=1e-6)
    on_rarer = assemble_scores(inputs, measured, "evidence", 0.05,
                               CalibrationOptions(matched_on="rarer"))[0].set_index("word")
    rarer = np.minimum(default["count_from"], default["count_to"])
    np.testing.assert_allclose(on_rarer.loc[evidence.index, "drift_z"],
                               count_matched_z(evidence["drift_z"], rarer), rtol=1e-6)
    np.testing.assert_allclose(default["noise_z"], evidence["noise_z"], rtol=1e-6)
    np.testing.assert_allclose(evidence["score"], evidence["displacement"])
    for null in ("noise", "drift"):
        # away from the floats' floor and ceiling in both measures
        inside = [single[m][f"{null}_p"].between(1e-12, 1 - 1e-12) for m in single]
        words = evidence.index[inside[0].reindex(evidence.index) & inside[1].reindex(
            evidence.index)]
        z_d = single["displacement"].loc[words, f"{null}_z"]
        z_l = single["local"].loc[words, f"{null}_z"]
        expected = (z_d + z_l) / np.sqrt(2 + 2 * correlation[null])
        np.testing.assert_allclose(evidence.loc[words, f"{null}_z"], expected, rtol=1e-6)
        assert 0.0 < correlation[null] < 1.0
    assert evidence.loc[MOVED, "significant"].all()


def test_noise_is_paired_with_each_word_s_own_control_by_default(geometry_run):
    """The noise question is paired; the drift null has count and seed noise only
    (CalibrationOptions.paired_drift is off by default since 5 December 2026, README)."""
    root, scores = geometry_run
    nulls = runfolder.read_manifest(root)["stages"]["rank"]["evidence"]["nulls"]
    for measure in ("displacement", "local"):
        assert nulls[measure]["noise_null"]["scale"] == (
            "log of the measure over the word's own control measure")
        assert "own control measure" not in nulls[measure]["drift_null"]["covariates"]
    assert scores.set_index("word").loc[MOVED, "significant"].all()


def test_the_drift_question_paired_too_takes_the_own_control_as_a_covariate(
    own_geometry_run,
):
    """CalibrationOptions(paired_drift=True), the default before 5 December 2026 and a
    benchmark candidate (README): the noise question is paired as by default, and the drift
    null takes the own control measure as a third covariate."""
    from drift.compare.alignment import parse_anchors
    from drift.compare.ranking import CalibrationOptions, assemble_scores, measure_run
    from drift.compare.runinputs import read_run_inputs

    root, _ = own_geometry_run
    inputs = read_run_inputs(root)
    measured = measure_run(inputs, (LABELS[0], LABELS[-1]), LABELS[0], 10, parse_anchors(None),
                           quiet=True)
    scores, _, _, record = assemble_scores(inputs, measured, "displacement", 0.05,
                                           CalibrationOptions(paired_drift=True))
    default, *_ = assemble_scores(inputs, measured, "displacement", 0.05, CalibrationOptions())
    assert record["noise_null"]["scale"] == "log of the measure over the word's own control measure"
    assert "own control measure" in record["drift_null"]["covariates"]
    by_word = scores.set_index("word")
    assert by_word.loc[MOVED, "significant"].all()
    np.testing.assert_allclose(by_word.loc[MOVED, "noise_z"],
                               default.set_index("word").loc[MOVED, "noise_z"])


def test_several_control_splits_average_each_word_s_own_control_measure(tmp_path):
    """A run trained with two control splits (real Lee text, small models): each word's own
    control measure is the mean of its measure in the two control pairs, each averaged over
    the seeds, and ranking uses it."""
    from test_sources import lee_frame

    from drift.compare.alignment import parse_anchors
    from drift.compare.ranking import measure_run
    from drift.compare.runinputs import read_run_inputs
    from drift.compare.significance import own_control_values
    from drift.embed.training import train_run
    from drift.ingest.slicing import slice_archive

    lee_frame().to_csv(tmp_path / "lee.csv", index=False)
    root = tmp_path / "run"
    slice_archive(tmp_path / "lee.csv", root, by="5y", quiet=True)
    train_run(root, dim=16, epochs=2, min_count=3, seeds=2, workers=1, control_splits=2,
              quiet=True)
    inputs = read_run_inputs(root)
    pair = (inputs.labels[0], inputs.labels[-1])
    measured = measure_run(inputs, pair, pair[0], 10, parse_anchors(None), quiet=True)
    assert all(len(r.more_controls) == 1 for r in measured.results)
    words = measured.words
    expected = []
    for split in ([r.control for r in measured.results],
                  [r.more_controls[0] for r in measured.results]):
        assert split[0].words == split[1].words
        mean = (split[0].displacement + split[1].displacement) / 2
        lookup = dict(zip(split[0].words, mean.tolist(), strict=True))
        expected.append([lookup.get(w, np.nan) for w in words])
    expected = np.array(expected)
    found = np.isfinite(expected).all(axis=0)  # in both control pairs
    assert found.sum() > 500  # of about 1,100 words at min count 3 in either slice
    kept = [w for w, ok in zip(words, found, strict=True) if ok]
    own = own_control_values(measured, "displacement", kept, None, np.ones(len(kept)), None)
    np.testing.assert_allclose(own, expected[:, found].mean(axis=0))
    assert np.abs(own - expected[0, found]).mean() > 0.01  # not the first split's alone
    # the count-change correction's control counts are averaged over the splits the same way
    from drift.compare.significance import harmonic_count, own_control_counts

    halves = []
    for split in (measured.results[0].control, measured.results[0].more_controls[0]):
        effective = harmonic_count(split.counts_from, split.counts_to)
        lookup = dict(zip(split.words, effective.tolist(), strict=True))
        halves.append([lookup[w] for w in kept])
    counts = own_control_counts(measured, kept, np.full(len(kept), -1.0))
    np.testing.assert_allclose(counts, np.mean(halves, axis=0))
    assert np.abs(counts - np.array(halves[0])).max() > 0  # the splits' halves differ
    scores = rank_run(root, k=10, quiet=True)
    assert scores["noise_z"].notna().mean() > 0.9


def test_noise_is_asked_unpaired_when_almost_every_word_moved_more_than_in_the_control(tmp_path):
    """A control whose words barely move (its vectors as steady as 400 times the text would
    make them): hardly any word moved less than in the control, so the paired mirror null has
    no sample; the noise question falls back to the control null, run.json says so, and the
    planted movers still lead."""
    root = _geometry_run(tmp_path / "run", control_counts=400)
    scores = rank_run(root, k=10, measure="displacement", quiet=True)
    record = runfolder.read_manifest(root)["stages"]["rank"]
    assert "moved less than in the control pair" in record["noise_null"]["not paired"]
    assert "log of the measure" == record["noise_null"]["scale"]
    assert "own control measure" not in record["drift_null"]["covariates"]
    assert scores["noise_z"].notna().all()
    assert set(scores["word"].head(len(MOVED))) == set(MOVED)


def test_rank_without_control_is_descriptive(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="drift")
    root = _geometry_run(tmp_path / "run", control=False, seeds=1)
    scores = rank_run(root, k=10)
    assert scores[["z", "p", "q", "null_centre"]].isna().all().all()
    assert not scores["significant"].any()
    assert scores["displacement_sd"].isna().all()  # one seed: no spread
    assert "no control pair" in caplog.text  # a note on the drift logger, no print
    assert runfolder.read_manifest(root)["stages"]["rank"]["control_flagged"] is None
    # Ordered by the drift null's z (no control): the 8 planted movers among the first 10 of
    # the words seen at least 30 times (about 100 words).
    assert set(MOVED) <= set(top_rows(scores, top=len(MOVED) + 2, min_count=30)["word"])
    assert scores["drift_z"].notna().all()
    assert read_timeline(root)["null_p95"].isna().all()


def test_too_small_control_gives_a_descriptive_ranking(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="drift")
    rng = np.random.default_rng(3)
    words = [f"w{i}" for i in range(200)]
    counts = np.arange(200, 0, -1) + 20
    slices = {
        label: (words, [rng.standard_normal((200, 8))], counts) for label in ("2001", "2002")
    }
    tiny = {name: (words[:30], [rng.standard_normal((30, 8))], counts[:30])
            for name in ("control-a", "control-b")}
    root = write_array_run(tmp_path / "run", slices, tiny)
    scores = rank_run(root, k=5)
    assert scores["z"].isna().all() and scores["noise_z"].isna().all()
    assert scores["significant"].isna().all()  # unknown, not False
    assert scores["drift_z"].notna().all()  # the drift null needs no control
    err = caplog.text.replace("\n", " ")
    assert "significance unavailable: " in err
    assert "no noise null: The control pair has only 30 measured words" in err
    assert (scores["significance_note"] == scores["significance_note"].iloc[0]).all()
    assert scores["significance_note"].iloc[0].startswith("significance unavailable")
    status = runfolder.read_manifest(root)["stages"]["rank"]["significance"]["status"]
    assert status == "unavailable"
    assert scores["change_point"].isna().all()  # two slices: no change point


def test_between_reference_and_anchors(own_geometry_run, tmp_path):
    root, _ = own_geometry_run
    other = tmp_path / "anchors.txt"
    other.write_text("\n".join(f"w{i}" for i in range(100)), encoding="utf-8")
    scores = rank_run(root, between=["2002", "2003"], reference="2002", k=10, anchors=str(other),
                      quiet=True)
    assert set(top_rows(scores, top=len(MOVED), min_count=30)["word"]) == set(MOVED)
    stage = runfolder.read_manifest(root)["stages"]["rank"]["params"]
    assert stage["between"] == ["2002", "2003"] and stage["anchors"] == str(other)
    timeline = read_timeline(root)
    np.testing.assert_array_equal(timeline[timeline["slice"] == "2002"]["distance"], 0.0)
    few = rank_run(root, k=10, anchors=50, quiet=True)
    assert set(top_rows(few, top=len(MOVED), min_count=30)["word"]) == set(MOVED)


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"between": ["2001", "1999"]}, "1999 is not a slice of this run; the slices are 2001, 2"),
        ({"between": ["2002", "2002"]}, "names slice 2002 twice"),
        ({"between": ["2002"]}, "takes two slice labels"),
        ({"reference": "1990"}, "--reference 1990 is not a slice"),
        ({"measure": "speed"}, "--measure speed is unknown"),
        ({"k": 0}, "--k must be a whole number"),
        ({"alpha": 1.5}, "--alpha must lie strictly between 0 and 1"),
        ({"anchors": "no-such-file.txt"}, "neither a number of words nor an existing"),
    ],
)
def test_bad_options_are_plain_errors(geometry_run, options, message):
    root, _ = geometry_run
    with pytest.raises(DriftError, match=message):
        rank_run(root, quiet=True, **{"k": 10, **options})


def test_bad_run_folders_are_plain_errors(tmp_path, geometry_run):
    with pytest.raises(DriftError, match="does not exist"):
        rank_run(tmp_path / "nowhere", quiet=True)
    empty = tmp_path / "empty"
    runfolder.prepare_run_folder(empty)
    with pytest.raises(DriftError, match="no trained models yet"):
        rank_run(empty, quiet=True)
    with pytest.raises(DriftError, match="no scores yet"):
        read_scores(empty)
    root = _geometry_run(tmp_path / "broken", control=True, seeds=1)
    runfolder.RunPaths(root).model_file("2002", 0).unlink()
    with pytest.raises(DriftError, match="The model of slice 2002 .* is missing"):
        rank_run(root, k=10, quiet=True)
    root = _geometry_run(tmp_path / "nocontrol", control=True, seeds=1)
    runfolder.RunPaths(root).control_model_file("control-b", 0).unlink()
    with pytest.raises(DriftError, match="control model .* is missing"):
        rank_run(root, k=10, quiet=True)


def test_neighbours_by_slice(geometry_run):
    root, _ = geometry_run
    table = neighbours_by_slice(root, "moved0", k=5)
    assert table.columns.tolist() == ["slice", "rank", "neighbour", "similarity"]
    assert table.groupby("slice").size().to_dict() == {label: 5 for label in LABELS}
    for _, group in table.groupby("slice"):
        assert group["similarity"].is_monotonic_decreasing
        assert "moved0" not in set(group["neighbour"])
    # Seed-averaged cosine of the prepared vectors, recomputed here with gensim's loader.
    paths = runfolder.RunPaths(root)
    from drift.compare.alignment import prepare_vectors

    sims = []
    for seed in (0, 1):
        model = paths.model_file("2002", seed)  # read with numpy and pandas alone
        prepared = prepare_vectors(np.load(model, allow_pickle=False))
        vocabulary = pd.read_parquet(model.with_suffix(".vocab.parquet"))["word"].tolist()
        first = table[table["slice"] == "2002"].iloc[0]
        word, other = vocabulary.index("moved0"), vocabulary.index(first["neighbour"])
        sims.append(prepared[word] @ prepared[other])
    assert first["similarity"] == pytest.approx(np.mean(sims), abs=1e-5)
    only_new = neighbours_by_slice(root, "newword", k=3)
    assert only_new["slice"].unique().tolist() == ["2003"]
    with pytest.raises(DriftError, match="'moved00' is not in any slice of this run; did you mean"):
        neighbours_by_slice(root, "moved00")


def test_export_aligned_vectors(geometry_run, tmp_path):
    root, scores = geometry_run
    written = export_vectors(root, tmp_path / "w2v", "word2vec")
    assert [p.name for p in written] == ["2001.txt", "2002.txt", "2003.txt"]
    first = KeyedVectors.load_word2vec_format(str(written[0]), binary=False)
    last = KeyedVectors.load_word2vec_format(str(written[2]), binary=False)
    # Aligned: a stable, frequent word points the same way in both exported files.
    assert first["w0"] @ last["w0"] > 0.95
    assert first["moved0"] @ last["moved0"] < 0.7
    npz = export_vectors(root, tmp_path / "npz", "npz")
    with np.load(npz[2]) as data:
        words = data["words"].tolist()
        np.testing.assert_allclose(data["vectors"][words.index("w0")], last["w0"], atol=1e-6)
        assert data["counts"][words.index("newword")] == 300
    with pytest.raises(DriftError, match="--vector-format .* is unknown"):
        export_vectors(root, tmp_path / "x", "glove")
    (tmp_path / "file").write_text("x")
    with pytest.raises(DriftError, match="is a file"):
        export_vectors(root, tmp_path / "file", "npz")


def test_exported_vectors_are_aligned_as_the_last_rank_aligned_them(own_geometry_run, tmp_path):
    """A run ranked with --anchor-trim exports (and draws) its slices with that trimmed
    rotation, not with a rotation over every anchor."""
    from drift.compare.alignment import align_onto
    from drift.compare.runinputs import load_slice_vectors

    root, _ = own_geometry_run
    rank_run(root, k=10, anchor_trim=0.3, quiet=True)
    npz = export_vectors(root, tmp_path / "npz", "npz")
    paths = runfolder.RunPaths(root)
    target, last = load_slice_vectors(paths, "2001", 0), load_slice_vectors(paths, "2003", 0)
    trimmed, full = align_onto(last, target, None, 0.3), align_onto(last, target)
    assert np.abs(trimmed - full).max() > 1e-3  # the trim changes the rotation here
    with np.load(npz[2]) as data:
        np.testing.assert_allclose(data["vectors"], last.vectors @ trimmed, atol=1e-5)
    record = json.loads((tmp_path / "npz" / "export.json").read_text())
    assert record["params"]["anchor_trim"] == 0.3


def test_top_rows_filters(geometry_run):
    _, scores = geometry_run
    assert len(top_rows(scores, top=5)) == 5
    assert len(top_rows(scores, all_rows=True)) == len(scores)
    frequent = top_rows(scores, all_rows=True, min_count=1000)
    assert (frequent[["count_from", "count_to"]] >= 1000).all().all()
    with pytest.raises(DriftError, match="--top must be at least 1"):
        top_rows(scores, top=0)
    with pytest.raises(DriftError, match="--min-count-shown must be 0 or more"):
        top_rows(scores, min_count=-1)


# ---------------------------------------------------------------------------- real text


@pytest.fixture(scope="module")
def lee_run(tmp_path_factory):
    """Three slices of gensim's Lee background corpus (real news text), each the whole corpus in
    its own document order; in the last slice 'police' and 'fire' swap every occurrence, so
    both words take over the other's contexts there and nothing else changes. One seed, tiny
    models (24 dimensions, 10 epochs), the control pair drawn from the first and last slice."""
    documents = lee_documents()
    rng = np.random.default_rng(5)
    swap = {"police": "fire", "fire": "police"}
    slices = {}
    for label in LABELS:
        docs = [documents[i] for i in rng.permutation(len(documents))]
        if label == LABELS[-1]:
            docs = [[swap.get(t, t) for t in d] for d in docs]
        slices[label] = docs
    root = write_text_run(tmp_path_factory.mktemp("lee") / "run", slices, seeds=1, dim=24,
                          epochs=10, min_count=5)
    return root, rank_run(root, k=10, quiet=True)


def test_real_text_swapped_words_stand_out(lee_run):
    # Planted change (donor-style replacement on real text, in the spirit of Shoemark et al.
    # 2019): among the ~430 words seen at least 20 times in both slices, the two swapped words
    # are at the top by every measure and by the calibrated z (tiny models are noisy, so the
    # check allows the top five).
    _, scores = lee_run
    frequent = top_rows(scores, all_rows=True, min_count=20)
    assert len(frequent) > 300
    for column in ("displacement", "turnover", "local", "z"):
        leaders = frequent.sort_values(column, ascending=False).head(5)["word"]
        assert {"police", "fire"} <= set(leaders), column
    swapped = scores.set_index("word").loc[["police", "fire"]]
    assert (swapped["change_point"] == "2003").all()
    assert (swapped["gained"].str.len() > 0).all()


def test_real_text_evidence_counts_the_contexts_too(lee_run, tmp_path):
    # The swapped words' contexts are exchanged in the last slice: counted from the text
    # (PPMI rows, Levy, Goldberg and Dagan 2015) they lead the context measure and its own
    # permutation z as well, and the evidence combines three measures.
    root, scores = lee_run
    record = runfolder.read_manifest(root)["stages"]["rank"]
    assert record["evidence"]["measures"] == ["displacement", "local", "context"]
    assert record["context_permutations"] == 20
    frequent = top_rows(scores, all_rows=True, min_count=20)
    for column in ("context", "context_z"):
        leaders = frequent.sort_values(column, ascending=False).head(5)["word"]
        assert {"police", "fire"} <= set(leaders), column
    # Without the slice files the evidence is the embedding measures', with a note.
    copy = tmp_path / "run"
    shutil.copytree(root, copy)
    runfolder.RunPaths(copy).slice_file(LABELS[-1]).unlink()
    again = rank_run(copy, k=10, alpha=0.04, quiet=True)
    redone = runfolder.read_manifest(copy)["stages"]["rank"]
    assert redone["evidence"]["measures"] == ["displacement", "local"]
    assert any("context change" in note for note in redone["notes"])
    assert again["context"].isna().all() and again["context_z"].isna().all()


def test_real_text_frequency_confound(lee_run):
    # Published finding: rarer words look more shifted (Dubossarsky et al. 2017). Displacement
    # falls with frequency on real text (rank correlation, scipy.stats.spearmanr).
    _, scores = lee_run
    rho, p = spearmanr(scores["count_from"], scores["displacement"])
    assert rho < -0.1 and p < 1e-6


def test_real_text_null_flags_few_control_words(lee_run):
    root, scores = lee_run
    stage = runfolder.read_manifest(root)["stages"]["rank"]
    assert stage["control_flagged"] <= 0.05 * len(scores)
    assert stage["seeds"] == [0]
    json.dumps(stage)


def test_k_larger_than_the_vocabulary_is_lowered_with_a_note(geometry_run, tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="drift")
    root, _ = geometry_run
    copy = tmp_path / "run"
    shutil.copytree(root, copy)
    scores = rank_run(copy, k=500)
    err = caplog.text.replace("\n", " ")
    assert "too few for --k 500" in err and "k = " in err
    record = runfolder.read_manifest(copy)["stages"]["rank"]
    assert record["params"]["k"] == 500 and record["k_used"] < 500
    assert scores["turnover"].between(0, 1).all()


def test_whole_timeline_finds_the_step_where_words_moved(geometry_run, tmp_path):
    """--compare steps: the eight words moved between 2002 and 2003 (the fixture's truth), so
    their largest calibrated step is that one, and they lead the ranking."""
    root, _ = geometry_run
    copy = tmp_path / "run"
    shutil.copytree(root, copy)
    scores = rank_run(copy, k=10, compare="steps", quiet=True)
    moved = scores.set_index("word").loc[MOVED]
    assert (moved["change_point"] == "2003").all()
    assert set(scores.head(len(MOVED))["word"]) == set(MOVED)
    assert moved["significant"].all()
    assert scores["p"].between(0, 1).all()
    # Bonferroni over the two steps: p is at least twice the smaller step's headline p.
    assert (scores["p"] >= scores[["noise_p", "drift_p"]].max(axis=1) - 1e-12).all()
    stable = scores[scores["word"].str.startswith("w")]
    assert stable["significant"].sum() <= 2
    record = runfolder.read_manifest(copy)["stages"]["rank"]
    assert record["params"]["compare"] == "steps"
    # steps judge displacement only: the first and last slices' context change is not counted
    assert scores["context_z"].isna().all() and "context_permutations" not in record
    assert record["drift_null_count_matched"] is True  # each step's drift z, as the pair's
    # each step's drift z is centred within count bins (count_matched_z), so the chosen
    # step's drift z shows no trend along the counts: its median is the same in every third of
    # the stable words' counts (all shifted alike by taking the better of two steps: the mean
    # of the larger of two standard normals is 1/sqrt(pi), about 0.56, from memory)
    rarer = np.minimum(stable["count_from"], stable["count_to"])
    thirds = pd.qcut(rarer.rank(method="first"), 3, labels=False)
    medians = stable.groupby(thirds)["drift_z"].median()
    assert medians.max() - medians.min() < 0.3
    assert medians.between(0.0, 1.0).all()


def test_steps_needs_displacement(geometry_run):
    root, _ = geometry_run
    with pytest.raises(DriftError, match="--compare steps judges displacement"):
        rank_run(root, compare="steps", measure="turnover", quiet=True)


def test_words_the_control_lacks_get_their_class_spread(own_geometry_run):
    """Words no control model has (simulated by renaming a third of the control's words) form
    their own class: with the default options their z per question is the z they get without
    the class (separate_unpaired=False) divided by the spread run.json records for it, before
    the drift z is count-matched; every other word's noise z is unchanged."""
    from drift.compare.alignment import parse_anchors
    from drift.compare.ranking import CalibrationOptions, assemble_scores, measure_run
    from drift.compare.runinputs import read_run_inputs
    from drift.compare.significance import lacks_own_control

    root, _ = own_geometry_run
    inputs = read_run_inputs(root)
    measured = measure_run(inputs, (LABELS[0], LABELS[-1]), LABELS[0], 10, parse_anchors(None),
                           quiet=True)
    assert not lacks_own_control(measured, measured.words).any()
    for result in measured.results:
        result.control.words = [f"{w}#absent" if i % 3 == 0 else w
                                for i, w in enumerate(result.control.words)]
    lacking = lacks_own_control(measured, measured.words)
    assert 100 < lacking.sum() < 150
    plain = CalibrationOptions(count_matched=False)
    single = dataclasses.replace(plain, separate_unpaired=False)
    with_class, _, _, record = assemble_scores(inputs, measured, "evidence", 0.05, plain)
    without, *_ = assemble_scores(inputs, measured, "evidence", 0.05, single)
    with_class = with_class.set_index("word").loc[measured.words]
    without = without.set_index("word").loc[measured.words]
    entry = record["unpaired_class"]
    assert entry["words"] == int(lacking.sum())
    assert max(entry["noise_spread"], entry["drift_spread"]) > 1.0  # the class is wider here
    chosen = lacking
    for question in ("noise", "drift"):
        factor = entry[f"{question}_spread"]
        assert factor >= 1.0
        np.testing.assert_allclose(with_class[f"{question}_z"][chosen],
                                   without[f"{question}_z"][chosen] / factor, rtol=1e-4)
        np.testing.assert_allclose(with_class[f"{question}_z"][~chosen],
                                   without[f"{question}_z"][~chosen], rtol=1e-6)
