"""When did a word change? The mean-shift change point of its timeline.

A word's timeline is its distance from the reference slice in every slice, in time order. The
change point is the boundary that best splits the timeline into a before and an after: for each
boundary ``j`` (between slice ``j`` and slice ``j + 1``) the mean-shift statistic is the mean of
the values after minus the mean of the values up to ``j`` (after Kulkarni, Al-Rfou, Perozzi and
Skiena 2015). As in that work, the boundary is chosen on timelines standardised per slice across
all words, so that a slice in which every word looks far away (a small slice, or the reference
itself at distance 0) does not pull every word's change point towards it; the step reported is
the mean shift in the raw distances at the chosen boundary. The boundary with the largest
absolute shift wins (the earliest on a tie).

Missing values (a word absent from a slice) are left out of both means; a boundary is only
considered when the slice right after it has a value and both sides have at least one value.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import pandas as pd


def standardise_by_slice(series: np.ndarray) -> np.ndarray:
    """Each column (slice) minus its mean over words, divided by its standard deviation.

    A column without spread (e.g. the reference slice, 0 for every word) becomes 0.
    """
    series = np.asarray(series, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        centre = np.nanmean(series, axis=0)
        spread = np.nanstd(series, axis=0)
    # Spread at rounding level (a constant column) counts as none.
    flat = ~np.isfinite(spread) | (spread <= 1e-9 * np.maximum(1.0, np.abs(centre)))
    spread = np.where(flat, np.inf, spread)
    return (series - centre) / spread


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


def change_points(series: np.ndarray, standardise: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """The change point of every row of ``series`` (words x slices, time order).

    Returns the position of the first slice after the change (-1 where no boundary is allowed)
    and the step (mean after minus mean before, in the units of ``series``; NaN with no change
    point). With ``standardise`` the boundary is chosen on :func:`standardise_by_slice` values.
    """
    series = np.asarray(series, dtype=np.float64)
    n_words = series.shape[0]
    position = np.full(n_words, -1, dtype=np.int64)
    step = np.full(n_words, np.nan)
    if series.ndim != 2 or series.shape[1] < 2:
        return position, step
    raw = mean_shifts(series)
    chooser = mean_shifts(standardise_by_slice(series)) if standardise else raw
    has_any = np.isfinite(chooser).any(axis=1)
    best = np.argmax(np.where(np.isfinite(chooser), np.abs(chooser), -1.0), axis=1)
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
