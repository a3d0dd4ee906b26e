"""Calibration: the noise and drift nulls, z, p, Benjamini-Hochberg q and the headline.

The arithmetic is checked on draws from a known null (log-normal numbers whose log has a known
centre and spread that depend on both covariates, frequency and each word's own seed noise: the
nulls are fitted on the log of the measure), against SciPy's reference functions
(scipy.stats.norm, kstest, binomtest, spearmanr). Statistical checks run over many seeds with a
binomial bound, so that no lucky seed decides them. The same nulls on real shuffled text are
checked in tests/test_injection.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from drift.compare.calibration import (
    CALIBRATION_COLUMNS,
    bh_qvalues,
    calibrate,
    class_spread,
    combine_evidence,
    count_matched_z,
    evidence_correlation,
    fit_null,
    frequency_covariate,
    noise_covariate,
    stouffer_z,
    with_class_spread,
    with_count_matched_drift,
)
from drift.errors import DriftError

SEEDS = range(20)


def true_centre(x_count: np.ndarray, x_noise: np.ndarray) -> np.ndarray:
    """The null's centre on the log scale."""
    return -0.3 - 0.15 * x_count + 0.4 * x_noise


def true_spread(x_count: np.ndarray, x_noise: np.ndarray) -> np.ndarray:
    """The null's spread on the log scale."""
    return 0.2 * np.exp(-0.05 * x_count + 0.2 * x_noise)


def draw_words(rng: np.random.Generator, n: int, shift: float = 0.0):
    """``n`` unchanged words (their measures drawn from the true null), plus ``shift`` spreads."""
    count_from = np.round(np.exp(rng.uniform(np.log(20), np.log(20000), n)))
    count_to = np.maximum(1, rng.binomial(2 * count_from.astype(int), 0.5))
    noise = np.exp(rng.normal(-2.0, 0.5, n))
    xc, xn = frequency_covariate(count_from, count_to), noise_covariate(noise)
    values = np.exp(true_centre(xc, xn) + true_spread(xc, xn) * (rng.standard_normal(n) + shift))
    return values, count_from, count_to, noise


def moved(values, cf, ct, noise, spreads):
    """``values`` moved up by ``spreads`` null spreads (on the log scale)."""
    xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
    return values * np.exp(spreads * true_spread(xc, xn))


def fitted(seed: int, n: int = 3000):
    values, cf, ct, noise = draw_words(np.random.default_rng(seed), n)
    return fit_null(values, cf, ct, noise)


def test_columns_order_length_and_z():
    rng = np.random.default_rng(0)
    null = fitted(1)
    values, cf, ct, noise = draw_words(rng, 500)
    table = calibrate(values, cf, ct, seed_noise=noise, noise_null=null, drift_null=null)
    assert list(table.columns) == CALIBRATION_COLUMNS
    assert len(table) == len(values)
    # Same order as the input: z recomputed from the returned centre and spread, row by row
    # (the centre is the null's median; the spread on the log scale is null_spread / null_centre).
    log_spread = table["null_spread"] / table["null_centre"]
    np.testing.assert_allclose(
        table["noise_z"], (np.log(values) - np.log(table["null_centre"])) / log_spread
    )
    # The normal tail: p is scipy.stats.norm.sf of z.
    np.testing.assert_allclose(table["noise_p"], stats.norm.sf(table["noise_z"]))


def test_fitted_null_recovers_the_true_centre_and_spread():
    null = fitted(2)
    counts = np.array([30.0, 300.0, 3000.0])
    noise = np.array([0.08, 0.15, 0.3])  # inside the bulk of the drawn noise (lognormal(-2, 0.5))
    xc, xn = np.log(counts), noise_covariate(noise)
    np.testing.assert_allclose(null.model_centre(counts, noise), true_centre(xc, xn), atol=0.02)
    np.testing.assert_allclose(null.model_spread(counts, noise), true_spread(xc, xn), rtol=0.15)
    np.testing.assert_allclose(null.centre(counts, noise), np.exp(true_centre(xc, xn)), rtol=0.02)


