"""Every option of every stage, written once: default, help text, command-line name and check.

One frozen dataclass per stage (:class:`SliceOptions`, :class:`TrainOptions`,
:class:`RankOptions`, :class:`ReportOptions`) plus :class:`ViewOptions` for what a command prints.
The command line builds its options from these classes (``drift.cli.options_cli``), ``drift run``
offers the fields of all of them, and the library functions take their keyword defaults from them,
so a default or a help text is changed in one place. Field names are the library's keyword
names; ``flag`` in a field's metadata is its command-line name when that differs.

Constructing an options object checks every value and raises a :class:`~drift.errors.DriftError`
naming the option, so the CLI, the Python API and ``drift run`` give the same message:

>>> TrainOptions(dim=50).dim
50
>>> TrainOptions(dim=1)  # doctest: +ELLIPSIS
Traceback (most recent call last):
...
drift.errors.DriftError: --dim must be a whole number of at least 2 (got 1); 50 to 300 is ...

The shared checks are plain functions that return the cleaned value:

>>> check_between(["1950s", "1960s", "1970s"], None)
['1950s', '1970s']
>>> check_alpha(0.05)
0.05
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from drift.errors import DriftError, close_matches

#: The measures a run can be ranked by (``--measure``).
MEASURES = ("evidence", "displacement", "turnover", "local", "combined")
#: The measures the ``evidence`` measure calibrates one by one and then combines: how far the
#: word's vector moved (displacement) and how far its place among its neighbours changed (local).
EVIDENCE_MEASURES: tuple[str, ...] = ("displacement", "local")


def measures_judged(measure: str) -> tuple[str, ...]:
    """The measures whose calibrated z a ranking measure stands on.

    >>> measures_judged("evidence"), measures_judged("turnover")
    (('displacement', 'local'), ('turnover',))
    """
    return EVIDENCE_MEASURES if measure == "evidence" else (measure,)


#: How sentences (tables' notes, pages) name each measure.
MEASURE_WORDS = {"displacement": "displacement", "local": "local change",
                 "turnover": "neighbour turnover", "context": "context change"}


def measure_phrase(measure: str, parts: Sequence[str] | None = None) -> str:
    """How a ranking measure is named in sentences (tables' notes, pages).

    >>> measure_phrase("evidence")
    'displacement, local change and context change combined'
    >>> measure_phrase("evidence", ["displacement", "local"])
    'displacement and local change combined'
    """
    if measure == "evidence":
        words = [MEASURE_WORDS.get(part, part)
                 for part in (parts or [*EVIDENCE_MEASURES, "context"])]
        listed = words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]
        return f"{listed} combined"
    return measure


def score_column_of(measure: str) -> str:
    """The scores column holding the measure's raw value: its own column, or ``score``.

    ``evidence`` has no value of its own: its score is the displacement.

    >>> score_column_of("evidence"), score_column_of("combined")
    ('displacement', 'score')
    """
    if measure == "evidence":
        return "displacement"
    return measure if measure in ("displacement", "turnover", "local") else "score"
COMPARE_MODES = ("pair", "steps")
#: Training architectures (``--architecture``).
ARCHITECTURES = ("skipgram", "cbow")
#: Where training runs (``--engine``).
ENGINES = ("local", "dask")
#: What ``drift rank``, ``drift neighbours`` and ``drift run`` print (``--output-format``).
OUTPUT_FORMATS = ("table", "csv", "json")
#: What ``drift export`` writes (``--vector-format``).
VECTOR_FORMATS = ("word2vec", "npz")
#: Input formats of ``drift slice`` and ``drift run`` (``--input-format``).
INPUT_FORMATS = ("csv", "tsv", "jsonl", "parquet", "txt")
#: gensim seeds are 32-bit.
SEED_LIMIT = 2**32


# ---------------------------------------------------------------------------- shared checks


def check_choice(value: str, choices: Sequence[str], option: str) -> str:
    """``value`` if it is one of ``choices``, else a DriftError with the closest choice.

    >>> check_choice("turnover", MEASURES, "--measure")
    'turnover'
    >>> check_choice("turnovr", MEASURES, "--measure")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --measure turnovr is unknown; did you mean turnover? The choices ...
    """
    if value in choices:
        return value
    hint = close_matches(str(value), choices, n=1)
    guess = f" did you mean {hint[0]}?" if hint else ""
    raise DriftError(
        f"{option} {value} is unknown;{guess} The choices are {', '.join(choices)}."
        if guess
        else f"{option} {value} is unknown; choose one of {', '.join(choices)}."
    )


def check_whole(value: Any, option: str, least: int, advice: str = "") -> int:
    """``value`` as an int if it is a whole number of at least ``least``, else a DriftError.

    >>> check_whole(50, "--k", 1)
    50
    >>> check_whole(0, "--k", 1)
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --k must be a whole number of at least 1 (got 0).
    """
    import numbers

    ok = isinstance(value, numbers.Integral) and not isinstance(value, bool) and value >= least
    if not ok:
        raise DriftError(
            f"{option} must be a whole number of at least {least} (got {value}){advice}."
        )
    return int(value)


def check_k(k: Any, option: str = "--k") -> int:
    """A neighbourhood size: a whole number of at least 1."""
    return check_whole(k, option, 1)


def check_anchor_trim(share: Any) -> float:
    """A share of anchors to leave out of a refitted alignment: at least 0, below 0.9.

    >>> check_anchor_trim(0.1)
    0.1
    >>> check_anchor_trim(0.95)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --anchor-trim must lie in [0, 0.9) (got 0.95); ...
    """
    try:
        value = float(share)
    except (TypeError, ValueError):
        value = float("nan")
    if not 0.0 <= value < 0.9:
        raise DriftError(
            f"--anchor-trim must lie in [0, 0.9) (got {share}); 0.1 leaves out the tenth of "
            "anchors that moved most."
        )
    return value


def check_alpha(alpha: Any) -> float:
    """A false discovery rate strictly between 0 and 1.

    >>> check_alpha(1.5)
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --alpha must lie strictly between 0 and 1 (got 1.5); use e.g. 0.05.
    """
    try:
        value = float(alpha)
    except (TypeError, ValueError):
        value = float("nan")
    if not 0.0 < value < 1.0:
        raise DriftError(f"--alpha must lie strictly between 0 and 1 (got {alpha}); use e.g. 0.05.")
    return value


def check_label(label: Any, labels: Sequence[str], option: str) -> str:
    """A slice label of this run, else a DriftError with close matches and every label.

    >>> check_label("1960", ["1950s", "2000s"], "--reference")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --reference 1960 is not a slice of this run; did you mean 1950s? ...
    """
    label = str(label)
    if label in labels:
        return label
    hint = close_matches(label, labels, n=3)
    guess = f" did you mean {', '.join(hint)}?" if hint else ""
    raise DriftError(
        f"{option} {label} is not a slice of this run;{guess} The slices are {', '.join(labels)}."
        if guess
        else f"{option} {label} is not a slice of this run; the slices are {', '.join(labels)}."
    )


def check_between(labels: Sequence[str], between: Sequence[str] | None) -> list[str]:
    """The two compared slices: ``between`` checked against ``labels``, or the first and last.

    >>> check_between(["1990", "2000"], ("2000", "2000"))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    drift.errors.DriftError: --between names slice 2000 twice; give two different slices, ...
    """
    labels = [str(label) for label in labels]
    if between is None or len(between) == 0:
        if len(labels) < 2:
            raise DriftError(
                f"The run has one slice ({labels[0] if labels else 'none'}), so there is no "
                "pair to compare; slice into two or more periods."
            )
        return [labels[0], labels[-1]]
    example = (
        f"e.g. --between {labels[0]} {labels[-1]}" if len(labels) > 1 else "e.g. --between A B"
    )
    if isinstance(between, str) or len(between) != 2:
        raise DriftError(f"--between takes two slice labels separated by a space, {example}.")
    pair = [check_label(label, labels, "--between") for label in between]
    if pair[0] == pair[1]:
        raise DriftError(
            f"--between names slice {pair[0]} twice; give two different slices, {example}."
        )
    return pair


# ---------------------------------------------------------------------------- field declaration


def opt(
    default: Any,
    help: str,  # noqa: A002 - the word the command line uses
    *,
    flag: str | None = None,
    short: str | None = None,
    metavar: str | None = None,
    check: Callable[[Any], Any] | None = None,
    cli_type: type | None = None,
    show_default: bool = True,
    negate: bool = False,
    old: tuple[str, ...] = (),
) -> Any:
    """One option: its default, help text and checks; the rest says how the CLI spells it.

    ``flag``: the command-line name (default: ``--`` plus the field name with dashes);
    ``check``: called with the value, returns the cleaned value or raises a DriftError;
    ``cli_type``: the type the command line parses, when it differs from the field's;
    ``negate``: a boolean field that defaults to True and is turned off by ``flag``
    (``control`` by ``--no-control``); ``old``: former spellings, still accepted, not shown.
    """
    meta = {
        "help": help,
        "flag": flag,
        "short": short,
        "metavar": metavar,
        "check": check,
        "cli_type": cli_type,
        "show_default": show_default,
        "negate": negate,
        "old": old,
    }
    return field(default=default, metadata=meta)


def flag_of(item: dataclasses.Field) -> str:
    """The command-line name of an options field."""
    return item.metadata.get("flag") or "--" + item.name.replace("_", "-")


class StageOptions:
    """Base of the options classes: checks every field on construction."""

    def __post_init__(self) -> None:
        for item in dataclasses.fields(self):  # type: ignore[arg-type]
            check = item.metadata.get("check")
            value = getattr(self, item.name)
            if check is not None and value is not None:
                object.__setattr__(self, item.name, check(value))
        self.check()

    def check(self) -> None:
        """Checks that need more than one field (override)."""

    def kwargs(self) -> dict[str, Any]:
        """The fields as keyword arguments of the stage's library function."""
        return {item.name: getattr(self, item.name) for item in dataclasses.fields(self)}  # type: ignore[arg-type]

    @classmethod
    def defaults(cls) -> dict[str, Any]:
        """Field name -> default."""
        return {item.name: item.default for item in dataclasses.fields(cls)}  # type: ignore[arg-type]


def _least(least: int, option: str, advice: str = "") -> Callable[[Any], int]:
    return lambda value: check_whole(value, option, least, advice)


def _choice(choices: Sequence[str], option: str) -> Callable[[Any], str]:
    return lambda value: check_choice(value, choices, option)


def _sample(value: Any) -> float:
    if not 0 <= float(value) < 1:
        raise DriftError(
            f"--sample must be at least 0 and below 1 (got {value}); 1e-3 to 1e-5 is usual, "
            "0 turns sub-sampling off."
        )
    return float(value)


def _seed(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < SEED_LIMIT - 1000:
        raise DriftError(
            f"--seed must be a whole number from 0 to {SEED_LIMIT - 1001} (got {value})."
        )
    return int(value)


def _columns(value: Any, option: str) -> tuple[str, ...]:
    """Column names from 'a,b' or ['a', 'b,c']."""
    items = [value] if isinstance(value, str) else list(value)
    names = tuple(n.strip() for item in items for n in str(item).split(",") if n.strip())
    if not names:
        raise DriftError(f"{option} needs at least one column name, e.g. {option} source.")
    return tuple(dict.fromkeys(names))


# ---------------------------------------------------------------------------- --where


@dataclass(frozen=True)
class WhereClause:
    """Keep documents whose ``column`` is (``keep=True``) or is not one of ``values``."""

    column: str
    values: tuple[str, ...]
    keep: bool

    def text(self) -> str:
        return f"{self.column}{'=' if self.keep else '!='}{','.join(self.values)}"


_WHERE_RE = re.compile(r"^\s*([^=!]+?)\s*(!=|=)\s*(.*)$")


def parse_where(specs: Iterable[str] | str | None) -> tuple[WhereClause, ...]:
    """Read ``--where`` values such as ``source=gazette``, ``source!=letter,minutes``.

    Parameters
    ----------
    specs : str or iterable of str, optional
        One condition or several (all must hold).

    Returns
    -------
    tuple of WhereClause

    Raises
    ------
    DriftError
        A condition that is not ``column=value`` or ``column!=value``.

    Examples
    --------
    >>> [c.text() for c in parse_where(["source!=letter,minutes", "lang = en"])]
    ['source!=letter,minutes', 'lang=en']
    """
    if specs is None:
        return ()
    if isinstance(specs, str):
        specs = [specs]
    clauses = []
    for spec in specs:
        match = _WHERE_RE.match(str(spec))
        values = tuple(v.strip() for v in match.group(3).split(",")) if match else ()
        if not match or not any(values):
            raise DriftError(
                f"--where {spec} is not understood; write column=value or column!=value "
                "(several values separated by commas), e.g. --where source!=letter."
            )
        clauses.append(WhereClause(match.group(1), tuple(v for v in values if v),
                                   match.group(2) == "="))
    return tuple(clauses)


def _where(value: Any) -> tuple[str, ...]:
    specs = (value,) if isinstance(value, str) else tuple(value)
    parse_where(specs)  # a malformed condition is an error here, before any reading
    return specs


#: The one seed: the balance draw, model k's gensim seed (seed + k) and the examples drawn.
_SEED_HELP = "Seed of every random choice (balancing, models: seed + k, examples)."


# Options that several stages share are made by one function each, so they cannot differ.


def _more_than_one(value: Any, option: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = float("nan")
    if not number > 1:
        raise DriftError(f"{option} must be more than 1 (got {value}), e.g. 10 for tenfold.")
    return number


def _words() -> Any:
    return opt(
        None,
        "A file of target words (one per line, or a CSV with a 'word' column): show and chart "
        "exactly these, with the reason for each one not measured.",
        metavar="FILE",
        show_default=False,
    )


def _engine() -> Any:
    """``--engine``, the same option for slicing and training."""
    return opt("local", "local or dask.", check=_choice(ENGINES, "--engine"))


def _scheduler() -> Any:
    """``--scheduler``, the same option for slicing and training."""
    return opt(
        None,
        "Dask scheduler address (default: a LocalCluster).",
        metavar="ADDR",
        show_default=False,
    )


def _between() -> Any:
    return opt(
        None,
        "The two slices to compare (default: the first and the last).",
        metavar="A B",
        show_default=False,
    )


def _top() -> Any:
    return opt(20, "Words shown, and charted in the report.", check=_least(0, "--top"))


# ---------------------------------------------------------------------------- the stages


@dataclass(frozen=True)
class SliceOptions(StageOptions):
    """Options of ``drift slice`` (``drift.slice_archive``)."""

    fmt: str | None = opt(
        None,
        "csv, tsv, jsonl, parquet or txt (default: from the extension).",
        flag="--input-format",
        metavar="FORMAT",
        show_default=False,
        old=("--format",),
    )
    time_col: str | None = opt(
        None, "Column with the dates (default: date, time, year or timestamp).", show_default=False
    )
    text_col: str | None = opt(
        None, "Column with the text (default: text, body or content).", show_default=False
    )
    date_format: str | None = opt(
        None, "strptime layout of the dates, e.g. '%d/%m/%Y'.", show_default=False
    )
    encoding: str | None = opt(
        None, "Text encoding, e.g. cp1252 or latin-1 (default: UTF-8; cp1252 when a file is not "
        "UTF-8).", show_default=False,
    )
    delimiter: str | None = opt(
        None, "Field separator of a CSV file, e.g. ';', '|' or tab.", show_default=False
    )
    skip_bad_dates: bool = opt(False, "Drop documents whose date does not parse.")
    by: str = opt("year", "year, decade, Ny (e.g. 5y), edges:1990,2000,2010 or even:K.")
    balance: str | int | None = opt(
        None,
        "Down-sample every slice to the smallest slice's tokens; '--balance N' to N tokens.",
        cli_type=bool,
        show_default=False,
    )
    keep_case: bool = opt(False, "Keep upper case (default: lower-case every token).")
    pretokenized: bool = opt(False, "Split on white space only.")
    seed: int = opt(1, _SEED_HELP, check=_seed)
    id_col: str | None = opt(
        None, "Column with document ids (default: the row number, or a .txt file's name).",
        show_default=False,
    )
    meta: tuple[str, ...] | None = opt(
        None, "Metadata columns for the document index and composition, e.g. 'source,author' "
        "(repeatable).", cli_type=list[str], metavar="COLUMNS", show_default=False,
        check=lambda value: _columns(value, "--meta"),
    )
    where: tuple[str, ...] | None = opt(
        None, "Keep only matching documents: column=value or column!=value, several values with "
        "commas; repeat for more conditions.", cli_type=list[str], metavar="COLUMN=VALUE",
        show_default=False, check=_where,
    )
    balance_by: str | None = opt(
        None, "Balance so every slice keeps the same mix of this metadata column (implies "
        "--balance).", metavar="COLUMN", show_default=False,
    )
    append: bool = opt(
        False, "Add SOURCE's documents to the slices already in --out (new slices are added, "
        "slices that gain documents are redone, the rest kept as they are)."
    )
    engine: str = _engine()
    scheduler: str | None = _scheduler()

    def check(self) -> None:
        if self.scheduler and self.engine != "dask":
            raise DriftError("--scheduler only applies with --engine dask; add --engine dask.")


@dataclass(frozen=True)
class TrainOptions(StageOptions):
    """Options of ``drift train`` (``drift.train_run``)."""

    architecture: str = opt(
        "skipgram",
        "skipgram (skip-gram, negative sampling) or cbow.",
        check=_choice(ARCHITECTURES, "--architecture"),
    )
    dim: int = opt(
        100,
        "Vector dimension (50 to 300 is usual).",
        check=_least(2, "--dim", "; 50 to 300 is the usual range"),
    )
    window: int = opt(
        5, "Context words on each side.", check=_least(1, "--window", "; 5 is a common choice")
    )
    negative: int = opt(
        5,
        "Noise words per positive example.",
        check=_least(1, "--negative", ": drift trains with negative sampling; 5 to 20 is usual"),
    )
    sample: float = opt(1e-3, "Sub-sampling threshold (0 turns it off).", check=_sample)
    epochs: int = opt(5, "Passes over each slice.", check=_least(1, "--epochs"))
    min_count: int = opt(
        20, "Ignore words rarer than this in each slice.", check=_least(1, "--min-count")
    )
    seeds: int = opt(
        2,
        "Models per slice, each with its own seed.",
        check=_least(1, "--seeds", "; 2 or more measure seed noise"),
    )
    base_seed: int = opt(1, _SEED_HELP, flag="--seed", check=_seed, old=("--base-seed",))
    workers: int | None = opt(
        None,
        "Cores to use (default: all). With --scheduler: gensim threads per model (default 1).",
        check=_least(1, "--workers"),
        show_default=False,
    )
    between: tuple[str, str] | None = _between()
    control: bool = opt(
        True,
        "Skip the time-shuffled control pair (then no z, p or q values).",
        flag="--no-control",
        negate=True,
    )
    control_splits: int = opt(
        1,
        "Control pairs, each the compared slices pooled and split at random anew; their average "
        "is each word's own control measure (2 sharpened ranking in the calibration benchmark, "
        "see the README).",
        check=_least(1, "--control-splits"),
    )
    engine: str = _engine()
    scheduler: str | None = _scheduler()

    def check(self) -> None:
        if self.base_seed + self.seeds >= SEED_LIMIT:
            raise DriftError(
                f"--seed plus --seeds must stay below {SEED_LIMIT} (got {self.base_seed})."
            )
        if self.scheduler and self.engine != "dask":
            raise DriftError("--scheduler only applies with --engine dask; add --engine dask.")


@dataclass(frozen=True)
class RankOptions(StageOptions):
    """Options of ``drift rank`` (``drift.rank_run``).

    ``k`` = 50 was chosen by benchmarks/injection_eval.py (synthetic change injection on
    gensim's real text, 4 protocol seeds): k = 50 gave turnover and the combined measure a
    higher average precision than 25 or 10 (local change was about even). ``measure`` =
    evidence (displacement and local change, each calibrated, combined by Stouffer's method)
    had the highest average precision on the calibration benchmark, 0.365 against
    displacement's 0.288 when it was chosen, better on each of the 4 seeds
    (benchmarks/CALIBRATION_HISTORY.md); since 5 December 2026 it also takes the context
    change counted from the text, the three z weighted by their correlations (README: the
    calibration benchmark).
    """

    between: tuple[str, str] | None = _between()
    reference: str | None = opt(
        None,
        "Slice the timeline is measured against (default: the first).",
        metavar="SLICE",
        show_default=False,
    )
    measure: str = opt(
        "evidence",
        "Ranking measure: evidence (displacement, local change and the context change counted "
        "from the text, each calibrated, their z combined), displacement, turnover, local or "
        "combined.",
        check=_choice(MEASURES, "--measure"),
    )
    k: int = opt(
        50, "Neighbours per word for turnover and local change (the measures' k).", check=check_k
    )
    alpha: float = opt(0.05, "False discovery rate for 'significant'.", check=check_alpha)
    anchors: str | None = opt(
        None,
        "Align on the N most frequent shared words, or on the words of a file (default: all).",
        metavar="N|FILE",
        show_default=False,
    )
    term_count: int = opt(
        20,
        "Emerging/fading terms: at least this many uses in the slice where the word is common.",
        check=_least(1, "--term-count"),
    )
    term_ratio: float = opt(
        10.0,
        "Emerging/fading terms: frequency per million at least this many times higher in one "
        "compared slice than in the other.",
        check=lambda value: _more_than_one(value, "--term-ratio"),
    )
    anchor_trim: float = opt(
        0.0,
        "Refit the alignment without this share of the anchors that moved most (0: keep all).",
        metavar="SHARE",
        check=check_anchor_trim,
    )
    compare: str = opt(
        "pair",
        "pair: judge the change between the compared slices; steps: each word's largest "
        "calibrated step between adjacent slices, over the whole timeline.",
        check=_choice(COMPARE_MODES, "--compare"),
    )


@dataclass(frozen=True)
class ChartOptions(StageOptions):
    """Options of ``drift chart`` (``drift.chart_word``)."""

    k: int = opt(
        10,
        "Neighbours listed per slice.",
        flag="--neighbours",
        metavar="N",
        check=lambda value: check_k(value, "--neighbours"),
    )
    examples: int = opt(3, "Example sentences per slice.", check=_least(0, "--examples"))
    seed: int = opt(1, _SEED_HELP, check=_seed)


@dataclass(frozen=True)
class ReportOptions(ChartOptions):
    """Options of ``drift report`` (``drift.build_report``): those of a chart, and ``top``."""

    top: int = _top()
    words: str | None = _words()


@dataclass(frozen=True)
class ExamplesOptions(StageOptions):
    """Options of ``drift examples`` (``drift.examples_for_words``)."""

    examples: int = opt(3, "Example sentences per slice.", check=_least(0, "--examples"))
    seed: int = opt(1, _SEED_HELP, check=_seed)


@dataclass(frozen=True)
class ViewOptions(StageOptions):
    """What ``drift rank`` and ``drift run`` print (not part of any stage's files)."""

    top: int = _top()
    all_rows: bool = opt(False, "Show every word.", flag="--all")
    min_count: int = opt(
        0,
        "Show only words seen at least this often in both compared slices.",
        flag="--min-count-shown",
        check=_least(0, "--min-count-shown"),
    )
    output_format: str = opt(
        "table",
        "table, csv or json.",
        metavar="FORMAT",
        check=_choice(OUTPUT_FORMATS, "--output-format"),
        old=("--format",),
    )
    words: str | None = _words()


#: Every options class, in the order ``drift run --help`` lists their options.
STAGES: tuple[type[StageOptions], ...] = (
    SliceOptions,
    TrainOptions,
    RankOptions,
    ReportOptions,
    ViewOptions,
)


def default(cls: type[StageOptions], name: str) -> Any:
    """The default of one field, for a library function's signature.

    >>> default(RankOptions, "k")
    50
    """
    return cls.__dataclass_fields__[name].default  # type: ignore[attr-defined]
