"""The rank stage's calibration: both nulls fitted for the measured pair, the headline, the notes.

Glue between the measurements (:mod:`drift.compare.seedmeasures`) and the statistics
(:mod:`drift.compare.calibration`): the control pair's noise null, the pair's own drift null, each
word's seed noise as a covariate, the ``evidence`` measure's combination, and ``--compare steps``
(each word's largest calibrated step between adjacent slices).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import stats

from drift.compare.measures import (
    mean_and_spread,
)
from drift.compare.runinputs import RunInputs, counts_for
from drift.errors import DriftError

if TYPE_CHECKING:
    from drift.compare.ranking import Measured


def _nanmean(stacked: np.ndarray, axis: int) -> np.ndarray:
    """``np.nanmean`` without the warning for all-NaN slices (they stay NaN)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(stacked, axis=axis)


def mean_instability(blocks: Sequence[np.ndarray | None]) -> np.ndarray | None:
    """Seed noise per word and column, averaged over the seeds after the first."""
    present = [b for b in blocks if b is not None]
    return _nanmean(np.stack(present), 0) if present else None


@dataclass(frozen=True)
class CalibrationOptions:
    """How the nulls are fitted (the defaults are the benchmark's winners; see the README)."""

    use_seed_noise: bool = True
    #: how a word's seed distances in the two compared models are combined: 'max' (as the
    #: rarer count: a word is as noisy as its noisier side) or 'mean'
    noise: str = "max"
    #: fit the nulls to log(measure): the benchmark found its standardised control residuals
    #: close to normal (skew and excess kurtosis near 0), unlike the raw measure's (skewed)
    log_scale: bool = True
    tail: str = "normal"
    #: the drift null borrows the noise null's shape (else: a normal tail)
    shared_shape: bool = True
    #: (unpaired only) the drift null also takes each word's own measure in the control pair
    #: as a covariate
    own_control: bool = False
    #: the noise question judges the paired statistic log(measure) - log(the word's own measure
    #: in the control pair) (:func:`drift.compare.calibration.fit_paired_null`), and, with
    #: ``paired_drift``, the drift null takes that own measure as a covariate (see
    #: :func:`_paired_calibration`)
    paired: bool = True
    #: (paired only) the drift null takes the word's own control measure as a covariate; off
    #: (the default since the evidence counts contexts too), only the noise question is
    #: paired: on the calibration benchmark (README) the covariate raised average precision
    #: (0.79 against 0.71) but made a donor word significant and the real archive's ranking
    #: less stable between training seeds (z's sd between runs 0.36 against 0.30)
    paired_drift: bool = False
    #: the drift null's z standardised again among words of similar count
    #: (:func:`drift.compare.calibration.count_matched_z`)
    count_matched: bool = True
    #: the count words are matched on: 'total' (the two slices' counts summed) or 'rarer' (the
    #: smaller of the two, the nulls' covariate). On the calibration benchmark's real archive
    #: 'rarer' left Spearman(z, total count) at 0.10 and 0.12 for two training seeds and
    #: Spearman(z, larger count) at 0.12 and 0.14; 'total' brought all three counts' |rho| to
    #: 0.08 or less (README)
    matched_on: str = "total"
    #: (paired only) the words the control models lack, whose own control measure is only the
    #: null's expectation, get their z divided by their class's own spread
    #: (:func:`drift.compare.calibration.with_class_spread`): on the calibration benchmark's
    #: shuffled text that class's z had a standard deviation of about 1.4 against 1.0 (README)
    separate_unpaired: bool = True
    #: the evidence also takes the context change counted from the slices' text, judged
    #: against each word's own permutation null (:mod:`drift.compare.contexts`)
    context: bool = True
    #: how the evidence weighs its measures' z: 'kinds' (half to the context change counted
    #: from the text, half shared by displacement and local change: two kinds of evidence with
    #: noise of their own count equally), 'gls' (O'Brien's GLS weights from their correlation
    #: matrix) or 'equal' (Stouffer's method, corrected for their correlation). On the
    #: calibration benchmark (README, 6 December 2026) 'kinds' gave average precision 0.82
    #: against 0.78 for 'gls' on one text and 0.67 against 0.62 on another, as high or higher on
    #: every protocol seed, and real rankings steadier between training seeds (top 50 shared 43
    #: against 41 and 40), with the documented shifts a little lower
    evidence_weights: str = "kinds"