def test_p_is_uniform_on_a_known_null_across_seeds():
    """On fresh null words p is uniform: Kolmogorov-Smirnov (scipy.stats.kstest) over 20 seeds;
    at the 0.01 level at most 3 of 20 may reject by chance (binomial bound, scipy.stats.binomtest:
    P(X >= 4 | n=20, p=0.01) is about 4e-5)."""
    rejections = 0
    for seed in SEEDS:
        rng = np.random.default_rng(100 + seed)
        null = fitted(200 + seed)
        values, cf, ct, noise = draw_words(rng, 1000)
        p = calibrate(values, cf, ct, seed_noise=noise, noise_null=null, drift_null=null)["p"]
        rejections += stats.kstest(p, "uniform").pvalue < 0.01
    assert stats.binomtest(4, 20, 0.01, alternative="greater").pvalue < 1e-4
    assert rejections <= 3


def test_few_false_positives_on_a_complete_null_across_seeds():
    """Benjamini-Hochberg at 0.05 on a complete null controls the family-wise error at 0.05:
    some word is flagged in at most 5% of the seeds; over 20 seeds at most 4 (binomial bound:
    P(X >= 5 | n=20, p=0.05) is about 0.003)."""
    any_flagged = 0
    for seed in SEEDS:
        rng = np.random.default_rng(300 + seed)
        null = fitted(400 + seed)
        values, cf, ct, noise = draw_words(rng, 1000)
        table = calibrate(values, cf, ct, seed_noise=noise, noise_null=null, drift_null=null)
        any_flagged += bool(table["significant"].any())
    assert any_flagged <= 4


def test_planted_changes_are_found_and_z_is_frequency_fair():
    rng = np.random.default_rng(5)
    null = fitted(6)
    values, cf, ct, noise = draw_words(rng, 2000)
    values[:20] = moved(values[:20], cf[:20], ct[:20], noise[:20], 8)
    table = calibrate(values, cf, ct, seed_noise=noise, noise_null=null, drift_null=null)
    assert table["significant"].iloc[:20].mean() >= 0.9
    assert table["significant"].iloc[20:].sum() <= 2
    # A z of 8 spreads gets a p a correction over thousands of words lets through.
    assert table["p"].iloc[:20].median() < 1e-8
    # z does not follow frequency (the null is frequency-matched): Spearman (scipy.stats.spearmanr).
    rho = stats.spearmanr(table["z"].iloc[20:], np.log(cf[20:] + ct[20:])).statistic
    assert abs(rho) < 0.1


def test_noisy_words_are_judged_by_their_own_noise():
    """The same value is ordinary for a word with noisy seeds and extreme for a steady one."""
    null = fitted(7)
    count, noisy, steady = 500.0, 0.3, 0.07  # both inside the bulk of the drawn noise
    xc, xn = np.log(count), noise_covariate(noisy)
    value = np.exp(true_centre(xc, xn) + 1.0 * true_spread(xc, xn))
    p = null.p_of_z(null.z([value, value], [count, count], [noisy, steady]))
    assert p[0] > 0.05
    assert p[1] < 1e-6


def test_drift_null_is_robust_to_the_words_that_moved():
    """Efron-style empirical null: 5% of words moved far; the null fitted on all of them keeps
    the centre and spread of the rest and flags the movers."""
    rng = np.random.default_rng(8)
    values, cf, ct, noise = draw_words(rng, 3000)
    movers = rng.random(3000) < 0.05
    xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
    values = np.where(movers, moved(values, cf, ct, noise, 6), values)
    null = fit_null(values, cf, ct, noise, what="pair")
    # The movers do not pull the null: it is the null fitted to the unmoved words alone, within
    # a tenth of a spread for 99% of the words.
    keep = ~movers
    alone = fit_null(values[keep], cf[keep], ct[keep], noise[keep])
    pulled = np.abs(null.model_centre(cf, noise) - alone.model_centre(cf, noise))
    assert np.quantile(pulled / alone.model_spread(cf, noise), 0.99) < 0.1
    ratio = null.model_spread(cf, noise) / alone.model_spread(cf, noise)
    assert np.quantile(np.abs(ratio - 1), 0.99) < 0.1
    # And both are near the truth for most words (a fitted surface is least sure at its edges).
    centre_error = np.abs(null.model_centre(cf, noise) - true_centre(xc, xn)) / true_spread(xc, xn)
    assert np.quantile(centre_error, 0.9) < 0.25
    assert 0.9 < np.median(null.model_spread(cf, noise) / true_spread(xc, xn)) < 1.1
    table = calibrate(values, cf, ct, seed_noise=noise, noise_null=null, drift_null=null)
    assert table["significant"][movers].mean() > 0.6
    assert table["significant"][keep].mean() < 0.005


