"""Change points: the mean-shift statistic of a word's timeline (after Kulkarni et al. 2015)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from drift.compare.changepoint import change_points, mean_shifts, standardise_by_slice


def _mean_shifts_by_loop(series):
    """The statistic written out: K(j) = mean(x[j+1:]) - mean(x[:j+1]) over observed values."""
    out = np.full((series.shape[0], series.shape[1] - 1), np.nan)
    for w, row in enumerate(series):
        for j in range(len(row) - 1):
            before, after = row[: j + 1], row[j + 1 :]
            before, after = before[np.isfinite(before)], after[np.isfinite(after)]
            if len(before) and len(after) and np.isfinite(row[j + 1]):
                out[w, j] = after.mean() - before.mean()
    return out


def test_mean_shifts_equal_the_definition():
    rng = np.random.default_rng(0)
    series = rng.random((30, 6))
    series[rng.random(series.shape) < 0.2] = np.nan
    np.testing.assert_allclose(mean_shifts(series), _mean_shifts_by_loop(series), equal_nan=True)


SEEDS = range(20)


def _planted(seed: int, planted: int = 10) -> np.ndarray:
    """200 words x 6 slices of noise (sd 0.03) around 0.3, the reference slice at 0; the first
    ``planted`` words step up by 0.4 between slices 3 and 4 (13 sd of the noise)."""
    rng = np.random.default_rng(seed)
    series = 0.3 + 0.03 * rng.standard_normal((200, 6))
    series[:, 0] = 0.0
    series[:planted, 4:] += 0.4
    return series


def test_planted_step_is_found_among_noisy_words():
    """Over 20 noise draws (no lucky seed): the planted words' change point and step, and the
    reason for standardising by slice."""
    placed, raw_at_first, at_first = [], [], []
    for seed in SEEDS:
        series = _planted(seed)
        position, step = change_points(series)
        right = position[:10] == 4
        placed.append(right)
        # Timeline 0, .3, .3, .3, .7, .7: step = 0.7 - mean(0, .3, .3, .3) = 0.475 by hand; the
        # noise of that difference of means has sd 0.03 * sqrt(1/2 + 1/4) = 0.026: +-0.13 is 5 sd.
        np.testing.assert_allclose(step[:10][right], 0.475, atol=0.13)
        # Without standardising by slice, the reference slice (always 0) pulls stable words'
        # change points to slice 1; standardised, it does not.
        raw_at_first.append(np.mean(change_points(series, standardise=False)[0][10:] == 1))
        at_first.append(np.mean(position[10:] == 1))
    assert min(raw_at_first) > 0.9
    assert max(at_first) < 0.5
    # Most planted words are placed right (every one: the next test).
    assert np.mean(np.concatenate(placed)) > 0.9


def test_every_planted_step_is_placed_where_it_was_planted():
    """Over 20 noise draws, each of the 10 planted 13-sd steps is placed at its own boundary (with
    a standard-deviation standardisation, the movers widened their slices' spread and 5 of 200
    were placed one slice early)."""
    misplaced = sum(int(np.sum(change_points(_planted(seed))[0][:10] != 4)) for seed in SEEDS)
    assert misplaced == 0


def test_stable_words_spread_over_the_boundaries_across_seeds():
    """Pure noise after standardising: no boundary should attract the change points. Over 20
    seeds x 200 words, the share at any one of the 5 boundaries must stay below 0.3: under a
    uniform spread (0.2) the binomial tail (scipy.stats.binom) of 0.3 x 4,000 is below 1e-40."""
    from scipy.stats import binom

    found = np.concatenate([change_points(_planted(seed, planted=0))[0] for seed in SEEDS])
    assert binom.sf(int(0.3 * found.size), found.size, 0.2) < 1e-40
    shares = [float(np.mean(found == boundary)) for boundary in range(1, 6)]
    assert max(shares) < 0.3, shares


def test_missing_slices_are_skipped():
    series = np.array([[0.0, np.nan, 0.2, 0.9, 0.9], [0.0, 0.1, 0.1, np.nan, np.nan]])
    position, step = change_points(series, standardise=False)
    assert position[0] == 3
    assert step[0] == pytest.approx(0.9 - 0.1)
    assert position[1] in (1, 2)


def test_no_boundary_without_two_observed_slices():
    position, step = change_points(np.array([[0.2, np.nan, np.nan], [0.1, 0.2, 0.3]]))
    assert position[0] == -1 and np.isnan(step[0])
    assert position[1] >= 1
    single_position, _ = change_points(np.array([[0.3], [0.4]]))
    assert (single_position == -1).all()


def test_column_without_spread_standardises_to_zero():
    z = standardise_by_slice(np.array([[0.0, 0.5], [0.0, 0.7], [0.0, 0.9]]))
    np.testing.assert_allclose(z[:, 0], 0.0)
    np.testing.assert_allclose(z[:, 1].mean(), 0.0, atol=1e-12)


@settings(max_examples=40, deadline=None)
@given(
    arrays(np.float64, (12, 5), elements=st.floats(0, 1)),
    arrays(np.float64, (5,), elements=st.floats(-0.5, 0.5)),
)
def test_slice_wide_offsets_do_not_move_change_points(series, offsets):
    # Property: adding the same constant to every word in a slice (a slice where everything
    # looks further away) leaves the statistic that chooses the boundary unchanged.
    base = mean_shifts(standardise_by_slice(series))
    shifted = mean_shifts(standardise_by_slice(series + offsets))
    np.testing.assert_allclose(base, shifted, atol=1e-6)


def test_boundary_statistic_has_unit_variance_under_pure_noise():
    """Standard normal timelines: at every boundary the least-squares statistic has variance 1,
    which the mean shift alone does not (its variance is 1/B + 1/A, a textbook sum of two
    means' variances). Checked with scipy.stats.chi2 on 20,000 rows: the sum of squares of a
    unit-variance normal sample lies inside the two-sided 0.1% range."""
    from scipy.stats import chi2

    from drift.compare.changepoint import boundary_statistic

    rng = np.random.default_rng(11)
    rows = 20_000
    series = rng.standard_normal((rows, 6))
    statistic = boundary_statistic(series)
    low, high = chi2.ppf([0.0005, 0.9995], rows)
    for column in range(statistic.shape[1]):
        assert low < float(np.sum(statistic[:, column] ** 2)) < high, column
    raw = mean_shifts(series)
    assert np.var(raw[:, -1]) > 1.3 * np.var(raw[:, 2])  # the unscaled shift's ends are noisier


def test_the_boundary_minimises_the_squared_error_of_a_two_mean_fit():
    """The chosen boundary is the least-squares split, found here by trying every split with
    numpy (the sum of squared deviations from each side's mean)."""
    from drift.compare.changepoint import best_boundary, boundary_statistic

    rng = np.random.default_rng(3)
    series = np.cumsum(rng.standard_normal((300, 7)), axis=1)
    best, _ = best_boundary(boundary_statistic(series))
    for row, chosen in zip(series, best, strict=True):
        errors = [np.sum((row[: j + 1] - row[: j + 1].mean()) ** 2)
                  + np.sum((row[j + 1:] - row[j + 1:].mean()) ** 2) for j in range(6)]
        assert chosen == int(np.argmin(errors))
