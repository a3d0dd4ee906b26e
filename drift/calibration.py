"""Calibrated significance: a frequency-dependent null from the time-shuffled control pair.

The control pair (the two compared slices pooled and split again at random) has no real change,
so its measures, as a function of word frequency, are the null. Frequency confounds every
embedding measure: rare words look more shifted (Dubossarsky et al. 2017), so each word is judged
against control words of its own frequency.

How the null is built (:func:`fit_null`):

1. Covariate: ``log(min(count_from, count_to))``, the log count of the word in the *rarer* of the
   two slices. A vector's noise is set by how many occurrences trained it, and a word is only as
   stable as its less frequent side: a word seen 5,000 times in one slice and 40 times in the
   other is as noisy as a 40-count word. The geometric mean would rate that word as a 450-count
   word, underestimate its noise, and flag words whose frequency alone fell. Raw counts, not
   counts per million, because the control slices have the same sizes as the compared slices and
   what sets the noise is the number of training occurrences.
2. Centre and spread: control words are grouped into bins of roughly equal size along the
   covariate; each bin gives a median and a scaled median absolute deviation (robust to the odd
   control word that moved). A smoothing spline (``scipy.interpolate.make_smoothing_spline``,
   smoothing chosen by generalised cross-validation) runs through the bin medians and through the
   log of the bin spreads, so both vary smoothly with frequency; the curves never leave the range
   of the bins' own statistics, and beyond the control's frequency range they are held constant.
3. Tail: the standardised control residuals ``r = (value - centre) / spread`` give the null's
   shape. An empirical p from a few hundred control words cannot go below ``1/(n+1)``, which no
   Benjamini-Hochberg correction over thousands of words lets through, so above the 80th
   percentile of ``r`` (lower for a small control, so that about 30 points remain) the tail is
   a generalised Pareto distribution fitted to the exceedances (peaks over threshold; the same
   remedy for permutation p-values is described by Knijnenburg et al. 2009, Bioinformatics,
   recalled from memory). A fitted shape below zero (a bounded tail)
   is replaced by zero, an exponential tail, which never assigns p = 0 and errs towards larger p.
   Below the threshold p is the empirical share of control residuals at least as large. With
   fewer than 20 exceedances the tail is a standard normal on ``r`` instead.
4. p is one-sided (larger than the null means more change); q is the Benjamini-Hochberg
   adjustment (``scipy.stats.false_discovery_control``) over every word with a measure; a word is
   significant when ``q <= alpha``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import interpolate, stats

from drift.errors import DriftError

#: Fewer measured control words than this cannot give a null worth the name.
MIN_CONTROL_WORDS = 50
#: Control words per frequency bin (the bins only feed the smooth curves).
WORDS_PER_BIN = 60
MAX_BINS = 30
#: Share of control residuals above the tail threshold (peaks over threshold); a small control
#: lowers the threshold so that the tail fit still has about TAIL_POINTS exceedances.
TAIL_SHARE = 0.20
TAIL_POINTS = 30
MAX_TAIL_SHARE = 0.5
#: Fewer exceedances than this: a normal tail instead of a fitted generalised Pareto tail.
MIN_TAIL_POINTS = 20
#: Scale that turns a median absolute deviation into a standard deviation for normal data.
MAD_TO_SD = 1.4826
#: The same for a mean absolute deviation (sqrt(pi / 2)).
MEAN_AD_TO_SD = 1.2533
#: No bin's spread may fall below this share of the spread of all control values.
SPREAD_FLOOR = 0.05
#: Points of the grid on which the smooth centre and spread curves are stored.
GRID_POINTS = 256

CALIBRATION_COLUMNS = ["null_centre", "null_spread", "z", "p", "q", "significant"]


def frequency_covariate(count_from: Any, count_to: Any) -> np.ndarray:
    """``log(min(count_from, count_to))``, counts below 1 treated as 1 (see the module notes)."""
    rarer = np.minimum(np.asarray(count_from, dtype=float), np.asarray(count_to, dtype=float))
    return np.log(np.maximum(rarer, 1.0))


def _check_alpha(alpha: float) -> None:
    if not 0.0 < float(alpha) < 1.0:
        raise DriftError(f"--alpha must lie strictly between 0 and 1 (got {alpha}); use e.g. 0.05.")


def _as_arrays(
    values: Any, count_from: Any, count_to: Any, what: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    vals = np.asarray(values, dtype=float).ravel()
    cf = np.asarray(count_from, dtype=float).ravel()
    ct = np.asarray(count_to, dtype=float).ravel()
    if not len(vals) == len(cf) == len(ct):
        raise DriftError(
            f"The {what} measures and counts differ in length ({len(vals)}, {len(cf)}, {len(ct)}); "
            "pass one value and one pair of counts per word."
        )
    if np.any(cf[np.isfinite(cf)] < 0) or np.any(ct[np.isfinite(ct)] < 0):
        raise DriftError(f"The {what} word counts include negative numbers; counts must be >= 0.")
    return vals, cf, ct


def _frequency_bins(covariate: np.ndarray) -> list[np.ndarray]:
    """Indices of roughly equal-size bins along ``covariate``; ties never straddle two bins."""
    order = np.argsort(covariate, kind="stable")
    ordered = covariate[order]
    n_bins = int(np.clip(len(ordered) // WORDS_PER_BIN, 1, MAX_BINS))
    target = len(ordered) / n_bins
    cuts = [0]
    for i in range(1, len(ordered)):
        if i - cuts[-1] >= target and ordered[i] != ordered[i - 1]:
            cuts.append(i)
    cuts.append(len(ordered))
    if len(cuts) > 2 and cuts[-1] - cuts[-2] < target / 2:
        del cuts[-2]  # fold a small last bin into the one before
    return [order[a:b] for a, b in zip(cuts[:-1], cuts[1:], strict=True)]


def robust_spread(values: np.ndarray) -> float:
    """Scaled median absolute deviation; where over half the values tie (MAD 0, as happens with
    neighbour turnover), the scaled mean absolute deviation from the median instead. Both
    estimate the standard deviation of normal data (factors 1.4826 and sqrt(pi/2) = 1.2533)."""
    mad = MAD_TO_SD * float(stats.median_abs_deviation(values))
    if mad > 0:
        return mad
    return MEAN_AD_TO_SD * float(np.mean(np.abs(values - np.median(values))))


def _smooth_curve(x: np.ndarray, y: np.ndarray, weight: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """A smooth curve through the bin statistics, evaluated on ``grid`` (inside the bins' range)."""
    if len(x) >= 5:
        spline = interpolate.make_smoothing_spline(x, y, w=weight / weight.mean())
        return np.asarray(spline(grid), dtype=float)
    if len(x) >= 2:
        slope, intercept = np.polyfit(x, y, deg=1, w=np.sqrt(weight))
        return slope * grid + intercept
    return np.full_like(grid, y[0], dtype=float)


def _fit_pareto_tail(exceedances: np.ndarray) -> tuple[float, float]:
    """(shape, scale) of a generalised Pareto fit to ``exceedances``; shape < 0 becomes 0."""
    mean_excess = float(np.mean(exceedances))
    try:
        shape, _, scale = stats.genpareto.fit(exceedances, floc=0.0)
    except (ValueError, RuntimeError, FloatingPointError):
        return 0.0, mean_excess
    if not (np.isfinite(shape) and np.isfinite(scale) and scale > 0) or shape < 0:
        return 0.0, mean_excess  # exponential tail: no upper end point, p never 0
    return float(shape), float(scale)


@dataclass(frozen=True)
class FrequencyNull:
    """The fitted null: centre and spread as smooth functions of log count, and a tail for p.

    ``count`` arguments are the word's count in the rarer of the two compared slices (use
    :func:`frequency_covariate` on a pair of counts, or pass ``count_from`` and ``count_to``).
    """

    grid: np.ndarray
    centre_on_grid: np.ndarray
    spread_on_grid: np.ndarray
    residuals: np.ndarray  # sorted standardised control residuals
    tail: str  # "pareto" or "normal"
    threshold: float
    tail_share: float
    tail_shape: float
    tail_scale: float
    control_words: int
    alpha: float
    control_flagged: int = field(default=0)

    # -------------------------------------------------------------- centre and spread
    def centre_at(self, covariate: Any) -> np.ndarray:
        return np.interp(np.asarray(covariate, dtype=float), self.grid, self.centre_on_grid)

    def spread_at(self, covariate: Any) -> np.ndarray:
        return np.interp(np.asarray(covariate, dtype=float), self.grid, self.spread_on_grid)

    def quantile(self, count: Any, q: float = 0.95) -> np.ndarray:
        """The null's ``q`` quantile of the measure for words of ``count`` (the chart's band)."""
        if not 0.0 < q < 1.0:
            raise DriftError(f"A null quantile needs 0 < q < 1 (got {q}).")
        covariate = np.log(np.maximum(np.asarray(count, dtype=float), 1.0))
        return self.centre_at(covariate) + self.spread_at(covariate) * self.residual_quantile(q)

    # -------------------------------------------------------------- tail
    def residual_quantile(self, q: float) -> float:
        """Quantile ``q`` of the standardised null residual."""
        if self.tail == "normal":
            return float(stats.norm.ppf(q))
        if q <= 1.0 - self.tail_share:
            return float(np.quantile(self.residuals, q))
        inner = 1.0 - (1.0 - q) / self.tail_share
        return self.threshold + float(
            stats.genpareto.ppf(inner, self.tail_shape, scale=self.tail_scale)
        )

    def residual_p(self, z: np.ndarray) -> np.ndarray:
        """One-sided p of standardised residuals ``z`` under the null (NaN stays NaN)."""
        z = np.asarray(z, dtype=float)
        p = np.full(z.shape, np.nan)
        finite = np.isfinite(z)
        if self.tail == "normal":
            p[finite] = stats.norm.sf(z[finite])
            return p
        n = len(self.residuals)
        at_least = n - np.searchsorted(self.residuals, z[finite], side="left")
        body = (1.0 + at_least) / (n + 1.0)
        upper = self.tail_share * stats.genpareto.sf(
            z[finite] - self.threshold, self.tail_shape, scale=self.tail_scale
        )
        p[finite] = np.where(z[finite] > self.threshold, upper, body)
        return np.clip(p, np.finfo(float).tiny, 1.0)

    # -------------------------------------------------------------- scoring
    def score(
        self, values: Any, count_from: Any, count_to: Any, alpha: float | None = None
    ) -> pd.DataFrame:
        """Columns null_centre, null_spread, z, p, q, significant; one row per value, same order.

        A word without a finite measure gets NaN statistics and is not significant; q is the
        Benjamini-Hochberg adjustment over the words that have a measure.
        """
        alpha = self.alpha if alpha is None else alpha
        _check_alpha(alpha)
        vals, cf, ct = _as_arrays(values, count_from, count_to, "word")
        covariate = frequency_covariate(cf, ct)
        centre = self.centre_at(covariate)
        spread = self.spread_at(covariate)
        z = (vals - centre) / spread
        p = self.residual_p(z)
        q = np.full(len(p), np.nan)
        finite = np.isfinite(p)
        if finite.any():
            q[finite] = stats.false_discovery_control(p[finite], method="bh")
        significant = np.zeros(len(p), dtype=bool)
        significant[finite] = q[finite] <= alpha
        return pd.DataFrame(
            {
                "null_centre": centre,
                "null_spread": spread,
                "z": z,
                "p": p,
                "q": q,
                "significant": significant,
            }
        )

    def flagged(self, values: Any, count_from: Any, count_to: Any, alpha: float) -> int:
        """How many of the given words come out significant at ``alpha``."""
        return int(self.score(values, count_from, count_to, alpha)["significant"].sum())

    def describe(self) -> dict[str, Any]:
        """A small JSON-able summary for run.json."""
        return {
            "covariate": "log(min(count_from, count_to))",
            "control_words": self.control_words,
            "tail": self.tail,
            "tail_threshold": round(self.threshold, 6),
            "tail_share": round(self.tail_share, 6),
            "tail_shape": round(self.tail_shape, 6),
            "tail_scale": round(self.tail_scale, 6),
            "alpha": self.alpha,
            "control_flagged": self.control_flagged,
        }


def fit_null(
    control_values: Any,
    control_count_from: Any,
    control_count_to: Any,
    alpha: float = 0.05,
) -> FrequencyNull:
    """Fit the frequency-dependent null to the control pair's measures (see the module notes).

    ``control_flagged`` on the result counts the control words that the null itself flags at
    ``alpha`` (about zero when the null is calibrated).
    """
    _check_alpha(alpha)
    vals, cf, ct = _as_arrays(control_values, control_count_from, control_count_to, "control")
    keep = np.isfinite(vals) & np.isfinite(cf) & np.isfinite(ct)
    vals, cf, ct = vals[keep], cf[keep], ct[keep]
    if len(vals) < MIN_CONTROL_WORDS:
        raise DriftError(
            f"The control pair has only {len(vals)} measured words (at least {MIN_CONTROL_WORDS} "
            "are needed for a null); use more text per slice or a lower --min-count."
        )
    if np.ptp(vals) == 0:
        raise DriftError(
            "Every control word has the same measure, so no null can be fitted; "
            "check that the control models were trained on text."
        )
    covariate = frequency_covariate(cf, ct)
    bins = _frequency_bins(covariate)
    bin_x = np.array([np.median(covariate[b]) for b in bins])
    bin_centre = np.array([np.median(vals[b]) for b in bins])
    bin_size = np.array([len(b) for b in bins], dtype=float)
    floor = max(SPREAD_FLOOR * robust_spread(vals), 1e-12)
    bin_spread = np.maximum([robust_spread(vals[b]) for b in bins], floor)

    grid = np.linspace(bin_x[0], bin_x[-1], GRID_POINTS) if len(bins) > 1 else bin_x.copy()
    # The smooth curves may not overshoot the range of the bins' own statistics.
    centre_on_grid = np.clip(
        _smooth_curve(bin_x, bin_centre, bin_size, grid), bin_centre.min(), bin_centre.max()
    )
    log_spread = np.log(bin_spread)
    log_spread_on_grid = _smooth_curve(bin_x, log_spread, bin_size, grid)
    spread_on_grid = np.exp(np.clip(log_spread_on_grid, log_spread.min(), log_spread.max()))

    centre = np.interp(covariate, grid, centre_on_grid)
    residuals = np.sort((vals - centre) / np.interp(covariate, grid, spread_on_grid))
    tail_share = float(np.clip(TAIL_POINTS / len(residuals), TAIL_SHARE, MAX_TAIL_SHARE))
    threshold = float(np.quantile(residuals, 1.0 - tail_share))
    exceedances = residuals[residuals > threshold] - threshold
    if len(exceedances) >= MIN_TAIL_POINTS:
        tail, share = "pareto", len(exceedances) / len(residuals)
        shape, scale = _fit_pareto_tail(exceedances)
    else:
        tail, share, shape, scale = "normal", 0.0, 0.0, 1.0
    null = FrequencyNull(
        grid=grid,
        centre_on_grid=centre_on_grid,
        spread_on_grid=spread_on_grid,
        residuals=residuals,
        tail=tail,
        threshold=threshold,
        tail_share=share,
        tail_shape=shape,
        tail_scale=scale,
        control_words=len(vals),
        alpha=float(alpha),
    )
    flagged = null.flagged(vals, cf, ct, alpha)
    return dataclasses.replace(null, control_flagged=flagged)


def calibrate(
    values: Sequence[float] | np.ndarray | pd.Series,
    count_from: Sequence[float] | np.ndarray | pd.Series,
    count_to: Sequence[float] | np.ndarray | pd.Series,
    control_values: Sequence[float] | np.ndarray | pd.Series,
    control_count_from: Sequence[float] | np.ndarray | pd.Series,
    control_count_to: Sequence[float] | np.ndarray | pd.Series,
    alpha: float = 0.05,
) -> pd.DataFrame:
    """Fit the null to the control and score ``values``: null_centre, null_spread, z, p, q,
    significant, one row per entry of ``values`` in the same order (index 0..n-1).

    Use :func:`fit_null` and :meth:`FrequencyNull.score` to keep the null (for the chart's band,
    :meth:`FrequencyNull.quantile`, and ``control_flagged``).
    """
    null = fit_null(control_values, control_count_from, control_count_to, alpha=alpha)
    return null.score(values, count_from, count_to, alpha)