def test_headline_needs_both_nulls():
    rng = np.random.default_rng(9)
    values, cf, ct, noise = draw_words(rng, 2000)
    noise_null = fitted(10)
    # A drift null shifted up by 5 spreads: every word moved beyond noise (the noise null flags
    # the shifted words), but none moved more than typical words did.
    shifted = moved(values, cf, ct, noise, 5)
    drift_null = fit_null(shifted, cf, ct, noise)
    table = calibrate(shifted, cf, ct, seed_noise=noise, noise_null=noise_null,
                      drift_null=drift_null)
    assert (table["noise_q"] <= 0.05).mean() > 0.9
    assert (table["drift_q"] <= 0.05).mean() < 0.01
    assert table["significant"].mean() < 0.01
    np.testing.assert_allclose(table["p"], np.fmax(table["noise_p"], table["drift_p"]))
    np.testing.assert_allclose(table["z"], np.fmin(table["noise_z"], table["drift_z"]))
    np.testing.assert_allclose(table["q"], bh_qvalues(table["p"]))


def test_without_a_noise_null_the_headline_is_missing():
    rng = np.random.default_rng(11)
    values, cf, ct, noise = draw_words(rng, 500)
    drift_null = fit_null(values, cf, ct, noise)
    table = calibrate(values, cf, ct, seed_noise=noise, noise_null=None, drift_null=drift_null)
    assert table["noise_z"].isna().all() and table["z"].isna().all()
    assert table["drift_z"].notna().all()
    assert table["significant"].isna().all()  # unknown, not False


def test_count_only_null_without_seed_noise():
    rng = np.random.default_rng(12)
    values, cf, ct, _ = draw_words(rng, 3000)
    null = fit_null(values, cf, ct)
    assert not null.uses_noise
    table = calibrate(values, cf, ct, noise_null=null, drift_null=null)
    assert table["significant"].mean() < 0.01


def test_pareto_tail_is_available_and_never_gives_zero():
    null = fit_null(*draw_words(np.random.default_rng(13), 3000), tail="pareto")
    assert null.tail == "pareto"
    p = null.p_of_z(np.array([0.0, 3.0, 40.0]))
    assert 0 < p[2] < p[1] < p[0] <= 1


def test_words_without_a_measure_get_no_statistics():
    null = fitted(14)
    table = calibrate([np.nan, 5.0], [100, 100], [100, 100], seed_noise=[0.1, 0.1],
                      noise_null=null, drift_null=null)
    assert np.isnan(table["p"].iloc[0]) and np.isnan(table["q"].iloc[0])
    assert not table["significant"].iloc[0]
    assert table["significant"].iloc[1]


def test_quantile_follows_the_true_null():
    null = fitted(15)
    counts, noise = np.array([30.0, 3000.0]), np.array([0.1, 0.1])
    xc, xn = np.log(counts), noise_covariate(noise)
    expected = np.exp(true_centre(xc, xn) + stats.norm.ppf(0.95) * true_spread(xc, xn))
    np.testing.assert_allclose(null.quantile(0.95, counts, noise), expected, rtol=0.05)


def test_covariates_beyond_the_fitted_range_are_held_constant():
    null = fitted(16)
    assert null.centre(1e12, 0.1) == pytest.approx(null.centre(1e9, 0.1))
    assert null.spread(50, 1e-9) == pytest.approx(null.spread(50, 1e-12))


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: calibrate([0.5], [1], [1], alpha=0.0), "--alpha"),
        (lambda: calibrate([0.5], [1], [1], alpha=1.5), "--alpha"),
        (lambda: fit_null(np.arange(10.0), [1.0] * 9, [1.0] * 9), "measures but"),
        (lambda: fit_null(np.arange(10.0), [5.0] * 10, [5.0] * 10), "only 10 measured words"),
        (lambda: fit_null(np.ones(100), [50.0] * 100, [50.0] * 100), "same measure"),
        (lambda: fit_null(np.arange(100.0), [50.0] * 100, [50.0] * 100, tail="x"), "tail"),
        (lambda: fitted(17).quantile(1.0, 100, 0.1), "0 < q < 1"),
    ],
)
def test_bad_input_is_a_plain_error(call, message):
    with pytest.raises(DriftError, match=message):
        call()