def matching_count(count_from: np.ndarray, count_to: np.ndarray, how: str) -> np.ndarray:
    """The count the drift z is matched on (:attr:`CalibrationOptions.matched_on`)."""
    if how == "total":
        return count_from + count_to
    if how == "rarer":
        return np.minimum(count_from, count_to)
    raise ValueError(f"matched_on must be 'total' or 'rarer', not {how!r}")


def combine_noise(columns: np.ndarray, how: str) -> np.ndarray:
    if how == "max":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanmax(columns, axis=1)
    return _nanmean(columns, 1)


def pair_seed_noise(
    measured: Measured, labels: Sequence[str], how: str = "max"
) -> np.ndarray | None:
    """Each word's seed noise for the compared pair, from its seed distances in the two slices
    (``how``: see :class:`CalibrationOptions`); None with one seed only."""
    per_slice = mean_instability([r.instability for r in measured.results[1:]])
    if per_slice is None:
        return None
    a, b = (labels.index(x) for x in measured.pair)
    return combine_noise(per_slice[:, [a, b]], how)


def _noise_nulls(
    measured: Measured, measure: str, options: CalibrationOptions, with_noise: bool,
    reasons: list[str], record: dict[str, Any], control_p: list[np.ndarray] | None = None,
) -> tuple[Any, Any]:
    """The control pair's nulls: for ``measure`` and for displacement (the timeline's band).

    (None, None) when there is no control or it is too small; ``reasons`` then says why. The
    control words' noise p values are appended to ``control_p`` when it is given.
    """
    from drift.compare.calibration import WEAK_NULL_WORDS, calibrate, fit_null

    controls = [r.control for r in measured.results if r.control is not None]
    if not controls:
        reasons.append("no control pair was trained (--no-control)")
        return None, None
    first = controls[0]
    if any(c.words != first.words for c in controls[1:]):
        raise DriftError(
            "The control models of different seeds have different vocabularies; retrain the "
            "run with 'drift train' so every seed uses the same control slices."
        )
    control_noise = mean_instability([r.control_instability for r in measured.results[1:]])
    c_noise = None
    if with_noise and control_noise is not None:
        c_noise = combine_noise(control_noise, options.noise)
    try:
        control_values, _ = mean_and_spread([c.value(measure) for c in controls])
        noise_null = fit_null(control_values, first.counts_from, first.counts_to, c_noise,
                              tail=options.tail, what="control pair",
                              log_scale=options.log_scale)
        displacement_null = noise_null
        if measure != "displacement":
            control_disp, _ = mean_and_spread([c.displacement for c in controls])
            displacement_null = fit_null(control_disp, first.counts_from, first.counts_to,
                                         c_noise, tail=options.tail, what="control pair",
                                         log_scale=options.log_scale)
    except DriftError as exc:
        reasons.append(f"no noise null: {exc}")
        return None, None
    control_table = calibrate(control_values, first.counts_from, first.counts_to,
                              seed_noise=c_noise, noise_null=noise_null, drift_null=noise_null)
    flagged = control_table["noise_q"] <= ALPHA_RECORD
    if control_p is not None:
        control_p.append(control_table["noise_p"].to_numpy(dtype=float))
    record["control_flagged"] = int(flagged.sum())
    record["noise_null"] = noise_null.describe()
    if noise_null.words < WEAK_NULL_WORDS:
        reasons.append(f"the control pair gave only {noise_null.words} words (weak below "
                       f"{WEAK_NULL_WORDS})")
    return noise_null, displacement_null


#: The level at which run.json's control_flagged counts the control words the null flags.
ALPHA_RECORD = 0.05


def _significance(noise_null: Any, drift_null: Any, reasons: list[str]) -> tuple[str, str]:
    """(status, note): 'full', 'weak' or 'unavailable', and a sentence for the table."""
    if noise_null is None or drift_null is None:
        status = "unavailable"
    else:
        status = "weak" if reasons else "full"
    return status, _significance_note(status, reasons)


