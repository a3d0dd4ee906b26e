"""Calibrated significance: two nulls, two questions, one headline.

Every embedding measure is confounded: rare words look more shifted (Dubossarsky et al. 2017),
and some frequent words too, because their vectors are noisy for reasons of their own (short
generic words used in many unrelated contexts). drift therefore judges each word against words
*like it*, described by two covariates:

- ``log(min(count_from, count_to))``: the log count of the word in the rarer of the two compared
  slices. A vector is only as stable as its less frequent side.
- ``log(seed_noise)``: the word's own optimisation noise, the cosine distance between its
  vectors from two training seeds of the *same* model (aligned by Procrustes over the whole
  vocabulary), the larger of its values in the two compared models (for the control's words:
  in the two control models), averaged over seeds after the first. A word whose vector wanders
  between seeds wanders between slices too, for no reason of meaning. Without two seeds this
  covariate is left out.

A null is a robust regression of ``log(measure)`` on these covariates (:func:`fit_null`; on the
log scale the standardised control residuals of the benchmark were close to normal, skew and
excess kurtosis near 0, while on the measure's own scale they were skewed with a heavy tail): the
centre is a median (least absolute deviation) fit of a quadratic surface of the two covariates,
the spread a median fit of the log absolute residuals on a plane of the same covariates plus a
square of the count (a plane bends less at the edges, where a few movers could otherwise widen
it; the count's square lets the spread rise towards the rarest words, as it does); both are
refitted after discarding points whose standardised residual exceeds ``TRIM_Z``, and the
covariates are winsorised at their 1st and 99th percentiles, so that the words that really
moved, even the most frequent ones, neither pull the centre up nor widen the spread. The spread
is rescaled so that the median absolute standardised residual is that of a standard normal
(0.6745; the paired null's spread, see :func:`fit_paired_null`, is fitted otherwise). Then
``z = (log value - centre) / spread`` and p is one-sided (larger means more change).

The two questions:

1. **noise null** (``noise_z``, ``noise_p``, ``noise_q``): "did the word move beyond sampling and
   optimisation noise?" Judged against the *control pair* (the two compared slices pooled and
   split at random, trained and measured the same way), where nothing changed. By default the
   test is *paired* (:func:`fit_paired_null`): each word's measure is compared with its own
   measure in the control pair, ``log(measure) - log(own control measure)``, corrected for a
   change in its count between the slices. Words have noise levels of their own that neither
   covariate sees (bursty words, found in a few documents, move far between any two halves of
   a text): on the benchmark's shuffled text the residuals of the log displacement in the pair
   and in the control correlate at about 0.8, so the ratio cancels most of that noise. With
   every model trained on its lines in random order (:mod:`drift.embed.training`), pair and
   control are exchangeable when nothing changed, and the ratio is symmetric about 0. The
   unpaired fit below (``CalibrationOptions(paired=False)``) is the earlier default, and the
   fallback when too few words moved less than in the control to fit the mirror null.
2. **drift null** (``drift_z``, ``drift_p``, ``drift_q``): "did it move more than the typical word
   of its frequency and noise moved between these same two slices?" Fitted robustly on the real
   pair's own words, by default with the word's own control measure as a third covariate
   (its weight fitted, not fixed at one as in the ratio): the empirical-null idea of Efron (2004,
   JASA; from memory), which takes the centre and spread of the null from the bulk of the test
   statistics themselves. Between distant
   periods almost every word moves beyond noise; this null keeps the shortlist short.

Shape (the tail that turns z into p): by default normal. On the log scale the benchmark's
standardised control residuals were close to normal (README: the calibration benchmark), while
on the measure's own scale they were skewed and heavy-tailed, which is why an earlier
frequency-only null on the raw scale, with a generalised Pareto tail fitted to the control's
largest residuals, gave z = 7 a p of about 2e-4 and let almost no real change through
Benjamini-Hochberg. That heavy tail remains available (``tail="pareto"``: the empirical share of
control residuals at least as large, and above their 80th percentile a generalised Pareto tail;
peaks over threshold, as Knijnenburg et al. 2009 describe for permutation p-values, from
memory). The drift null keeps its own centre and spread but borrows the noise null's shape
(``shape_from``): the pair's own words include the movers, whose tail is not the null's.

Words the control models lack have no own control measure (the paired statistic then uses the
null's expectation instead) and z wider than the rest; :func:`with_class_spread` gives that
class its own spread (Efron's separate-class empirical null, 2008, from memory).

The headline (``z``, ``p``, ``q``, ``significant``) requires both: ``p = max(noise_p, drift_p)``
(an intersection-union test, Berger 1982, from memory: rejecting both nulls at level alpha is a
level-alpha test of their union), ``z = min(noise_z, drift_z)`` and ``q`` is the
Benjamini-Hochberg adjustment of that p over every measured word. On shuffled text the two nulls
coincide; on a long archive the drift null is the binding one.

Why the word's own noise matters: with frequency as the only covariate, bursty words (found in a
few documents) and short generic words move far between random halves of the same text for
reasons of their own, and fill the top of the ranking; with their seed noise as a covariate they
are judged against words as noisy as they are.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift.errors import DriftError
from drift.options import check_alpha

#: Fewer measured words than this cannot give a null worth the name.
MIN_NULL_WORDS = 50
#: Below this many control words the noise null is reported as weak (common practice, no
#: published threshold: a quadratic surface of two covariates with a spread model has 12
#: parameters, and a few hundred points per parameter keep their errors small).
WEAK_NULL_WORDS = 1000
#: Robust residuals beyond this are left out of the next fit (Tukey-style trimming; 2.5 keeps
#: about 99% of normal data).
TRIM_Z = 2.5
TRIM_ROUNDS = 4
#: Median of |N(0, 1)|: the spread is rescaled so that standardised residuals have this median.
HALF_NORMAL_MEDIAN = 0.6744897501960817
#: Share of standardised residuals above the generalised Pareto threshold (tail="pareto").
TAIL_SHARE = 0.2
MIN_TAIL_POINTS = 20

CALIBRATION_COLUMNS = [
    "null_centre", "null_spread", "noise_z", "noise_p", "noise_q",
    "typical", "typical_spread", "drift_z", "drift_p", "drift_q",
    "z", "p", "q", "significant",
]


def frequency_covariate(count_from: Any, count_to: Any) -> np.ndarray:
    """``log(min(count_from, count_to))``, counts below 1 treated as 1."""
    rarer = np.minimum(np.asarray(count_from, dtype=float), np.asarray(count_to, dtype=float))
    return np.log(np.maximum(rarer, 1.0))


def noise_covariate(seed_noise: Any) -> np.ndarray:
    """``log(seed_noise)``, floored at 1e-6 (a word identical across seeds)."""
    return np.log(np.maximum(np.asarray(seed_noise, dtype=float), 1e-6))


#: Measures at or below this are treated as this before the log (an exact 0: identical vectors).
LOG_FLOOR = 1e-4


def to_model_scale(values: Any, log_scale: bool = True) -> np.ndarray:
    """The scale the nulls are fitted on: ``log(max(value, LOG_FLOOR))``, or the values as they
    are (NaN stays NaN)."""
    values = np.asarray(values, dtype=float)
    if not log_scale:
        return values
    with np.errstate(invalid="ignore"):
        return np.log(np.maximum(values, LOG_FLOOR))


def bh_qvalues(p: Any) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (q) over the finite entries; NaN stays NaN."""
    p = np.asarray(p, dtype=float)
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    if finite.any():
        q[finite] = stats.false_discovery_control(p[finite], method="bh")
    return q