def test_raw_scale_is_available():
    """The same checks hold on the measure's own scale when the data are normal there."""
    rng = np.random.default_rng(19)
    values, cf, ct, noise = draw_words(rng, 3000)
    null = fit_null(np.log(values), cf, ct, noise, log_scale=False)
    assert not null.log_scale
    xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
    np.testing.assert_allclose(
        np.median(null.centre(cf, noise) - true_centre(xc, xn)), 0.0, atol=0.01
    )


def test_null_needing_seed_noise_says_so():
    with pytest.raises(DriftError, match="seed noise"):
        fitted(18).centre(100.0)


def test_tied_measure_gives_a_sane_null():
    """Neighbour turnover is a Jaccard distance of top-k sets: few distinct values and most rare
    words at exactly 1.0, so a plain median absolute deviation is often 0."""
    rng = np.random.default_rng(3)
    counts = np.round(np.exp(rng.uniform(np.log(20), np.log(3000), 3000)))
    k = 10
    stay = np.clip(0.12 * np.log(counts) - 0.35, 0.0, 0.9)  # chance a neighbour stays

    def draw_turnover():
        shared = rng.binomial(k, stay)
        return 1.0 - shared / (2 * k - shared)

    null = fit_null(draw_turnover(), counts, counts)
    assert np.all(np.isfinite(null.spread(counts))) and np.all(null.spread(counts) > 1e-3)
    table = calibrate(draw_turnover(), counts, counts, noise_null=null, drift_null=null)
    assert table["significant"].mean() <= 0.05


def test_bh_qvalues_keeps_missing_values():
    q = bh_qvalues([0.01, np.nan, 0.04])
    assert np.isnan(q[1])
    # Benjamini-Hochberg by hand on two p-values: q = min over j >= i of p_(j) * m / j.
    np.testing.assert_allclose(q[[0, 2]], [0.02, 0.04])
    assert isinstance(pd.Series(q).sum(), float)


# ----------------------------------------------------------------- the combined evidence


def test_stouffer_matches_scipy_for_independent_measures():
    """With r = 0 the combination is Stouffer's: scipy.stats.combine_pvalues(method='stouffer')
    is the reference."""
    rng = np.random.default_rng(11)
    p = rng.uniform(1e-6, 1, size=(50, 3))
    ours = stats.norm.sf(stouffer_z(stats.norm.isf(p), 0.0))
    reference = [stats.combine_pvalues(row, method="stouffer").pvalue for row in p]
    np.testing.assert_allclose(ours, reference, rtol=1e-10)


def test_correlated_measures_are_not_counted_twice():
    """Two copies of one z (r = 1) are one piece of evidence: the combination is that z. For
    equally correlated z the sum has variance m + m(m-1)r (the variance of a sum)."""
    z = np.random.default_rng(2).standard_normal(20000)
    np.testing.assert_allclose(stouffer_z(np.column_stack([z, z]), 1.0), z)
    rng = np.random.default_rng(3)
    shared = rng.standard_normal(20000)
    pair = np.sqrt(0.6) * shared[:, None] + np.sqrt(0.4) * rng.standard_normal((20000, 2))
    r = evidence_correlation(pair)
    assert abs(r - 0.6) < 0.05  # the trim at |z| <= 3 barely lowers it
    assert abs(stouffer_z(pair, r).std() - 1.0) < 0.03


def three_correlated_measures(seed: int, n: int = 20000) -> np.ndarray:
    """Standard normal z of three measures of unchanged words: the first two correlated about
    0.6 (as displacement and local change are), the third nearly independent of them."""
    rng = np.random.default_rng(seed)
    shared = rng.standard_normal(n)
    first_two = np.sqrt(0.6) * shared[:, None] + np.sqrt(0.4) * rng.standard_normal((n, 2))
    third = np.sqrt(0.05) * shared + np.sqrt(0.95) * rng.standard_normal(n)
    return np.column_stack([first_two, third])


