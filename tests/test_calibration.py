"""Calibration: the frequency-dependent null, z, p and Benjamini-Hochberg q.

The arithmetic is checked on draws from a known null (synthetic numbers with a known centre and
spread per frequency and a skewed gamma shape), against SciPy's reference functions. The same null
on real shuffled text is checked in tests/test_injection.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from drift.calibration import (
    CALIBRATION_COLUMNS,
    calibrate,
    fit_null,
    frequency_covariate,
)
from drift.errors import DriftError

GAMMA_SHAPE = 3.0


def true_centre(log_count: np.ndarray) -> np.ndarray:
    return 0.6 - 0.05 * log_count


def true_spread(log_count: np.ndarray) -> np.ndarray:
    return 0.15 * np.exp(-0.15 * log_count)


def draw_null(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Measures of ``n`` unchanged words: frequency-dependent centre and spread, skewed shape."""
    count_from = np.round(np.exp(rng.uniform(np.log(5), np.log(20000), n)))
    count_to = np.maximum(1, rng.binomial(2 * count_from.astype(int), 0.5))
    x = frequency_covariate(count_from, count_to)
    shape = (rng.gamma(GAMMA_SHAPE, 1.0, n) - GAMMA_SHAPE) / np.sqrt(GAMMA_SHAPE)
    return true_centre(x) + true_spread(x) * shape, count_from, count_to


@pytest.fixture(scope="module")
def control():
    return draw_null(np.random.default_rng(7), 3000)


@pytest.fixture(scope="module")
def fresh_null_words():
    return draw_null(np.random.default_rng(8), 1000)


def test_columns_order_and_length(control, fresh_null_words):
    values, cf, ct = fresh_null_words
    table = calibrate(values, cf, ct, *control)
    assert list(table.columns) == CALIBRATION_COLUMNS
    assert len(table) == len(values)
    # Same order as the input: z recomputed from the returned centre and spread matches row by row.
    np.testing.assert_allclose(table["z"], (values - table["null_centre"]) / table["null_spread"])


def test_q_is_scipy_benjamini_hochberg(control, fresh_null_words):
    values, cf, ct = fresh_null_words
    values = values.copy()
    values[:20] += 1.0  # some real changes so that q is not all ones
    table = calibrate(values, cf, ct, *control)
    # Reference: scipy.stats.false_discovery_control (Benjamini-Hochberg 1995).
    expected = stats.false_discovery_control(table["p"].to_numpy(), method="bh")
    np.testing.assert_allclose(table["q"], expected, rtol=1e-12)
    assert (table["significant"] == (table["q"] <= 0.05)).all()


def test_p_is_uniform_on_a_known_null(control, fresh_null_words):
    table = calibrate(*fresh_null_words, *control)
    # Kolmogorov-Smirnov against the uniform distribution (scipy.stats.kstest).
    assert stats.kstest(table["p"], "uniform").pvalue > 0.01
    # Benjamini-Hochberg at 0.05 on a complete null: at most ~5% flagged (in fact about none).
    assert table["significant"].mean() <= 0.05


def test_null_flags_few_of_its_own_control_words(control):
    null = fit_null(*control)
    assert null.control_flagged <= 0.05 * len(control[0])
    assert null.describe()["control_flagged"] == null.control_flagged


def test_planted_change_gets_tiny_p(control, fresh_null_words):
    values, cf, ct = (a.copy() for a in fresh_null_words)
    x = frequency_covariate(cf[0], ct[0])
    values[0] = true_centre(x) + 12 * true_spread(x)
    table = calibrate(values, cf, ct, *control)
    # 3000 control words: an empirical p could not go below 1/3001; the fitted tail can.
    assert table["p"].iloc[0] < 1e-5
    assert table["significant"].iloc[0]
    assert table["p"].iloc[0] == table["p"].min()