def _design(
    x_count: np.ndarray, x_noise: np.ndarray | None, x_own: np.ndarray | None = None
) -> np.ndarray:
    """The centre's surface: quadratic in count and noise (1, c, n, c^2, n^2, c*n; n only with
    noise), plus a linear term in the word's own control measure o when given."""
    columns = [np.ones_like(x_count), x_count]
    if x_noise is not None:
        columns += [x_noise]
    columns += [x_count**2]
    if x_noise is not None:
        columns += [x_noise**2, x_count * x_noise]
    if x_own is not None:
        columns += [x_own]
    return np.column_stack(columns)


def _plane(
    x_count: np.ndarray, x_noise: np.ndarray | None, x_own: np.ndarray | None = None
) -> np.ndarray:
    """The spread's surface for nulls fitted on every word: 1, c, n, o (n and o where given)
    and c^2. Curved in the count only: on the calibration benchmark's shuffled text the
    spread rises faster than a plane towards the rarest words (README), while a curve in the
    seed noise or the own control measure, where fewer words lie, could be bent by movers."""
    columns = [np.ones_like(x_count), x_count]
    columns += [x for x in (x_noise, x_own) if x is not None]
    columns += [x_count**2]
    return np.column_stack(columns)


def _spread_design(
    x_count: np.ndarray, x_noise: np.ndarray | None, x_own: np.ndarray | None,
    quadratic: bool,
) -> np.ndarray:
    """The spread's surface: :func:`_plane`, or the full quadratic of :func:`_design` (the
    paired null, fitted on words that did not move)."""
    return _design(x_count, x_noise, x_own) if quadratic else _plane(x_count, x_noise, x_own)


#: E[log chi-square(1)] = -(Euler's gamma) - log 2 (a standard result): the mean of log r^2
#: for normal r lies this far below log(variance).
_MEAN_LOG_CHI2_1 = -1.2703628454614782


def _variance_fit(design: np.ndarray, residuals: np.ndarray) -> np.ndarray:
    """Coefficients b of ``log(variance) = design @ b`` by the normal likelihood of
    ``residuals`` (mean 0): minimise ``sum(r^2 / exp(eta) + eta)``. Unlike a median fit of
    log|r| it matches the residuals' variance, tails included, word by word. Started from the
    least-squares fit of ``log r^2`` (shifted by :data:`_MEAN_LOG_CHI2_1`)."""
    from scipy import optimize

    squared = np.maximum(np.asarray(residuals, dtype=float) ** 2, 1e-24)
    start = np.linalg.lstsq(design, np.log(squared) - _MEAN_LOG_CHI2_1, rcond=None)[0]

    def loss(coef: np.ndarray) -> tuple[float, np.ndarray]:
        eta = np.clip(design @ coef, -50.0, 50.0)
        weight = squared * np.exp(-eta)
        return float(np.sum(weight + eta)), design.T @ (1.0 - weight)

    found = optimize.minimize(loss, start, jac=True, method="BFGS")
    return found.x if np.all(np.isfinite(found.x)) else start


#: Covariates are winsorised at these quantiles before the surfaces are fitted.
COVARIATE_QUANTILES = (0.01, 0.99)


def _inner_range(x: np.ndarray) -> tuple[float, float]:
    low, high = np.quantile(x, COVARIATE_QUANTILES)
    return float(low), float(high)


def _median_fit(design: np.ndarray, y: np.ndarray, rounds: int = 30) -> np.ndarray:
    """Least-absolute-deviation regression by iteratively reweighted least squares (weights
    1 / |residual|, floored), started from ordinary least squares."""
    coef = np.linalg.lstsq(design, y, rcond=None)[0]
    floor = 1e-6 * max(float(np.std(y)), 1e-12)
    for _ in range(rounds):
        weight = 1.0 / np.maximum(np.abs(y - design @ coef), floor)
        root = np.sqrt(weight)
        new = np.linalg.lstsq(design * root[:, None], y * root, rcond=None)[0]
        if np.allclose(new, coef, rtol=1e-6, atol=1e-9):
            return new
        coef = new
    return coef