def test_unequally_correlated_measures_are_weighted_and_stay_standard_normal():
    """Three measures, two strongly correlated and one nearly independent (as displacement,
    local change and the counted context change are): O'Brien's (1984) GLS weights give the
    third more weight; under the null the weighted z keeps a standard deviation of 1 (numpy's
    sample statistics as reference); with equal correlations the weights are equal and the
    combination is Stouffer's."""
    from drift.compare.calibration import evidence_correlation_matrix, gls_weights, weighted_z

    z = three_correlated_measures(5)
    matrix = evidence_correlation_matrix(z)
    weights = gls_weights(matrix)
    assert weights[2] > 0.4 > weights[0] and abs(weights[0] - weights[1]) < 0.02
    combined = weighted_z(z, weights, matrix)
    assert abs(combined.std() - 1.0) < 0.03 and abs(combined.mean()) < 0.03
    pair = z[:, :2]
    r = evidence_correlation(pair)
    np.testing.assert_allclose(weighted_z(pair, gls_weights(evidence_correlation_matrix(pair)),
                                          evidence_correlation_matrix(pair)),
                               stouffer_z(pair, r), rtol=1e-9)


def test_weights_by_kind_keep_the_combined_z_standard_normal():
    """The default weighting: half to the counted context change, a quarter to each trained
    measure, whatever their correlation; the weighted sum over its standard deviation (from the
    correlation matrix) stays standard normal under the null (numpy's sample statistics as
    reference), and with the context change missing the two trained measures weigh equally."""
    from drift.compare.calibration import (
        combine_evidence,
        evidence_correlation_matrix,
        kind_weights,
        weighted_z,
    )

    z = three_correlated_measures(6)
    names = ["displacement", "local", "context"]
    np.testing.assert_allclose(kind_weights(names), [0.25, 0.25, 0.5])
    np.testing.assert_allclose(kind_weights(names[:2]), [0.5, 0.5])
    combined = weighted_z(z, kind_weights(names), evidence_correlation_matrix(z))
    assert abs(combined.std() - 1.0) < 0.03 and abs(combined.mean()) < 0.03
    tables = {name: pd.DataFrame({"noise_p": stats.norm.sf(z[:, i]),
                                  "drift_p": stats.norm.sf(z[:, i])})
              for i, name in enumerate(names)}
    weights: dict[str, list[float]] = {}
    table, _ = combine_evidence(tables, weights_out=weights, weighting="kinds")
    assert weights["noise"] == [0.25, 0.25, 0.5]
    assert abs(table["noise_z"].std() - 1.0) < 0.03
    with pytest.raises(ValueError, match="weighting must be one of"):
        combine_evidence(tables, weighting="best")


def test_combined_evidence_keeps_its_level_across_seeds():
    """On a complete null (two correlated measures of unchanged words) the combined headline
    flags some word in at most 4 of 20 seeds (binomial bound, as for one measure above)."""
    any_flagged = 0
    for seed in SEEDS:
        rng = np.random.default_rng(700 + seed)
        values, cf, ct, noise = draw_words(rng, 1500)
        second = values * np.exp(0.1 * rng.standard_normal(1500))  # correlated with the first
        tables = {}
        for name, v in (("displacement", values), ("local", second)):
            null = fit_null(v, cf, ct, noise)
            tables[name] = calibrate(v, cf, ct, seed_noise=noise, noise_null=null,
                                     drift_null=null)
        table, _ = combine_evidence(tables)
        any_flagged += bool(table["significant"].any())
    assert any_flagged <= 4


def test_combined_evidence_finds_a_word_that_moves_in_both_measures():
    """A word 3 spreads out in each of two measures correlated about 0.5 gets a combined z of
    (3 + 3) / sqrt(2 + 2r), about 3.46 at r = 0.5 (a hand computation from the formula): more
    evidence than either measure alone, less than if they were independent (4.24)."""
    rng = np.random.default_rng(8)
    a, b = rng.standard_normal((2, 1500))
    z = np.column_stack([a, 0.5 * a + np.sqrt(0.75) * b])
    z[0] = [3.0, 3.0]
    tables = {
        name: pd.DataFrame({"noise_p": stats.norm.sf(z[:, i]), "drift_p": stats.norm.sf(z[:, i]),
                            "noise_z": z[:, i], "drift_z": z[:, i]})
        for i, name in enumerate(("displacement", "local"))
    }
    table, correlation = combine_evidence(tables)
    assert 0.4 < correlation["noise"] < 0.6
    expected = 6.0 / np.sqrt(2 + 2 * correlation["noise"])
    assert table["noise_z"].iloc[0] == pytest.approx(expected)
    assert 3.0 < table["z"].iloc[0] < 6.0 / np.sqrt(2)


