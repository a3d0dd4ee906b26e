"""Change points: the mean-shift statistic of a word's timeline (after Kulkarni et al. 2015)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from drift.changepoint import change_points, mean_shifts, standardise_by_slice


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


def test_planted_step_is_found_among_noisy_words():
    rng = np.random.default_rng(1)
    n_words, n_slices = 200, 6
    series = 0.3 + 0.03 * rng.standard_normal((n_words, n_slices))
    series[:, 0] = 0.0  # the reference slice
    series[:10, 4:] += 0.4  # ten words change between slices 3 and 4
    position, step = change_points(series)
    assert np.all(position[:10] == 4)
    # Timeline 0, .3, .3, .3, .7, .7: step = 0.7 - mean(0, .3, .3, .3) = 0.475.
    np.testing.assert_allclose(step[:10], 0.475, atol=0.08)
    # Without standardising by slice, the reference slice (always 0) would pull stable words'
    # change points to slice 1; standardised, the stable words spread over all boundaries.
    raw_position, _ = change_points(series, standardise=False)
    assert np.mean(raw_position[10:] == 1) > 0.9
    assert np.mean(position[10:] == 1) < 0.5


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