def _robust_scale(residuals: np.ndarray) -> float:
    mad = float(stats.median_abs_deviation(residuals, scale="normal"))
    if mad > 0:
        return mad
    return float(np.std(residuals)) or 1.0


@dataclass(frozen=True)
class Null:
    """A fitted null: centre and spread as functions of the covariates, and a tail for p."""

    centre_coef: np.ndarray
    spread_coef: np.ndarray
    spread_scale: float
    count_range: tuple[float, float]
    noise_range: tuple[float, float] | None
    residuals: np.ndarray  # sorted standardised residuals of the words the null was fitted on
    tail: str  # "normal" or "pareto"
    tail_threshold: float
    tail_shape: float
    tail_scale: float
    words: int
    kept: int  # words left after trimming
    log_scale: bool = True  # the surfaces model log(measure)
    #: the range of the word's own control measure (model scale), when it is a covariate
    own_range: tuple[float, float] | None = None
    #: the null is of the paired statistic log(measure) - log(own control measure)
    paired: bool = False
    #: the spread is a full quadratic surface (:func:`_spread_design`), not :func:`_plane`
    quadratic_spread: bool = False

    @property
    def uses_noise(self) -> bool:
        return self.noise_range is not None

    def _covariates(
        self, count: Any, noise: Any, own: Any
    ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        xc = np.clip(np.log(np.maximum(np.asarray(count, dtype=float), 1.0)), *self.count_range)
        xn = None
        if self.noise_range is not None:
            if noise is None:
                raise DriftError("This null needs each word's seed noise; pass seed_noise.")
            xn = np.clip(noise_covariate(noise), *self.noise_range)
            xn = np.where(np.isfinite(xn), xn, np.mean(self.noise_range))
        xo = None
        if self.own_range is not None:
            if own is None:
                raise DriftError("This null needs each word's own control measure; pass own.")
            xo = np.clip(to_model_scale(own, self.log_scale), *self.own_range)
            xo = np.where(np.isfinite(xo), xo, np.mean(self.own_range))
        return xc, xn, xo

    def model_centre(self, count: Any, noise: Any = None, own: Any = None) -> np.ndarray:
        """The centre on the modelled scale (log of the measure by default)."""
        return _design(*self._covariates(count, noise, own)) @ self.centre_coef

    def model_spread(self, count: Any, noise: Any = None, own: Any = None) -> np.ndarray:
        """The spread (a standard deviation) on the modelled scale."""
        surface = _spread_design(*self._covariates(count, noise, own), self.quadratic_spread)
        return self.spread_scale * np.exp(0.5 * (surface @ self.spread_coef))

    def centre(self, count: Any, noise: Any = None, own: Any = None) -> np.ndarray:
        """The null's centre (its median) on the measure's own scale, for words of rarer-side
        ``count``, seed ``noise`` and (where the null uses it) ``own`` control measure."""
        centre = self.model_centre(count, noise, own)
        return np.exp(centre) if self.log_scale else centre

    def spread(self, count: Any, noise: Any = None, own: Any = None) -> np.ndarray:
        """The null's spread on the measure's own scale (on the log scale, the delta-method
        approximation: centre times the log-scale spread)."""
        spread = self.model_spread(count, noise, own)
        return self.centre(count, noise, own) * spread if self.log_scale else spread

    def z(self, values: Any, count: Any, noise: Any = None, own: Any = None) -> np.ndarray:
        """Standardised values: (model-scale value - centre) / spread, on the modelled scale."""
        return (
            to_model_scale(values, self.log_scale) - self.model_centre(count, noise, own)
        ) / self.model_spread(count, noise, own)

    def p_of_z(self, z: Any) -> np.ndarray:
        """One-sided p of standardised values (NaN stays NaN)."""
        z = np.asarray(z, dtype=float)
        p = np.full(z.shape, np.nan)
        finite = np.isfinite(z)
        if self.tail == "normal":
            p[finite] = stats.norm.sf(z[finite])
            return p
        n = len(self.residuals)
        at_least = n - np.searchsorted(self.residuals, z[finite], side="left")
        body = (1.0 + at_least) / (n + 1.0)
        upper = TAIL_SHARE * stats.genpareto.sf(
            z[finite] - self.tail_threshold, self.tail_shape, scale=self.tail_scale
        )
        p[finite] = np.where(z[finite] > self.tail_threshold, upper, body)
        return np.clip(p, np.finfo(float).tiny, 1.0)

    def quantile(self, q: float, count: Any, noise: Any = None) -> np.ndarray:
        """The null's ``q`` quantile of the measure for such words (the chart's band)."""
        if not 0.0 < q < 1.0:
            raise DriftError(f"A null quantile needs 0 < q < 1 (got {q}).")
        if self.tail == "normal" or q <= 1.0 - TAIL_SHARE:
            r = float(stats.norm.ppf(q)) if self.tail == "normal" else float(
                np.quantile(self.residuals, q)
            )
        else:
            inner = 1.0 - (1.0 - q) / TAIL_SHARE
            r = self.tail_threshold + float(
                stats.genpareto.ppf(inner, self.tail_shape, scale=self.tail_scale)
            )
        value = self.model_centre(count, noise) + r * self.model_spread(count, noise)
        return np.exp(value) if self.log_scale else value

    def describe(self) -> dict[str, Any]:
        """A small JSON-able summary for run.json."""
        described = {
            "scale": "log of the measure over the word's own control measure" if self.paired
            else "log of the measure" if self.log_scale else "the measure",
            "covariates": "log rarer count" + (", log seed noise" if self.uses_noise else "")
            + (", the word's own control measure" if self.own_range is not None else ""),
            "words": self.words,
            "kept_after_trimming": self.kept,
            "tail": self.tail,
            "spread": "a quadratic surface fitted by the normal likelihood"
            if self.quadratic_spread else "a plane and the count's square, fitted by medians",
            "residual_sd": round(float(np.std(self.residuals)), 4),
            "residual_max": round(float(self.residuals[-1]), 3) if len(self.residuals) else None,
        }
        if self.paired:  # no trimming: the spread comes from the words below 0
            described["kept_after_trimming"] = None
            described["fitted_on"] = (f"the {self.kept} words whose paired value is below 0, "
                                      "mirrored about 0")
        return described


def fit_null(
    values: Any,
    count_from: Any,
    count_to: Any,
    seed_noise: Any = None,
    *,
    tail: str = "normal",
    what: str = "control pair",
    shape_from: Null | None = None,
    log_scale: bool = True,
    own: Any = None,
) -> Null:
    """Fit a null to measured words (see the module notes): robust centre and spread surfaces.

    ``seed_noise`` (one value per word, or None) adds the word's own noise as a covariate.
    ``own`` (one value per word, or None) adds the word's own measure in the control pair
    (on the measure's scale) as a linear covariate: a word that moved far between two random
    halves of the same text is expected to move far between the slices too.
    ``shape_from``: take the shape of the standardised null (its residuals and tail) from that
    null instead, keeping this fit's centre and spread (the drift null borrows the control's
    shape: the pair's own words include the movers, whose tail is not the null's).
    """
    if tail not in ("normal", "pareto"):
        raise DriftError(f"The null's tail must be 'normal' or 'pareto' (got '{tail}').")
    vals = np.asarray(values, dtype=float).ravel()
    xc = frequency_covariate(count_from, count_to).ravel()
    if not len(vals) == len(xc):
        raise DriftError(
            f"The {what} has {len(vals)} measures but {len(xc)} pairs of counts; pass one of each "
            "per word."
        )
    keep = np.isfinite(vals) & np.isfinite(xc)
    xn = None
    if seed_noise is not None:
        xn = noise_covariate(seed_noise).ravel()
        keep &= np.isfinite(xn)
    xo = None
    if own is not None:
        xo = to_model_scale(np.asarray(own, dtype=float).ravel(), log_scale)
        keep &= np.isfinite(xo)
    vals, xc = to_model_scale(vals[keep], log_scale), xc[keep]
    xn = xn[keep] if xn is not None else None
    xo = xo[keep] if xo is not None else None
    if len(vals) < MIN_NULL_WORDS:
        raise DriftError(
            f"The {what} has only {len(vals)} measured words (at least {MIN_NULL_WORDS} are "
            "needed for a null); use more text per slice or a lower --min-count."
        )
    if np.ptp(vals) == 0:
        raise DriftError(
            f"Every word of the {what} has the same measure, so no null can be fitted."
        )
    # Winsorise the covariates: a word beyond the 1st or 99th percentile is fitted (and later
    # scored) at that percentile, so that a few extreme words (the most frequent, say, which may
    # be the very words that moved) have no leverage on the surface's curvature.
    count_range = _inner_range(xc)
    xc = np.clip(xc, *count_range)
    noise_range = None
    if xn is not None:
        noise_range = _inner_range(xn)
        xn = np.clip(xn, *noise_range)
    own_range = None
    if xo is not None:
        own_range = _inner_range(xo)
        xo = np.clip(xo, *own_range)
    design = _design(xc, xn, xo)
    plane = _plane(xc, xn, xo)
    inside = np.ones(len(vals), dtype=bool)
    for _ in range(TRIM_ROUNDS):
        # Median (least absolute deviation) fits: a handful of words that moved far cannot pull
        # the centre or inflate the spread towards themselves, even where they have leverage.
        coef = _median_fit(design[inside], vals[inside])
        residual = vals - design @ coef
        log_abs = np.log(np.maximum(np.abs(residual[inside]), 1e-12))
        spread_coef = 2.0 * _median_fit(plane[inside], log_abs)
        spread = np.exp(0.5 * (plane @ spread_coef))
        standard = residual / spread
        scale = _robust_scale(standard[inside])
        now_inside = np.abs(standard / scale) <= TRIM_Z
        if now_inside.sum() < MIN_NULL_WORDS or (now_inside == inside).all():
            break
        inside = now_inside
    # Rescale so that the median |standardised residual| of the kept words is that of N(0, 1).
    standard = (vals - design @ coef) / np.exp(0.5 * (plane @ spread_coef))
    scale = float(np.median(np.abs(standard[inside]))) / HALF_NORMAL_MEDIAN
    scale = scale if scale > 0 else 1.0
    residuals = np.sort(standard / scale)
    threshold, shape, tail_scale = np.nan, 0.0, 1.0
    if tail == "pareto":
        threshold = float(np.quantile(residuals, 1.0 - TAIL_SHARE))
        exceed = residuals[residuals > threshold] - threshold
        if len(exceed) >= MIN_TAIL_POINTS:
            shape, _, tail_scale = stats.genpareto.fit(exceed, floc=0.0)
            if not (np.isfinite(shape) and tail_scale > 0) or shape < 0:
                shape, tail_scale = 0.0, float(np.mean(exceed))
        else:
            tail = "normal"
    if shape_from is not None:
        return Null(
            centre_coef=coef, spread_coef=spread_coef, spread_scale=scale,
            count_range=count_range, noise_range=noise_range,
            residuals=shape_from.residuals, tail=shape_from.tail,
            tail_threshold=shape_from.tail_threshold, tail_shape=shape_from.tail_shape,
            tail_scale=shape_from.tail_scale, words=int(len(vals)), kept=int(inside.sum()),
            log_scale=log_scale, own_range=own_range,
        )
    return Null(
        centre_coef=coef,
        spread_coef=spread_coef,
        spread_scale=scale,
        count_range=count_range,
        noise_range=noise_range,
        residuals=residuals,
        tail=tail,
        tail_threshold=float(threshold),
        tail_shape=float(shape),
        tail_scale=float(tail_scale),
        words=int(len(vals)),
        kept=int(inside.sum()),
        log_scale=log_scale,
        own_range=own_range,
    )


def fit_paired_null(
    ratio: Any, count_from: Any, count_to: Any, seed_noise: Any = None
) -> Null:
    """The noise null of the paired statistic ``log(measure) - log(own control measure)``.

    The compared slices and the control slices (the same text pooled and split at random, at
    the same sizes, each model trained on its lines in random order) are exchangeable when
    nothing changed, so each word's ratio is then symmetric about 0, whatever the word's own
    noise (a bursty word moves far in both). The centre is therefore 0, and the spread, a
    surface in the covariates as in :func:`fit_null`, is fitted on the words whose ratio is
    negative: they cannot have changed in the direction tested, so even an archive where most
    words moved leaves them as the null's sample (the mirror idea of symmetric test
    statistics; common practice, e.g. in target-decoy and knockoff-style FDR control, from
    memory). The tail is normal.

    Because those words did not move, the spread can be a full quadratic surface and be
    fitted by the normal likelihood (:func:`_variance_fit`), which matches each region's
    variance, tails included, instead of its median absolute value: on the calibration
    benchmark's shuffled text the rarest words' paired values have heavier tails than the
    rest, and a median fit left their z with a standard deviation of about 1.3.
    """
    ratio = np.asarray(ratio, dtype=float).ravel()
    xc = frequency_covariate(count_from, count_to).ravel()
    xn = None if seed_noise is None else noise_covariate(seed_noise).ravel()
    usable = np.isfinite(ratio) & np.isfinite(xc)
    if xn is not None:
        usable &= np.isfinite(xn)
    below = usable & (ratio < 0)
    if below.sum() < MIN_NULL_WORDS:
        raise DriftError(
            f"Only {int(below.sum())} words moved less than in the control pair (at least "
            f"{MIN_NULL_WORDS} are needed for the paired null); use more text per slice."
        )
    count_range = _inner_range(xc[usable])
    noise_range = _inner_range(xn[usable]) if xn is not None else None
    xc_b = np.clip(xc[below], *count_range)
    xn_b = np.clip(xn[below], *noise_range) if xn is not None else None
    surface = _spread_design(xc_b, xn_b, None, quadratic=True)
    size = np.abs(ratio[below])
    spread_coef = _variance_fit(surface, size)
    standard = size / np.exp(0.5 * (surface @ spread_coef))
    scale = float(np.sqrt(np.mean(standard**2)))  # 1 at the likelihood's optimum
    scale = scale if scale > 0 else 1.0
    mirrored = np.sort(np.concatenate([-standard, standard]) / scale)
    design_width = _design(xc_b[:1], xn_b[:1] if xn_b is not None else None).shape[1]
    return Null(
        centre_coef=np.zeros(design_width), spread_coef=spread_coef, spread_scale=scale,
        count_range=count_range, noise_range=noise_range, residuals=mirrored, tail="normal",
        tail_threshold=np.nan, tail_shape=0.0, tail_scale=1.0, words=int(usable.sum()),
        kept=int(below.sum()), log_scale=False, paired=True, quadratic_spread=True,
    )


def _score(null: Null | None, values: np.ndarray, cf: np.ndarray, ct: np.ndarray,
           noise: np.ndarray | None, own: Any = None) -> tuple[np.ndarray, ...]:
    n = len(values)
    if null is None:
        return (np.full(n, np.nan),) * 4
    count = np.minimum(cf, ct)
    z = null.z(values, count, noise, own)
    return null.centre(count, noise, own), null.spread(count, noise, own), z, null.p_of_z(z)


def calibrate(
    values: Sequence[float] | np.ndarray | pd.Series,
    count_from: Sequence[float] | np.ndarray | pd.Series,
    count_to: Sequence[float] | np.ndarray | pd.Series,
    *,
    seed_noise: Any = None,
    noise_null: Null | None = None,
    drift_null: Null | None = None,
    alpha: float = 0.05,
    own: Any = None,
) -> pd.DataFrame:
    """Score ``values`` against both nulls: the :data:`CALIBRATION_COLUMNS`, one row per value.

    A missing null (None) leaves its columns NaN. The headline needs both: with either missing,
    ``z``, ``p``, ``q`` are NaN and ``significant`` is missing (pandas NA), since the question
    the headline answers cannot be answered.

    Parameters
    ----------
    values, count_from, count_to : array-like
        One measure and one pair of counts (in the two compared slices) per word.
    seed_noise : array-like, optional
        Each word's seed-to-seed distance, when the nulls were fitted with it.
    noise_null, drift_null : Null, optional
        The nulls from :func:`fit_null` (control pair, and the pair's own words).
    own : array-like, optional
        Each word's own measure in the control pair, when the drift null was fitted with it.
    alpha : float
        False discovery rate for ``significant``.

    Returns
    -------
    pandas.DataFrame
        The :data:`CALIBRATION_COLUMNS`, in the order of ``values``.

    Raises
    ------
    DriftError
        An ``alpha`` outside (0, 1), or a null that needs seed noise called without it.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> counts = rng.integers(20, 2000, 500).astype(float)
    >>> values = np.exp(-1.0 - 0.1 * np.log(counts) + 0.2 * rng.standard_normal(500))
    >>> null = fit_null(values, counts, counts)
    >>> table = calibrate([values[0], 5.0], counts[:2], counts[:2],
    ...                   noise_null=null, drift_null=null)
    >>> table["significant"].tolist()
    [False, True]
    """
    alpha = check_alpha(alpha)
    vals = np.asarray(values, dtype=float).ravel()
    cf = np.asarray(count_from, dtype=float).ravel()
    ct = np.asarray(count_to, dtype=float).ravel()
    noise = None if seed_noise is None else np.asarray(seed_noise, dtype=float).ravel()
    null_centre, null_spread, noise_z, noise_p = _score(noise_null, vals, cf, ct, noise)
    typical, typical_spread, drift_z, drift_p = _score(drift_null, vals, cf, ct, noise, own)
    table = pd.DataFrame(
        {
            "null_centre": null_centre, "null_spread": null_spread,
            "noise_z": noise_z, "noise_p": noise_p, "noise_q": bh_qvalues(noise_p),
            "typical": typical, "typical_spread": typical_spread,
            "drift_z": drift_z, "drift_p": drift_p, "drift_q": bh_qvalues(drift_p),
        }
    )
    return with_headline(table, alpha, noise_null is not None and drift_null is not None)


def with_headline(table: pd.DataFrame, alpha: float, answerable: bool = True) -> pd.DataFrame:
    """``table`` (with both questions' ``noise_*`` and ``drift_*`` columns) with the headline:
    ``p = max(noise_p, drift_p)``, ``z = min(noise_z, drift_z)``, ``q`` the Benjamini-Hochberg
    adjustment of p and ``significant = q <= alpha``. When the question cannot be answered
    (``answerable`` False: a null is missing) z, p and q are NaN and ``significant`` missing."""
    out = table.copy()
    n = len(out)
    noise_p, drift_p = out["noise_p"].to_numpy(float), out["drift_p"].to_numpy(float)
    out["z"] = np.fmin(out["noise_z"].to_numpy(float), out["drift_z"].to_numpy(float)) \
        if answerable else np.full(n, np.nan)
    out["p"] = np.fmax(noise_p, drift_p) if answerable else np.full(n, np.nan)
    q = bh_qvalues(out["p"].to_numpy(float))
    out["q"] = q
    significant = pd.array(np.where(np.isfinite(q), q <= alpha, False), dtype="boolean")
    if not answerable:
        significant[:] = pd.NA
    out["significant"] = significant
    return out


#: Words per frequency bin of :func:`count_matched_z` (common practice, no source: a few hundred
#: points give a median and a MAD with a standard error of a few hundredths of a z).
MATCHED_BIN_WORDS = 250
#: At most this many bins, however large the vocabulary.
MATCHED_BINS = 40


def count_matched_z(z: Any, count: Any) -> np.ndarray:
    """``z`` standardised again among words of similar count: minus the median, over the scaled
    median absolute deviation, of the z of the words in the same frequency bin.

    The bins hold equal numbers of words (:data:`MATCHED_BIN_WORDS` each, at most
    :data:`MATCHED_BINS` bins) along ``log(count)``; the median and MAD are interpolated
    linearly between the bins' median log counts, so that neighbouring words get nearly the same
    correction. Medians keep the few words that truly moved from moving the reference (the
    empirical-null idea, Efron 2004, from memory); what a regression surface leaves of a
    frequency trend in the centre or the spread of z is removed. NaN stays NaN.

    >>> rng = np.random.default_rng(0)
    >>> count = np.exp(rng.uniform(3, 9, 2000))
    >>> z = 0.1 * np.log(count) + rng.standard_normal(2000)
    >>> fixed = count_matched_z(z, count)
    >>> abs(float(stats.spearmanr(fixed, count).statistic)) < 0.05
    True
    """
    z = np.asarray(z, dtype=float).ravel()
    x = np.log(np.maximum(np.asarray(count, dtype=float).ravel(), 1.0))
    out = np.full(z.shape, np.nan)
    ok = np.isfinite(z) & np.isfinite(x)
    if ok.sum() < MIN_NULL_WORDS:
        return z.copy()
    zs, xs = z[ok], x[ok]
    bins = int(np.clip(len(zs) // MATCHED_BIN_WORDS, 1, MATCHED_BINS))
    centres, middles, spreads = [], [], []
    for part in np.array_split(np.argsort(xs, kind="stable"), bins):
        middle = float(np.median(zs[part]))
        mad = float(np.median(np.abs(zs[part] - middle))) / HALF_NORMAL_MEDIAN
        centres.append(float(np.median(xs[part])))
        middles.append(middle)
        spreads.append(mad if mad > 0 else 1.0)
    out[ok] = (zs - np.interp(xs, centres, middles)) / np.interp(xs, centres, spreads)
    return out


#: A class needs at least this many z below 0 for its own spread (:func:`class_spread`); with
#: fewer its z are left as they are (common practice, no source: 30 values give a spread with
#: a standard error of about an eighth of itself).
MIN_CLASS_BELOW = 30


def class_spread(z: Any) -> float:
    """The spread of a class of words' z by the mirror idea of :func:`fit_paired_null`: the root
    mean square of the z below 0 (a class of words that did not move has z symmetric about 0,
    so its z below 0 show its spread; movers lie above). NaN with fewer than
    :data:`MIN_CLASS_BELOW` such z.

    >>> rng = np.random.default_rng(0)
    >>> z = np.concatenate([1.5 * rng.standard_normal(400), [6.0, 7.0, 8.0]])
    >>> round(class_spread(z), 1)
    1.5
    """
    z = np.asarray(z, dtype=float).ravel()
    below = z[np.isfinite(z) & (z < 0)]
    if len(below) < MIN_CLASS_BELOW:
        return float("nan")
    return float(np.sqrt(np.mean(below**2)))


def with_class_spread(
    table: pd.DataFrame, in_class: Any, alpha: float
) -> tuple[pd.DataFrame, dict[str, float]]:
    """``table`` with the z of the words ``in_class`` divided, per question (noise and drift),
    by the class's own spread (:func:`class_spread`) where that spread is above 1; p is the
    normal upper tail of the new z, q its Benjamini-Hochberg adjustment, the headline recomputed.
    Returns the factors used (1.0 where the class kept its z).

    This is the separate-class empirical null (Efron, "Simultaneous inference: when should
    hypothesis testing problems be combined?", Annals of Applied Statistics 2008; from memory):
    a class of cases whose z come from a different null spread gets that spread, rather than
    sharing the others'. A spread below 1 is not used to enlarge z.
    """
    out = table.copy()
    chosen = np.asarray(in_class, dtype=bool).ravel()
    factors = {"noise": 1.0, "drift": 1.0}
    if not chosen.any():
        return out, factors
    for question in factors:
        z = out[f"{question}_z"].to_numpy(dtype=float).copy()
        spread = class_spread(z[chosen])
        if not (np.isfinite(spread) and spread > 1.0):
            continue
        z[chosen] = z[chosen] / spread
        factors[question] = spread
        out[f"{question}_z"] = z
        p = np.full(z.shape, np.nan)
        p[np.isfinite(z)] = stats.norm.sf(z[np.isfinite(z)])
        out[f"{question}_p"] = p
        out[f"{question}_q"] = bh_qvalues(p)
    answerable = out["noise_z"].notna().any() and out["drift_z"].notna().any()
    return with_headline(out, alpha, bool(answerable)), factors


def with_count_matched_drift(table: pd.DataFrame, count: Any, alpha: float) -> pd.DataFrame:
    """``table`` with its drift null's z replaced by :func:`count_matched_z` of it (p the
    normal upper tail, q its Benjamini-Hochberg adjustment) and the headline recomputed."""
    out = table.copy()
    drift_z = out["drift_z"].to_numpy(dtype=float)
    if not np.isfinite(drift_z).any():
        return out
    matched = count_matched_z(drift_z, count)
    out["drift_z"] = matched
    out["drift_p"] = stats.norm.sf(matched)
    out["drift_q"] = bh_qvalues(out["drift_p"].to_numpy())
    answerable = out["noise_z"].notna().any()
    return with_headline(out, alpha, bool(answerable))


# ------------------------------------------------------------------ the combined evidence

# The measures the default ranking measure, ``evidence``, combines: EVIDENCE_MEASURES (from
# drift.options). On the calibration benchmark (README; every combination's figures in
# benchmarks/CALIBRATION_HISTORY.md) displacement with local change ranked injected changes
# best of every combination of displacement, local and turnover; adding turnover lowered it.
#: Words whose z exceeds this in any measure are left out of the correlation between the
#: measures' z (the movers would raise it; common practice, no source for the value).
CORRELATION_TRIM_Z = 3.0


def _as_normal_z(p: np.ndarray) -> np.ndarray:
    """The standard normal z whose upper tail is ``p`` (the same z for a normal-tailed null);
    p is held inside the floats' reach of both ends (a p that rounds to 1 gives z = -8.2, not
    minus infinity)."""
    return stats.norm.isf(np.clip(p, 1e-300, 1.0 - 1e-16))


def evidence_correlation_matrix(z_columns: np.ndarray) -> np.ndarray:
    """The measures' z correlation matrix over the words that did not move.

    ``z_columns`` has one column per measure. Words with a missing z, or with ``|z|`` above
    :data:`CORRELATION_TRIM_Z` in any measure, are left out; with fewer than
    :data:`MIN_NULL_WORDS` words left (or a correlation that cannot be computed) the measures
    are taken as perfectly correlated, the cautious choice (their combination is then no
    stronger than their mean).
    """
    z = np.asarray(z_columns, dtype=float)
    m = z.shape[1] if z.ndim == 2 else 1
    cautious = np.ones((m, m))
    if m < 2:
        return cautious
    calm = np.isfinite(z).all(axis=1) & (np.abs(z) <= CORRELATION_TRIM_Z).all(axis=1)
    if calm.sum() < MIN_NULL_WORDS:
        return cautious
    with np.errstate(invalid="ignore", divide="ignore"):
        matrix = np.corrcoef(z[calm], rowvar=False)
    if not np.isfinite(matrix).all():
        return cautious
    return np.clip(matrix, -0.99, 1.0) + np.diag(1.0 - np.clip(np.diag(matrix), -0.99, 1.0))


def evidence_correlation(z_columns: np.ndarray) -> float:
    """Mean pairwise correlation of the measures' z over the words that did not move
    (:func:`evidence_correlation_matrix`).

    >>> rng = np.random.default_rng(1)
    >>> shared = rng.standard_normal(4000)
    >>> noise = rng.standard_normal((4000, 2))
    >>> z = np.sqrt(0.5) * (shared[:, None] + noise)
    >>> round(evidence_correlation(z), 1)
    0.5
    """
    return _mean_off_diagonal(evidence_correlation_matrix(z_columns))


def _mean_off_diagonal(matrix: np.ndarray) -> float:
    return float(np.mean(matrix[np.triu_indices(len(matrix), k=1)])) if len(matrix) > 1 else 1.0


def gls_weights(matrix: np.ndarray) -> np.ndarray:
    """Weights for combining correlated z: ``inverse(matrix) @ 1`` (O'Brien's GLS test for
    multiple endpoints, Biometrics 1984, from memory: the most powerful linear combination for
    a shift common to all measures), negative weights set to 0, summing to 1. Equally
    correlated measures get equal weights, which is Stouffer's combination; a measure less
    correlated with the rest gets more, since it brings more that the others do not.

    >>> gls_weights(np.array([[1.0, 0.5], [0.5, 1.0]])).round(3).tolist()
    [0.5, 0.5]
    >>> gls_weights(np.array([[1.0, 0.6, 0.2], [0.6, 1.0, 0.2], [0.2, 0.2, 1.0]])).round(3).tolist()
    [0.286, 0.286, 0.429]
    """
    m = len(matrix)
    equal = np.full(m, 1.0 / m)
    try:
        weights = np.linalg.solve(matrix, np.ones(m))
    except np.linalg.LinAlgError:
        return equal
    weights = np.clip(weights, 0.0, None)
    if not np.isfinite(weights).all() or weights.sum() <= 0:
        return equal
    return weights / weights.sum()


#: The measure counted from the text, which :func:`kind_weights` sets against the trained ones.
COUNTED_MEASURE = "context"


def kind_weights(names: Sequence[str]) -> np.ndarray:
    """Half the weight to the measure counted from the text (:data:`COUNTED_MEASURE`), half
    shared equally by the measures read off trained models; equal weights when only one kind
    is present. Two kinds of evidence, each with its own noise (sampling of the text's
    occurrences; that and the optimisation of two trainings and an alignment), count equally,
    however many measures each kind has (a design choice, no published source).

    >>> kind_weights(["displacement", "local", "context"]).tolist()
    [0.25, 0.25, 0.5]
    >>> kind_weights(["displacement", "local"]).tolist()
    [0.5, 0.5]
    """
    counted = np.array([name == COUNTED_MEASURE for name in names])
    if counted.all() or not counted.any():
        return np.full(len(names), 1.0 / len(names))
    return np.where(counted, 0.5 / counted.sum(), 0.5 / (~counted).sum())


def weighted_z(z_columns: np.ndarray, weights: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """``z @ w / sqrt(w' R w)``: standard normal per row when each column is and ``R`` is
    their correlation. A row with any z missing gives NaN.

    >>> R = np.array([[1.0, 0.5], [0.5, 1.0]])
    >>> weighted_z(np.array([[2.0, 2.0]]), np.array([0.5, 0.5]), R).round(3).tolist()
    [2.309]
    """
    z = np.asarray(z_columns, dtype=float)
    return z @ weights / np.sqrt(weights @ matrix @ weights)


def stouffer_z(z_columns: np.ndarray, correlation: float) -> np.ndarray:
    """Stouffer's combination of m correlated z per row: ``sum(z) / sqrt(m + m(m-1) r)``.

    With independent measures (r = 0) this is Stouffer et al.'s (1949) sum over sqrt(m); for
    equally correlated ones the variance of the sum is ``m + m(m-1) r``, the correction for
    dependent tests that Strube (1985, Psychological Bulletin; from memory) describes. A row
    with any z missing gives NaN.

    >>> stouffer_z(np.array([[2.0, 2.0]]), 0.0).round(3).tolist()
    [2.828]
    >>> stouffer_z(np.array([[2.0, 2.0]]), 1.0).round(3).tolist()
    [2.0]
    """
    z = np.asarray(z_columns, dtype=float)
    m = z.shape[1]
    return z.sum(axis=1) / np.sqrt(m + m * (m - 1) * correlation)


#: How :func:`combine_evidence` may weigh its measures.
WEIGHTINGS = ("kinds", "gls", "equal")


def combine_evidence(
    tables: dict[str, pd.DataFrame], alpha: float = 0.05,
    weights_out: dict[str, list[float]] | None = None, weighting: str = "equal",
) -> tuple[pd.DataFrame, dict[str, float]]:
    """One calibration table from several measures' (:func:`calibrate` outputs, same words).

    Per null, each measure's p is turned into a normal z, and the z are combined by
    :func:`weighted_z` over the correlation matrix the words that did not move show: with equal
    weights (``weighting="equal"``, Stouffer's method corrected for the correlation), with
    :func:`kind_weights` (``"kinds"``: half to the context change counted from the text, half to
    the trained measures; equal without it), or with :func:`gls_weights` (``"gls"``; the same
    for two measures, which are always equally correlated);
    p is the normal upper tail of the combined z and q its Benjamini-Hochberg adjustment. The
    headline follows, as in :func:`calibrate`: ``p = max(noise_p, drift_p)``, ``z`` the smaller
    z. The centre and spread columns are those of the first measure (the ``score`` the table
    shows). Returns the table and the mean pairwise correlation per null; ``weights_out``, when
    given, receives the weights per null.

    >>> rng = np.random.default_rng(0)
    >>> counts = rng.integers(20, 2000, 400).astype(float)
    >>> shared = 0.2 * rng.standard_normal(400)
    >>> a = np.exp(-1.0 + shared + 0.1 * rng.standard_normal(400))
    >>> b = np.exp(-2.0 + shared + 0.1 * rng.standard_normal(400))
    >>> a[0], b[0] = 5 * a[0], 5 * b[0]
    >>> tables = {name: calibrate(v, counts, counts, noise_null=fit_null(v, counts, counts),
    ...                           drift_null=fit_null(v, counts, counts)) for name, v in
    ...           (("a", a), ("b", b))}
    >>> table, correlation = combine_evidence(tables)
    >>> bool(table["significant"][0]), 0.5 < correlation["noise"] < 1.0
    (True, True)
    """
    alpha = check_alpha(alpha)
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}, not {weighting!r}")
    first = next(iter(tables.values()))
    out = first.copy()
    correlation: dict[str, float] = {}
    for null in ("noise", "drift"):
        p_columns = np.column_stack([t[f"{null}_p"].to_numpy(dtype=float) for t in tables.values()])
        z_columns = _as_normal_z(p_columns)
        matrix = evidence_correlation_matrix(z_columns)
        correlation[null] = _mean_off_diagonal(matrix)
        if weighting == "equal":
            weights = np.full(len(matrix), 1.0 / len(matrix))
            combined = stouffer_z(z_columns, correlation[null])
        else:
            weights = gls_weights(matrix) if weighting == "gls" else kind_weights(list(tables))
            combined = weighted_z(z_columns, weights, matrix)
        if weights_out is not None:
            weights_out[null] = [round(float(w), 4) for w in weights]
        out[f"{null}_z"] = combined
        out[f"{null}_p"] = stats.norm.sf(combined)
        out[f"{null}_q"] = bh_qvalues(out[f"{null}_p"].to_numpy())
    answerable = out["noise_z"].notna().any() and out["drift_z"].notna().any()
    return with_headline(out, alpha, answerable), correlation