def test_own_control_covariate_separates_movers_from_words_noisy_in_their_own_way():
    """Each word has a noise level of its own that the covariates do not see (a bursty word),
    shown both in its control measure and between the slices, as in the calibration benchmark
    (README: the residuals of log displacement in the pair and in the control correlate, 0.8 on
    shuffled text). With the control measure as a covariate the drift null ranks the movers
    higher, across seeds (binomial bound, scipy.stats.binomtest), and keeps its level."""
    better, flagged_unmoved = 0, []
    for seed in SEEDS:
        rng = np.random.default_rng(100 + seed)
        n = 2000
        values, cf, ct, noise = draw_words(rng, n)
        xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
        own_level = 2.0 * rng.standard_normal(n)  # the word's own noise, in null spreads
        spread = true_spread(xc, xn)
        own = np.exp(true_centre(xc, xn) + spread * (own_level + 0.5 * rng.standard_normal(n)))
        values = values * np.exp(spread * own_level)
        movers = np.arange(n) < 20
        values[movers] = moved(values[movers], cf[movers], ct[movers], noise[movers], 4)
        plain = fit_null(values, cf, ct, noise, what="pair")
        with_own = fit_null(values, cf, ct, noise, what="pair", own=own)
        z_plain = plain.z(values, np.minimum(cf, ct), noise)
        z_own = with_own.z(values, np.minimum(cf, ct), noise, own)
        ranks_plain = stats.rankdata(-z_plain)[movers]
        ranks_own = stats.rankdata(-z_own)[movers]
        better += np.median(ranks_own) < np.median(ranks_plain)
        p_unmoved = with_own.p_of_z(z_own[~movers])
        flagged_unmoved.append(np.mean(p_unmoved <= 0.01))
    # The own covariate helps in more seeds than chance would give (sign test).
    assert stats.binomtest(better, len(SEEDS), 0.5, alternative="greater").pvalue < 0.01
    # Unmoved words keep the level: about 1% at p <= 0.01.
    assert np.mean(flagged_unmoved) < 0.02
    described = with_own.describe()["covariates"]
    assert "own control measure" in described


def test_own_control_values_are_needed_once_fitted():
    values, cf, ct, noise = draw_words(np.random.default_rng(3), 500)
    null = fit_null(values, cf, ct, noise, own=values)
    with pytest.raises(DriftError, match="own control measure"):
        null.z(values, cf, noise)
    # a missing own value is held at the middle of its fitted range, not propagated as NaN
    own = values.copy()
    own[0] = np.nan
    assert np.isfinite(null.z(values, cf, noise, own)).all()


def paired_words(rng: np.random.Generator, n: int, moved_share: float = 0.0, shift: float = 0.0):
    """Exchangeable pairs: each word has a noise level of its own (unseen by the covariates),
    shown alike in its control measure and between the slices; ``moved_share`` of the words
    then moved up by ``shift`` spreads of the paired ratio."""
    values, cf, ct, noise = draw_words(rng, n)
    xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
    level = true_centre(xc, xn) + 2.0 * true_spread(xc, xn) * rng.standard_normal(n)
    own = np.exp(level + true_spread(xc, xn) * rng.standard_normal(n))
    measure = np.exp(level + true_spread(xc, xn) * rng.standard_normal(n))
    ratio = np.log(measure) - np.log(own)
    moved_words = rng.random(n) < moved_share
    ratio[moved_words] += shift * np.sqrt(2.0) * true_spread(xc, xn)[moved_words]
    return ratio, cf, ct, noise, moved_words


def test_paired_null_keeps_its_level_across_seeds():
    """Under exchangeability the paired ratio is symmetric about 0: p is uniform (KS test,
    scipy.stats.kstest) and about 1% of words fall below 0.01, across seeds (binomial bound,
    scipy.stats.binomtest, over the words of all seeds)."""
    from drift.compare.calibration import fit_paired_null

    below, total = 0, 0
    for seed in SEEDS:
        ratio, cf, ct, noise, _ = paired_words(np.random.default_rng(300 + seed), 2000)
        null = fit_paired_null(ratio, cf, ct, noise)
        p = null.p_of_z(null.z(ratio, np.minimum(cf, ct), noise))
        below += int(np.sum(p <= 0.01))
        total += len(p)
        if seed == 0:
            assert stats.kstest(p, "uniform").pvalue > 0.001
            assert null.describe()["scale"].startswith("log of the measure over")
    assert stats.binomtest(below, total, 0.01).pvalue > 0.001, below / total