def _significance_note(status: str, reasons: list[str]) -> str:
    """The sentence the table shows for a significance that is not full ('' when it is)."""
    return "" if status == "full" else f"significance {status}: " + "; ".join(
        reason.rstrip(".") for reason in reasons
    )


def calibrate_pair(
    measured: Measured,
    scores: pd.DataFrame,
    measure: str,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """(calibration columns, the displacement noise null or None, run.json entries).

    Without a control, or with one too small to fit a null, the noise null's columns (and the
    headline) are empty and ``significance`` in run.json says why.
    """
    if measure == "evidence":
        columns, null, record = _evidence_calibration(measured, scores, alpha, labels, options)
    else:
        columns, null, record = _one_measure_calibration(measured, scores, measure, alpha,
                                                         labels, options)
    if options.paired and options.separate_unpaired:
        from drift.compare.calibration import with_class_spread

        lacking = lacks_own_control(measured, scores["word"].tolist())
        if lacking is not None and lacking.any():
            columns, factors = with_class_spread(columns, lacking, alpha)
            record["unpaired_class"] = {
                "words": int(lacking.sum()),
                "noise_spread": round(factors["noise"], 4),
                "drift_spread": round(factors["drift"], 4),
            }
    if options.count_matched:
        from drift.compare.calibration import with_count_matched_drift

        matched = matching_count(scores["count_from"].to_numpy(float),
                                 scores["count_to"].to_numpy(float), options.matched_on)
        columns = with_count_matched_drift(columns, matched, alpha)
        record["drift_null_count_matched"] = True
    return columns, null, record


def _evidence_calibration(
    measured: Measured,
    scores: pd.DataFrame,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """The ``evidence`` measure: each of :data:`EVIDENCE_MEASURES` calibrated on its own, their
    z combined per null (:func:`drift.compare.calibration.combine_evidence`)."""
    from drift.compare.calibration import combine_evidence
    from drift.options import EVIDENCE_MEASURES

    tables, records, control_p = {}, {}, []
    displacement_null = None
    for name in EVIDENCE_MEASURES:
        columns, null, records[name] = _one_measure_calibration(
            measured, scores.assign(score=scores[name]), name, alpha, labels, options, control_p
        )
        tables[name] = columns
        displacement_null = null if name == "displacement" else displacement_null
    context = getattr(measured, "context", None)  # measurements cached by an older drift
    without = None
    if options.context and context is not None:
        tables["context"], records["context"] = _context_calibration(scores, context, alpha)
        if tables["context"][["noise_p", "drift_p"]].isna().any(axis=None):
            without = {name: table for name, table in tables.items() if name != "context"}
    weights: dict[str, list[float]] = {}
    combined, correlation = combine_evidence(tables, alpha, weights, options.evidence_weights)
    if without is not None:  # a word without contexts keeps the other measures' evidence
        combined = _filled_from(combined, combine_evidence(without, alpha)[0], alpha)
    reasons = list(dict.fromkeys(
        reason for record in records.values() for reason in record["significance"]["reasons"]
    ))
    statuses = [record["significance"]["status"] for record in records.values()]
    status = next(s for s in ("unavailable", "weak", "full") if s in statuses)
    combined["significance_note"] = _significance_note(status, reasons)
    record: dict[str, Any] = {"control_flagged": None}
    if len(control_p) == len(EVIDENCE_MEASURES):
        control, _ = combine_evidence(
            {name: pd.DataFrame({"noise_p": p, "drift_p": p})
             for name, p in zip(EVIDENCE_MEASURES, control_p, strict=True)}, alpha
        )
        record["control_flagged"] = int((control["noise_q"] <= ALPHA_RECORD).sum())
    first = records[EVIDENCE_MEASURES[0]]
    for key in ("noise_null", "drift_null"):
        if key in first:
            record[key] = first[key]
    record["significance"] = {"status": status, "reasons": reasons}
    if "context" in tables:
        record["context_permutations"] = context.splits
    record["evidence"] = {
        "measures": list(tables),
        "correlation": correlation,
        "weighting": options.evidence_weights,
        "weights": weights,
        "nulls": {name: {key: rec[key] for key in ("noise_null", "drift_null") if key in rec}
                  for name, rec in records.items()},
    }
    return combined, displacement_null, record


def _filled_from(table: pd.DataFrame, other: pd.DataFrame, alpha: float) -> pd.DataFrame:
    """``table`` with its rows of missing evidence taken from ``other``, q and the headline
    recomputed over all rows."""
    from drift.compare.calibration import bh_qvalues, with_headline

    out = table.copy()
    for null in ("noise", "drift"):
        missing = out[f"{null}_z"].isna().to_numpy()
        for column in (f"{null}_z", f"{null}_p"):
            out.loc[missing, column] = other.loc[missing, column]
        out[f"{null}_q"] = bh_qvalues(out[f"{null}_p"].to_numpy())
    return with_headline(out, alpha, answerable=bool(out["noise_z"].notna().any()
                                                     and out["drift_z"].notna().any()))


def _context_calibration(
    scores: pd.DataFrame, context: Any, alpha: float
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """The context change's calibration columns: the noise question against each word's own
    permutation null (:class:`drift.compare.contexts.ContextChange`), the drift question
    against the pair's own words with the word's permutation mean as a covariate beside its
    count (its spread, an estimate from a few splits, would add its own error)."""
    from drift.compare.calibration import bh_qvalues, calibrate, fit_null, with_headline

    count_from = scores["count_from"].to_numpy(dtype=float)
    count_to = scores["count_to"].to_numpy(dtype=float)
    own = np.exp(context.null_mean)
    record: dict[str, Any] = {"control_flagged": None, "permutations": context.splits}
    reasons: list[str] = []
    try:
        drift_null = fit_null(context.distance, count_from, count_to, None,
                              tail="normal", what="context change", own=own)
        record["drift_null"] = drift_null.describe()
    except DriftError as exc:
        drift_null = None
        reasons.append(f"no drift null for the context change: {exc}")
    columns = calibrate(context.distance, count_from, count_to, drift_null=drift_null,
                        alpha=alpha, own=own)
    z = context.z
    columns["noise_z"] = z
    columns["noise_p"] = stats.norm.sf(z)
    columns["noise_q"] = bh_qvalues(columns["noise_p"].to_numpy())
    columns = with_headline(columns, alpha, answerable=drift_null is not None)
    record["significance"] = {"status": "full" if drift_null is not None else "unavailable",
                              "reasons": reasons}
    return columns, record


def _one_measure_calibration(
    measured: Measured,
    scores: pd.DataFrame,
    measure: str,
    alpha: float,
    labels: Sequence[str],
    options: CalibrationOptions,
    control_p: list[np.ndarray] | None = None,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """:func:`calibrate_pair` for one measure, whose values are ``scores['score']``."""
    from drift.compare.calibration import calibrate

    values = scores["score"].to_numpy(dtype=float)
    count_from = scores["count_from"].to_numpy(dtype=float)
    count_to = scores["count_to"].to_numpy(dtype=float)
    noise = pair_seed_noise(measured, labels, options.noise) if options.use_seed_noise else None
    reasons: list[str] = []
    if noise is None:
        reasons.append("one training seed only, so each word's own noise is unknown "
                       "(train with --seeds 2 or more)")
    record: dict[str, Any] = {"control_flagged": None}
    noise_null, displacement_null = _noise_nulls(
        measured, measure, options, noise is not None, reasons, record, control_p
    )
    if options.paired and noise_null is not None:
        return _paired_calibration(measured, scores, measure, alpha, options, noise,
                                   noise_null, displacement_null, reasons, record)
    drift_null = None
    own = None
    if options.own_control and noise_null is not None:
        own = own_control_values(measured, measure, scores["word"].tolist(), noise_null,
                                 np.minimum(count_from, count_to), noise)
    drift_null = _drift_null(measured, values, count_from, count_to, noise, options, own,
                             noise_null if options.shared_shape else None, reasons, record)
    columns = calibrate(values, count_from, count_to, seed_noise=noise, noise_null=noise_null,
                        drift_null=drift_null, alpha=alpha, own=own)
    return _with_significance(columns, noise, noise_null, drift_null, reasons, record), \
        displacement_null, record


def _paired_calibration(
    measured: Measured, scores: pd.DataFrame, measure: str, alpha: float,
    options: CalibrationOptions, noise: np.ndarray | None, control_null: Any,
    displacement_null: Any, reasons: list[str], record: dict[str, Any],
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """:func:`_one_measure_calibration` with ``options.paired``: each word against its own
    measure in the control pair.

    The noise question is asked of the paired ratio ``log(measure) - log(own control
    measure)``, corrected for a change of the word's count between the slices, against its
    mirror null (:func:`drift.compare.calibration.fit_paired_null`); where too few words moved
    less than in the control (a long archive where nearly everything moved) it is asked
    unpaired, against the control null, and run.json says so. The drift question is asked of
    the log measure with the word's own control measure as a third covariate beside count and
    seed noise, its weight fitted on the pair's own words: between distant periods the own
    control predicts less than on shuffled text, and a fixed weight of one (the ratio) would
    add the control's noise to every word. ``null_centre``/``null_spread`` stay the control
    null's (the chart's band); ``typical`` is the drift null's centre for the word."""
    from drift.compare.calibration import LOG_FLOOR, calibrate, fit_paired_null, with_headline

    values = scores["score"].to_numpy(dtype=float)
    count_from = scores["count_from"].to_numpy(dtype=float)
    count_to = scores["count_to"].to_numpy(dtype=float)
    rarer = np.minimum(count_from, count_to)
    words = scores["word"].tolist()
    own = own_control_values(measured, measure, words, control_null, rarer, noise)
    # A word whose count changed between the slices (but not between the control's halves,
    # which pool both) is expected to move more or less for that reason alone: the control
    # null's centre at the pair's effective count against the control's. The effective count
    # of two is their harmonic mean (sampling variances add as 1/count), which for the
    # control's balanced halves is close to the rarer count the null was fitted on.
    effective = harmonic_count(count_from, count_to)
    control_effective = own_control_counts(measured, words, effective)
    frequency_shift = control_null.model_centre(effective, noise) - control_null.model_centre(
        control_effective, noise)
    with np.errstate(invalid="ignore"):
        ratio = np.log(np.maximum(values, LOG_FLOOR)) - np.log(np.maximum(own, LOG_FLOOR))
    ratio = ratio - frequency_shift
    try:
        paired_null = fit_paired_null(ratio, count_from, count_to, noise)
        record["noise_null"] = paired_null.describe()
        noise_columns = calibrate(ratio, count_from, count_to, seed_noise=noise,
                                  noise_null=paired_null, drift_null=paired_null, alpha=alpha)
    except DriftError as exc:
        record["noise_null"] = {**control_null.describe(),
                                "not paired": str(exc).split(" (")[0]}
        noise_columns = calibrate(values, count_from, count_to, seed_noise=noise,
                                  noise_null=control_null, drift_null=control_null, alpha=alpha)
    drift_own = own if options.paired_drift else None
    drift_null = _drift_null(measured, values, count_from, count_to, noise, options, drift_own,
                             None, reasons, record)
    columns = calibrate(values, count_from, count_to, seed_noise=noise, noise_null=control_null,
                        drift_null=drift_null, alpha=alpha, own=drift_own)
    for column in ("noise_z", "noise_p", "noise_q"):
        columns[column] = noise_columns[column].to_numpy()
    columns = with_headline(columns, alpha, answerable=drift_null is not None)  # paired noise
    return _with_significance(columns, noise, control_null, drift_null, reasons, record), \
        displacement_null, record


def _with_significance(
    columns: pd.DataFrame, noise: np.ndarray | None, noise_null: Any, drift_null: Any,
    reasons: list[str], record: dict[str, Any],
) -> pd.DataFrame:
    """The calibration columns with ``seed_noise`` first and the significance note last; the
    status and reasons recorded in ``record``."""
    columns.insert(0, "seed_noise", noise if noise is not None else np.nan)
    status, note = _significance(noise_null, drift_null, reasons)
    columns["significance_note"] = note
    record["significance"] = {"status": status, "reasons": reasons}
    return columns


def _drift_null(
    measured: Measured, values: np.ndarray, count_from: np.ndarray, count_to: np.ndarray,
    noise: np.ndarray | None, options: CalibrationOptions, own: np.ndarray | None,
    shape_from: Any, reasons: list[str], record: dict[str, Any],
) -> Any:
    """The pair's drift null (None, with a reason, when it cannot be fitted)."""
    from drift.compare.calibration import fit_null

    try:
        null = fit_null(values, count_from, count_to, noise, tail="normal",
                        what=f"pair {measured.pair[0]}-{measured.pair[1]}",
                        shape_from=shape_from, log_scale=options.log_scale, own=own)
    except DriftError as exc:
        reasons.append(f"no drift null: {exc}")
        return None
    record["drift_null"] = null.describe()
    return null


def harmonic_count(count_from: Any, count_to: Any) -> np.ndarray:
    """The harmonic mean of two counts (each at least 1)."""
    a = np.maximum(np.asarray(count_from, dtype=float), 1.0)
    b = np.maximum(np.asarray(count_to, dtype=float), 1.0)
    return 2.0 / (1.0 / a + 1.0 / b)


def own_control_counts(
    measured: Measured, words: Sequence[str], fallback: np.ndarray
) -> np.ndarray:
    """Each word's effective count in the control pair (:func:`harmonic_count` of its counts
    in the two halves, averaged over the control splits as its own control measure is;
    ``fallback`` where the control models lack it)."""
    first = next(r for r in measured.results if r.control is not None)
    per_split = []
    for control in (first.control, *first.more_controls):
        effective = harmonic_count(control.counts_from, control.counts_to)
        lookup = dict(zip(control.words, effective.tolist(), strict=True))
        per_split.append([lookup.get(w, np.nan) for w in words])
    found = _nanmean(np.array(per_split, dtype=float), 0)
    return np.where(np.isfinite(found), found, fallback)


def lacks_own_control(measured: Measured, words: Sequence[str]) -> np.ndarray | None:
    """Which ``words`` no control model has (in any control split): their own control measure
    is the null's expectation, not a measurement. None without a control pair."""
    controls = [r.control for r in measured.results if r.control is not None]
    if not controls:
        return None
    known = set(controls[0].words)
    for result in measured.results:
        for more in result.more_controls:
            known.update(more.words)
    return np.array([w not in known for w in words], dtype=bool)


def own_control_measure(measured: Measured, measure: str, words: Sequence[str]) -> np.ndarray:
    """Each word's own ``measure`` in the control pair, averaged over seeds, then over the
    control splits where there are several; NaN where no control model has the word, and for
    every word of a run without a control pair (the scores table's ``own_control``, of
    displacement)."""
    splits = [[r.control for r in measured.results if r.control is not None]]
    if not splits[0]:
        return np.full(len(words), np.nan)
    splits += [list(split) for split in zip(*(r.more_controls for r in measured.results),
                                            strict=True)]
    per_split = []
    for controls in splits:
        values, _ = mean_and_spread([c.value(measure) for c in controls])
        lookup = dict(zip(controls[0].words, values.tolist(), strict=True))
        per_split.append([lookup.get(w, np.nan) for w in words])
    return _nanmean(np.array(per_split, dtype=float), 0)


def own_control_values(
    measured: Measured, measure: str, words: Sequence[str], noise_null: Any,
    count: np.ndarray, noise: np.ndarray | None,
) -> np.ndarray:
    """:func:`own_control_measure`, for the paired noise question and the drift null's third
    covariate: a word the control models lack gets the noise null's centre, the control measure
    expected of a word of its count and seed noise."""
    own = own_control_measure(measured, measure, words)
    missing = ~np.isfinite(own)
    if missing.any():
        own[missing] = noise_null.centre(count[missing],
                                         None if noise is None else noise[missing])
    return own


def calibrate_steps(
    inputs: RunInputs,
    measured: Measured,
    alpha: float,
    options: CalibrationOptions,
) -> tuple[pd.DataFrame, Any, dict[str, Any]]:
    """Whole-timeline calibration (``--compare steps``): each word's largest calibrated step.

    Every adjacent pair of slices is a step; a word's displacement over each step is judged by
    the control pair's noise null (at that step's counts and seed noise) and by a drift null
    fitted on that step's own words (its z count-matched as the pair's is). The word's step is
    the one with the smallest headline p; its p values are multiplied by the number of steps
    measured (Bonferroni, capped at 1), then Benjamini-Hochberg runs over the words.
    """
    from drift.compare.calibration import (
        bh_qvalues,
        calibrate,
        fit_null,
        with_count_matched_drift,
    )

    labels, words = inputs.labels, measured.words
    step_values, _ = mean_and_spread([r.steps for r in measured.results])
    per_slice = mean_instability([r.instability for r in measured.results[1:]])
    use_noise = per_slice is not None and options.use_seed_noise
    counts = np.column_stack([counts_for(inputs, words, label, None) for label in labels])
    reasons: list[str] = []
    if not use_noise:
        reasons.append("one training seed only, so each word's own noise is unknown "
                       "(train with --seeds 2 or more)")
    record: dict[str, Any] = {"control_flagged": None}
    noise_null, displacement_null = _noise_nulls(
        measured, "displacement", options, use_noise, reasons, record
    )
    n_steps = len(labels) - 1
    tables = []
    for j in range(n_steps):
        values = step_values[:, j]
        noise = combine_noise(per_slice[:, [j, j + 1]], options.noise) if use_noise else None
        drift_null = None
        try:
            drift_null = fit_null(values, counts[:, j], counts[:, j + 1], noise,
                                  what=f"step {labels[j]}-{labels[j + 1]}",
                                  shape_from=noise_null if options.shared_shape else None,
                                  log_scale=options.log_scale)
        except DriftError as exc:
            reasons.append(f"no drift null for step {labels[j]}-{labels[j + 1]}: {exc}")
        table = calibrate(values, counts[:, j], counts[:, j + 1], seed_noise=noise,
                          noise_null=noise_null, drift_null=drift_null, alpha=alpha)
        if options.count_matched and drift_null is not None:
            matched = matching_count(counts[:, j].astype(float), counts[:, j + 1].astype(float),
                                     options.matched_on)
            table = with_count_matched_drift(table, matched, alpha)
        table.insert(0, "seed_noise", noise if noise is not None else np.nan)
        tables.append(table)
    if options.count_matched:
        record["drift_null_count_matched"] = True
    headline = np.column_stack([t["p"].to_numpy(dtype=float) for t in tables])
    fallback = np.column_stack([t["drift_p"].to_numpy(dtype=float) for t in tables])
    chooser = np.where(np.isfinite(headline), headline, np.inf)
    if not np.isfinite(chooser).any():
        chooser = np.where(np.isfinite(fallback), fallback, np.inf)
    best = np.argmin(chooser, axis=1)
    measured_steps = np.isfinite(step_values).sum(axis=1).clip(min=1)
    rows = np.arange(len(words))
    columns = pd.DataFrame(
        {name: np.column_stack([t[name].to_numpy(dtype=float) for t in tables])[rows, best]
         for name in ("seed_noise", "null_centre", "null_spread", "noise_z", "noise_p",
                      "typical", "typical_spread", "drift_z", "drift_p", "z", "p")}
    )
    for name in ("noise_p", "drift_p", "p"):
        columns[name] = np.minimum(1.0, columns[name] * measured_steps)
    columns["noise_q"] = bh_qvalues(columns["noise_p"])
    columns["drift_q"] = bh_qvalues(columns["drift_p"])
    columns["q"] = bh_qvalues(columns["p"])
    significant = pd.array(np.where(np.isfinite(columns["q"]), columns["q"] <= alpha, False),
                           dtype="boolean")
    if noise_null is None:
        significant[:] = pd.NA
    columns["significant"] = significant
    status, note = _significance(noise_null, True, reasons)
    columns["significance_note"] = note
    record["significance"] = {"status": status, "reasons": reasons}
    best_values = step_values[rows, best]
    columns["score"] = best_values
    columns["change_point"] = pd.Series(
        np.where(np.isfinite(best_values), np.asarray(labels, dtype=object)[best + 1], None),
        dtype=object,
    )
    columns["change_step"] = best_values
    return columns, displacement_null, record
