"""When did a word change? The mean-shift change point of its timeline.

A word's timeline is its distance from the reference slice in every slice, in time order. The
change point is the boundary that best splits the timeline into a before and an after: for each
boundary ``j`` (between slice ``j`` and slice ``j + 1``) the mean shift is the mean of the values
after minus the mean of the values up to ``j`` (after Kulkarni, Al-Rfou, Perozzi and Skiena 2015).
As in that work, the boundary is chosen on timelines standardised per slice across all words, so
that a slice in which every word looks far away (a small slice, or the reference itself at
distance 0) does not pull every word's change point towards it. Two refinements:

- the standardisation is robust (each slice's median and normal-scaled median absolute
  deviation over words), so that the words that did move in a slice do not widen its spread and
  shrink their own step (with the standard deviation, 10 of 200 words stepping 13 noise
  spreads were standardised to about 4, and 5 of 200 such steps were placed one slice early);
- the boundary is chosen by least squares: the mean shift times ``sqrt(B * A / (B + A))``
  (:func:`boundary_statistic`), the split that best fits a single change in mean. The raw mean
  shift of a boundary near the end averages fewer slices, so it is noisier, and on pure noise
  it drew about 41% of all change points to the last of five boundaries; the least-squares
  statistic has the same variance at every boundary, and draws at most 30% to any one (the
  ends keep a small pull, as a single-change statistic's ends do). The reference slice counts
  as one value among the others, so a word that moved right after it is placed there.

The step reported is the mean shift in the raw distances at the chosen boundary. The boundary
with the largest absolute statistic wins (the earliest on a tie). Missing values (a word absent
from a slice) are left out of both means; a boundary is only considered when the slice right
after it has a value and both sides have at least one value.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats


def slice_centre_and_spread(series: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each column's (slice's) median over words and its normal-scaled median absolute
    deviation; a column without spread (e.g. the reference slice, 0 for every word) gets an
    infinite spread, so that it standardises to 0."""
    series = np.asarray(series, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        centre = np.nanmedian(series, axis=0)
        spread = stats.median_abs_deviation(series, axis=0, nan_policy="omit", scale="normal")
    spread = np.asarray(spread, dtype=np.float64)
    # Spread at rounding level (a constant column) counts as none.
    flat = ~np.isfinite(spread) | (spread <= 1e-9 * np.maximum(1.0, np.abs(centre)))
    return np.nan_to_num(centre), np.where(flat, np.inf, spread)


def standardise_by_slice(series: np.ndarray) -> np.ndarray:
    """Each column (slice) minus its median over words, divided by its robust spread
    (:func:`slice_centre_and_spread`). A column without spread becomes 0."""
    centre, spread = slice_centre_and_spread(series)
    return (np.asarray(series, dtype=np.float64) - centre) / spread


def mean_shifts(series: np.ndarray) -> np.ndarray:
    """Mean after minus mean up to each boundary: words x (slices - 1), NaN where not allowed."""
    series = np.asarray(series, dtype=np.float64)
    observed = np.isfinite(series)
    values = np.where(observed, series, 0.0)
    sum_before = np.cumsum(values, axis=1)[:, :-1]
    count_before = np.cumsum(observed, axis=1)[:, :-1]
    sum_after = values.sum(axis=1, keepdims=True) - sum_before
    count_after = observed.sum(axis=1, keepdims=True) - count_before
    allowed = (count_before > 0) & (count_after > 0) & observed[:, 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = sum_after / count_after - sum_before / count_before
    return np.where(allowed, shift, np.nan)


def boundary_statistic(standardised: np.ndarray) -> np.ndarray:
    """The least-squares change statistic of standardised timelines: each boundary's mean shift
    times ``sqrt(B * A / (B + A))`` (B and A observed values before and after it); words x
    (slices - 1), NaN where not allowed.

    Its square is how much splitting the timeline there lowers the sum of squared deviations
    from the mean, so its largest absolute value is the least-squares (for normal noise,
    maximum-likelihood) place of a single change in mean (Hinkley 1970, from memory). On pure
    noise of equal variance every boundary's value has variance 1.
    """
    standardised = np.asarray(standardised, dtype=np.float64)
    observed = np.isfinite(standardised)
    count_before = np.cumsum(observed, axis=1)[:, :-1]
    count_after = observed.sum(axis=1, keepdims=True) - count_before
    with np.errstate(invalid="ignore", divide="ignore"):
        weight = np.sqrt(count_before * count_after / (count_before + count_after))
    return mean_shifts(standardised) * weight


def best_boundary(chooser: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per row, the index of the boundary with the largest absolute value (the earliest on a
    tie) and whether the row has any allowed boundary."""
    usable = np.isfinite(chooser).any(axis=1)
    best = np.argmax(np.where(np.isfinite(chooser), np.abs(chooser), -1.0), axis=1)
    return best, usable


def change_points(series: np.ndarray, standardise: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """The change point of every row of ``series`` (words x slices, time order).

    Returns the position of the first slice after the change (-1 where no boundary is allowed)
    and the step (mean after minus mean before, in the units of ``series``; NaN with no change
    point). With ``standardise`` the boundary is chosen by :func:`boundary_statistic` of the
    :func:`standardise_by_slice` values; without, by the raw mean shift.
    """
    series = np.asarray(series, dtype=np.float64)
    n_words = series.shape[0]
    position = np.full(n_words, -1, dtype=np.int64)
    step = np.full(n_words, np.nan)
    if series.ndim != 2 or series.shape[1] < 2:
        return position, step
    raw = mean_shifts(series)
    chooser = boundary_statistic(standardise_by_slice(series)) if standardise else raw
    best, has_any = best_boundary(chooser)
    rows = np.flatnonzero(has_any)
    position[rows] = best[rows] + 1
    step[rows] = raw[rows, best[rows]]
    return position, step


# ------------------------------------------------------------- when a change point is shown


def is_significant(value: object) -> bool:
    """True only for a significant verdict; missing (no null to decide it) counts as not."""
    try:
        return bool(value is not None and not pd.isna(value) and value)
    except (TypeError, ValueError):
        return False


def change_warranted(row: Any, n_slices: int | None = None) -> bool:
    """A change point is shown only for a significant word whose step is positive (it moved
    away, not back), on a run of more than two slices (``n_slices``; None: not checked, a run of
    two slices has no change point anyway). ``row``: a mapping with ``significant``,
    ``change_point`` and ``change_step``.

    >>> change_warranted({"significant": True, "change_point": "1980s", "change_step": 0.4})
    True
    >>> change_warranted({"significant": False, "change_point": "1980s", "change_step": 0.4})
    False
    """
    if row is None or (n_slices is not None and n_slices <= 2) or not is_significant(
        row.get("significant")
    ):
        return False
    point, step = row.get("change_point"), row.get("change_step")
    return (isinstance(point, str) and point != "" and step is not None
            and bool(np.isfinite(float(step))) and float(step) > 0)