def test_paired_null_is_fitted_on_the_side_movers_never_reach():
    """When most words moved (a long archive), the words that moved less than in the control
    still give the right spread: movers found, the unmoved words keep their level."""
    from drift.compare.calibration import fit_paired_null

    ratio, cf, ct, noise, moved_words = paired_words(np.random.default_rng(9), 4000, 0.6, 5.0)
    null = fit_paired_null(ratio, cf, ct, noise)
    xc, xn = frequency_covariate(cf, ct), noise_covariate(noise)
    fitted_spread = null.model_spread(np.minimum(cf, ct), noise)
    true = np.sqrt(2.0) * true_spread(xc, xn)
    assert 0.85 < np.median(fitted_spread / true) < 1.15
    p = null.p_of_z(null.z(ratio, np.minimum(cf, ct), noise))
    assert np.mean(p[~moved_words] <= 0.01) < 0.02
    assert np.mean(p[moved_words] <= 0.01) > 0.6


def test_paired_null_needs_words_below_zero():
    from drift.compare.calibration import fit_paired_null

    ratio = np.abs(np.random.default_rng(1).standard_normal(300)) + 0.1
    with pytest.raises(DriftError, match="moved less than in the control pair"):
        fit_paired_null(ratio, np.full(300, 100.0), np.full(300, 100.0))


def test_variance_fit_matches_the_closed_form_likelihood():
    """With one indicator column per group the normal likelihood's variance is each group's
    mean square (the closed-form maximum-likelihood estimate of a zero-mean normal's variance,
    a textbook result); the fit must reach it."""
    from drift.compare.calibration import _variance_fit

    rng = np.random.default_rng(5)
    group = rng.integers(0, 3, 3000)
    residuals = rng.standard_normal(3000) * np.array([0.5, 1.0, 3.0])[group]
    design = np.column_stack([group == g for g in range(3)]).astype(float)
    fitted = np.exp(_variance_fit(design, residuals))
    expected = [np.mean(residuals[group == g] ** 2) for g in range(3)]
    np.testing.assert_allclose(fitted, expected, rtol=1e-4)


def test_paired_null_follows_a_spread_that_rises_steeply_towards_rare_words():
    """The paired ratio's spread grows faster than log-linearly as the count falls (as on the
    calibration benchmark's real shuffled text, README; here its variance gains a term in one
    over the count, as a sampling variance would): the rarest fifth of words keeps its
    level, about 1% of them below p = 0.01 across seeds (binomial bound, scipy.stats.binomtest),
    as do the most frequent fifth."""
    from drift.compare.calibration import fit_paired_null

    rare_below = common_below = rare_total = common_total = 0
    for seed in SEEDS:
        rng = np.random.default_rng(700 + seed)
        ratio, cf, ct, noise, _ = paired_words(rng, 3000)
        xc = frequency_covariate(cf, ct)
        ratio = ratio * np.sqrt(1.0 + 60.0 / np.exp(xc))  # a sampling term, like 1 / count
        null = fit_paired_null(ratio, cf, ct, noise)
        p = null.p_of_z(null.z(ratio, np.minimum(cf, ct), noise))
        rare, common = xc <= np.quantile(xc, 0.2), xc >= np.quantile(xc, 0.8)
        rare_below += int(np.sum(p[rare] <= 0.01))
        rare_total += int(rare.sum())
        common_below += int(np.sum(p[common] <= 0.01))
        common_total += int(common.sum())
    assert stats.binomtest(rare_below, rare_total, 0.01).pvalue > 0.001, rare_below / rare_total
    assert stats.binomtest(common_below, common_total, 0.01).pvalue > 0.001, \
        common_below / common_total


def test_count_matched_z_removes_a_frequency_trend_and_keeps_movers_across_seeds():
    """A trend of z's centre and spread with log count is removed (checked with SciPy's
    Spearman correlation), while planted movers stay far in the tail, on every one of 5 seeds
    (no lucky seed)."""
    for seed in range(5):
        rng = np.random.default_rng(seed)
        count = np.exp(rng.uniform(3, 10, 3000))
        x = np.log(count)
        z = 0.2 * (x - 6.5) + (0.7 + 0.1 * x) * rng.standard_normal(3000)
        z[:10] += 15.0
        fixed = count_matched_z(z, count)
        assert abs(stats.spearmanr(z[10:], x[10:]).statistic) > 0.2
        assert abs(stats.spearmanr(fixed[10:], x[10:]).statistic) < 0.05
        assert 0.9 < np.std(fixed[10:]) < 1.1
        assert (fixed[:10] > 5.0).all()