def test_null_is_frequency_matched(control):
    rare, frequent = 10.0, 5000.0
    x_rare = np.log(rare)
    # A value typical of rare words (one spread above their centre) is unremarkable for a rare
    # word and extreme for a frequent one.
    value = true_centre(x_rare) + true_spread(x_rare)
    table = calibrate([value, value], [rare, frequent], [rare, frequent], *control)
    assert table["p"].iloc[0] > 0.05
    assert table["p"].iloc[1] < 1e-4


def test_quantile_follows_the_true_null(control):
    null = fit_null(*control)
    counts = np.array([20.0, 200.0, 2000.0])
    x = np.log(counts)
    gamma_q95 = (stats.gamma.ppf(0.95, GAMMA_SHAPE) - GAMMA_SHAPE) / np.sqrt(GAMMA_SHAPE)
    expected = true_centre(x) + true_spread(x) * gamma_q95
    np.testing.assert_allclose(null.quantile(counts, 0.95), expected, rtol=0.08)
    assert np.all(np.diff(null.quantile(counts, 0.95)) < 0)
    # The band beyond the control's frequency range is held constant, not extrapolated.
    assert null.quantile(1e9, 0.95) == pytest.approx(null.quantile(1e7, 0.95)[()])


def test_words_without_a_measure_are_not_significant(control):
    table = calibrate([np.nan, 5.0], [100, 100], [100, 100], *control)
    assert np.isnan(table["p"].iloc[0]) and np.isnan(table["q"].iloc[0])
    assert not table["significant"].iloc[0]
    assert table["significant"].iloc[1]


def test_small_control_still_gives_a_tail(control):
    values, cf, ct = (a[:80] for a in control)
    null = fit_null(values, cf, ct)
    assert null.tail == "pareto"
    assert null.residual_p(np.array([20.0]))[0] < 1e-6


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(alpha=0.0), "--alpha"),
        (dict(alpha=1.5), "--alpha"),
        (dict(control_values=np.arange(10.0)), "differ in length"),
        (dict(count_from=[-1.0]), "negative"),
    ],
)
def test_bad_input_is_a_plain_error(control, kwargs, message):
    cv, ccf, cct = control
    arguments = dict(
        values=[0.5],
        count_from=[100.0],
        count_to=[100.0],
        control_values=cv,
        control_count_from=ccf,
        control_count_to=cct,
    )
    arguments.update(kwargs)
    with pytest.raises(DriftError, match=message):
        calibrate(**arguments)


def test_too_few_control_words_is_a_plain_error(control):
    cv, ccf, cct = (a[:10] for a in control)
    with pytest.raises(DriftError, match="only 10 measured words"):
        fit_null(cv, ccf, cct)


def test_constant_control_is_a_plain_error():
    with pytest.raises(DriftError, match="same measure"):
        fit_null(np.ones(100), np.full(100, 50.0), np.full(100, 50.0))


def test_bad_quantile_is_a_plain_error(control):
    with pytest.raises(DriftError, match="0 < q < 1"):
        fit_null(*control).quantile(100, q=1.0)


def test_tied_measure_gives_a_sane_null():
    """Neighbour turnover is a Jaccard distance of top-k sets: few distinct values and most rare
    words at exactly 1.0, so the median absolute deviation of a bin is often 0."""
    rng = np.random.default_rng(3)
    counts = np.round(np.exp(rng.uniform(np.log(20), np.log(3000), 3000)))
    k = 10
    stay = np.clip(0.12 * np.log(counts) - 0.35, 0.0, 0.9)  # chance a neighbour stays

    def draw_turnover():
        shared = rng.binomial(k, stay)
        return 1.0 - shared / (2 * k - shared)

    turnover = draw_turnover()
    null = fit_null(turnover, counts, counts)
    band = null.quantile(np.array([20.0, 200.0, 2000.0]), 0.5)
    assert np.all((band >= 0.0) & (band <= 1.0))
    assert np.all(np.isfinite(null.spread_on_grid)) and np.all(null.spread_on_grid > 1e-3)
    fresh = draw_turnover()
    assert calibrate(fresh, counts, counts, turnover, counts, counts)["significant"].mean() <= 0.05