def test_with_count_matched_drift_recomputes_p_q_and_headline():
    rng = np.random.default_rng(3)
    counts = rng.integers(20, 5000, 600).astype(float)
    values = np.exp(-1.0 - 0.1 * np.log(counts) + 0.2 * rng.standard_normal(600))
    null = fit_null(values, counts, counts)
    table = calibrate(values, counts, counts, noise_null=null, drift_null=null)
    matched = with_count_matched_drift(table, counts, 0.05)
    assert np.allclose(matched["drift_p"], stats.norm.sf(matched["drift_z"]))
    assert np.allclose(matched["p"], np.fmax(matched["noise_p"], matched["drift_p"]))
    assert matched["noise_z"].equals(table["noise_z"])


def _two_class_table(rng: np.random.Generator, wider: float, in_class: int = 300,
                     movers: int = 5) -> tuple[pd.DataFrame, np.ndarray]:
    """Both questions' z for 3,000 words: most N(0, 1), a class of ``in_class`` words
    N(0, wider^2) whose first ``movers`` sit 8 spreads up; p from scipy.stats.norm."""
    z = rng.standard_normal(3000)
    chosen = np.zeros(3000, dtype=bool)
    chosen[:in_class] = True
    z[chosen] *= wider
    z[:movers] = 8.0 * wider
    columns = {}
    for question in ("noise", "drift"):
        columns[f"{question}_z"] = z
        columns[f"{question}_p"] = stats.norm.sf(z)
        columns[f"{question}_q"] = bh_qvalues(stats.norm.sf(z))
    return pd.DataFrame(columns), chosen


def test_with_class_spread_gives_a_wider_class_its_own_spread_across_seeds():
    """A class whose z are 1.5 times as spread as the rest (on the calibration benchmark's
    shuffled text, the words the control models lack: README) is brought back to unit spread:
    its non-movers' false positives at p <= 0.01 match the level (scipy.stats.binomtest over 10
    seeds), p is scipy.stats.norm.sf of the new z, the other words keep theirs, the movers stay
    far in the tail."""
    flagged = total = flagged_before = 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        table, chosen = _two_class_table(rng, wider=1.5)
        out, factors = with_class_spread(table, chosen, 0.05)
        assert 1.3 < factors["noise"] == factors["drift"] < 1.7
        np.testing.assert_allclose(out["noise_p"], stats.norm.sf(out["noise_z"]))
        np.testing.assert_allclose(out["p"], np.fmax(out["noise_p"], out["drift_p"]))
        np.testing.assert_array_equal(out["z"][~chosen], table["noise_z"][~chosen])
        assert (out["z"][:5] > 6.0).all()
        rest = chosen.copy()
        rest[:5] = False
        flagged += int((out["p"][rest] <= 0.01).sum())
        flagged_before += int((table["noise_p"][rest] <= 0.01).sum())
        total += int(rest.sum())
    assert stats.binomtest(flagged, total, 0.01).pvalue > 0.001, flagged / total
    assert flagged_before / total > 0.03  # 1.5 x 2.33 = 3.5 sd: about 5% before


def test_with_class_spread_keeps_a_narrow_or_small_class_as_it_is():
    """A class no wider than the rest is not made more significant, and a class with fewer than
    MIN_CLASS_BELOW z below 0 has no spread of its own (NaN) and keeps its z."""
    rng = np.random.default_rng(7)
    narrow, chosen = _two_class_table(rng, wider=0.8)
    out, factors = with_class_spread(narrow, chosen, 0.05)
    assert factors == {"noise": 1.0, "drift": 1.0}
    np.testing.assert_array_equal(out["noise_z"], narrow["noise_z"])
    small, chosen = _two_class_table(rng, wider=2.0, in_class=40, movers=0)
    assert np.isnan(class_spread(small["noise_z"][chosen]))
    out, factors = with_class_spread(small, chosen, 0.05)
    assert factors == {"noise": 1.0, "drift": 1.0}
    np.testing.assert_array_equal(out["drift_z"], small["drift_z"])
