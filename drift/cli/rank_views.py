"""How commands look in a terminal: tables that fit the screen, and the same rule for pipes.

* On a terminal a table fits its width: no word is ever cut; when the columns do not fit, whole
  columns are dropped in a stated order (:data:`DROP_ORDER`) and a footnote names them; lists of
  neighbours wrap between words.
* Into a file or a pipe (or ``-o FILE``) a table is printed whole, at the width it needs, without
  colour, so that nothing is dropped or cropped; ``--output-format csv`` or ``json`` give rows for
  programs instead. Every command that prints a table follows this rule (:func:`print_table`).

Words are data from strangers: every cell is a :class:`rich.text.Text`, so a word such as
``[bold]`` is shown as typed and never read as console markup.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import pandas as pd
from rich.console import Console
from rich.table import Table
from rich.text import Text

from drift.options import measure_phrase, measures_judged, score_column_of

#: Neighbours shown per cell in the scores table, strongest first (the files hold up to 10).
SHOWN_NEIGHBOURS = 5
#: Columns of the scores table dropped first when the screen is too narrow, in this order.
#: The rank, the word, the measures the ranking stands on and q are never dropped.
DROP_ORDER = ("local", "turnover", "displacement", "lost", "change", "count", "gained", "z")
#: Arrow between the counts in the two compared slices (``163 → 165``).
ARROW = "→"
#: Room a column takes besides its text: one space of padding each side and one rule.
_COLUMN_EXTRA = 3
#: Wrapped lists never get narrower than this (or than their longest word).
_LIST_MIN = 12
#: How to see what a narrow screen leaves out.
_WIDER = "a wider screen, -o FILE or --output-format csv shows them"


@dataclass
class _Column:
    key: str
    header: str
    justify: str = "right"
    cells: list[Text] = field(default_factory=list)
    wraps: bool = False  # a list of words that may wrap between words
    underline: bool = False

    def natural(self) -> int:
        return max([len(self.header)] + [c.cell_len for c in self.cells])

    def narrowest(self) -> int:
        """The least width that cuts no word: the longest word for wrapping lists."""
        if not self.wraps:
            return self.natural()
        longest = max([len(self.header)] + [len(w) for c in self.cells for w in c.plain.split()])
        return min(self.natural(), max(longest, _LIST_MIN))


def _fit(
    columns: list[_Column], width: int, order: tuple[str, ...]
) -> tuple[list[_Column], list[str]]:
    """Drop columns in ``order`` until the rest fit ``width``; return (kept, dropped keys)."""
    kept = list(columns)
    dropped: list[str] = []

    def needed() -> int:
        return sum(c.narrowest() + _COLUMN_EXTRA for c in kept) + 1

    for key in order:
        if needed() <= width:
            break
        if any(c.key == key for c in kept):
            kept = [c for c in kept if c.key != key]
            dropped.append(key)
    return kept, dropped


def _table(columns: list[_Column], title: Any, notes: list[str]) -> Table:
    table = Table(title=title, title_justify="left", caption_justify="left")
    for column in columns:
        header = Text(column.header, style="bold underline" if column.underline else "bold")
        if column.wraps:
            table.add_column(
                header, justify=column.justify, overflow="fold", min_width=column.narrowest()
            )
        else:
            table.add_column(header, justify=column.justify, no_wrap=True)
    for cells in zip(*(c.cells for c in columns), strict=True):
        table.add_row(*cells)
    if notes:
        table.caption = Text(" ".join(notes))
    return table


# ---------------------------------------------------------------------------- cells


def _number(value: Any, digits: int = 3) -> str:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return "-"
    return "-" if math.isnan(number) else f"{number:.{digits}f}"


def _q_cell(row: Any) -> Text:
    if _number(row.q) == "-":
        return Text("-")
    text = "<0.001" if row.q < 0.001 else f"{row.q:.2g}"
    return Text(f"{text}*", style="bold") if bool(row.significant) else Text(text)


def _change_cell(row: Any) -> Text:
    """The change point, shown only where the pages show it too (a significant word that moved
    away: :func:`drift.compare.changepoint.change_warranted`)."""
    from drift.compare.changepoint import change_warranted  # scipy.stats: only when ranking

    if not change_warranted(row._asdict()):
        return Text("-")
    return Text(f"{row.change_point} ({row.change_step:+.2f})")


def count_cell(count_from: Any, count_to: Any) -> Text:
    """The counts in the two compared slices, e.g. ``163 → 165``."""
    return Text(f"{count_from} {ARROW} {count_to}")


def _first_words(value: Any) -> Text:
    words = value.split() if isinstance(value, str) else []
    return Text(" ".join(words[:SHOWN_NEIGHBOURS]) or "-")


# ---------------------------------------------------------------------------- scores


def table_params(record: dict[str, Any]) -> dict[str, Any]:
    """What :func:`scores_table` reads from ``stages.rank`` of run.json: its params and the
    measures the evidence combined."""
    return {**record.get("params", {}),
            "evidence_measures": (record.get("evidence") or {}).get("measures")}


def scores_table(
    rows: pd.DataFrame, params: dict[str, Any], calibrated: bool, width: int | None = 160
) -> Table:
    """The top words: rank, word, the measures (the ranking one underlined), z, q, counts,
    change point and the strongest neighbours gained and lost.

    With ``width`` the table fits that many columns of screen: columns are dropped in
    :data:`DROP_ORDER` and the caption names them. ``width=None`` keeps every column.
    """
    first, last = params.get("between", ["?", "?"])
    measure = params.get("measure", "score")
    short = {"displacement": "displ.", "combined": "comb."}
    measures = ["displacement", "turnover", "local"]
    judged = measures_judged(measure)
    if score_column_of(measure) == "score":
        measures.insert(0, measure)
    columns = [_Column("#", "#"), _Column("word", "word", justify="left")]
    columns += [_Column(m, short.get(m, m), underline=m in judged) for m in measures]
    columns += [_Column("z", "z")] if calibrated else []
    columns += [
        _Column("q", "q"),
        _Column("count", "count"),
        _Column("change", "change", justify="left"),
    ]
    columns += [_Column(name, name, justify="left", wraps=True) for name in ("gained", "lost")]
    cell = {c.key: c.cells for c in columns}
    for row in rows.itertuples(index=False):
        values = row._asdict()
        cell["#"].append(Text(str(row.rank)))
        cell["word"].append(Text(str(row.word)))
        for m in measures:
            cell[m].append(Text(_number(values["score" if m == measure else m])))
        if calibrated:
            cell["z"].append(Text(_number(row.z, 1)))
        cell["q"].append(_q_cell(row))
        cell["count"].append(count_cell(row.count_from, row.count_to))
        cell["change"].append(_change_cell(row))
        cell["gained"].append(_first_words(row.gained))
        cell["lost"].append(_first_words(row.lost))
    order = tuple(key for key in DROP_ORDER if key not in judged and key != measure)
    kept, dropped = _fit(columns, width, order) if width else (columns, [])
    shown = {c.key for c in kept}
    phrase = measure_phrase(measure, params.get("evidence_measures"))
    notes = [
        f"z, q: the headline of two questions, both needed: did {phrase} "
        "move beyond noise, more than it moved between the control pair's random halves "
        "(noise_z, noise_q), and more than words of its frequency and noisiness "
        "moved here (drift null: drift_z, drift_q)? z is the smaller z, q the "
        f"Benjamini-Hochberg q of the larger p; * significant at alpha "
        f"{params.get('alpha', 0.05)}. scores.csv has both questions' numbers."
        if calibrated
        else "No control pair in this run: no headline z, p or q (only the drift null's "
        "drift_z, drift_q in scores.csv); the ranking is descriptive."
    ]
    if len(rows) and "significance_note" in rows and str(rows["significance_note"].iloc[0]):
        notes.append(str(rows["significance_note"].iloc[0]) + ".")
    if "count" in shown:
        notes.append(f"count: occurrences in {first} {ARROW} {last}.")
    if "change" in shown:
        notes.append(
            f"change: first slice after the change point (step in distance from "
            f"{params.get('reference', first)}), for significant words that moved away only."
        )
    if shown & {"gained", "lost"}:
        notes.append(
            f"{', '.join(k for k in ('gained', 'lost') if k in shown)}: neighbours, "
            f"strongest first (at most {SHOWN_NEIGHBOURS} shown; scores.csv has them all)."
        )
    if dropped:
        notes.append(f"Not shown at this width: {', '.join(dropped)} ({_WIDER}).")
    title = (
        f"Words that changed most from {first} to {last} "
        f"(ranked by z: {phrase} beyond noise and beyond the archive's drift)"
        if calibrated
        else f"Words that changed most from {first} to {last} (ranked by {measure})"
    )
    return _table(kept, title, notes)


# ---------------------------------------------------------------------------- slices

#: Columns of the slice summary dropped first on narrow screens (label and tokens stay).
SUMMARY_DROP_ORDER = ("dropped", "types", "start", "end", "documents")


def summary_view(summary: pd.DataFrame, title: str, width: int | None = None) -> Table:
    """The slice summary (label, start, end, documents, tokens, types, dropped): one row per
    slice; with ``width`` it fits, columns dropped in :data:`SUMMARY_DROP_ORDER`."""
    columns = [_Column("label", "label", justify="left")]
    columns += [_Column(name, name, justify="left") for name in ("start", "end")]
    columns += [_Column(name, name) for name in ("documents", "tokens", "types", "dropped")]
    for row in summary.itertuples(index=False):
        values = row._asdict()
        for column in columns:
            value = values[column.key]
            text = f"{int(value):,}" if column.justify == "right" else str(value)
            column.cells.append(Text(text))
    kept, dropped = _fit(columns, width, SUMMARY_DROP_ORDER) if width else (columns, [])
    notes = []
    if dropped:
        notes.append(f"Not shown at this width: {', '.join(dropped)} (a wider screen shows "
                     "them; slices/summary.csv has every column).")
    return _table(kept, Text(title), notes)


# ---------------------------------------------------------------------------- neighbours


def _slice_drop_order(shown: list[str]) -> tuple[str, ...]:
    """Slices dropped first on narrow screens: the inner ones, from the middle outwards; the first
    and the last slice stay."""
    inner = shown[1:-1]
    middle = (len(inner) - 1) / 2
    return tuple(sorted(inner, key=lambda label: abs(inner.index(label) - middle)))


def neighbours_table(
    word: str, frame: pd.DataFrame, labels: list[str], width: int | None = None
) -> Table:
    """One column per slice, one row per neighbour rank: 'neighbour similarity'.

    With ``width`` the table fits: cells wrap between the word and its similarity, then inner
    slices are dropped (from the middle outwards) and the caption names them.
    """
    shown = [label for label in labels if label in set(frame["slice"])]
    depth = int(frame["rank"].max()) if len(frame) else 0
    cells = {
        (r.slice, int(r.rank)): f"{r.neighbour} {r.similarity:.2f}" for r in frame.itertuples()
    }
    columns = [_Column("#", "#", cells=[Text(str(rank)) for rank in range(1, depth + 1)])]
    for label in shown:
        column = _Column(label, label, justify="left", wraps=True)
        column.cells = [Text(cells.get((label, rank), "")) for rank in range(1, depth + 1)]
        columns.append(column)
    kept, dropped = _fit(columns, width, _slice_drop_order(shown)) if width else (columns, [])
    notes = []
    absent = [label for label in labels if label not in shown]
    if absent:
        notes.append(f"Not in the vocabulary of: {', '.join(absent)}.")
    if dropped:
        notes.append(f"Slices not shown at this width: {', '.join(dropped)} ({_WIDER}).")
    return _table(kept, Text(f"Nearest neighbours of '{word}' per slice"), notes)


# ---------------------------------------------------------------------------- printing


def _natural_width(table_factory: Callable[[int | None], Any]) -> tuple[Any, int]:
    table = table_factory(None)
    probe = Console(width=10_000)
    return table, probe.measure(table).maximum


def print_table(table_factory: Callable[[int | None], Any], handle: IO[str] | None = None) -> None:
    """Print a table: fitted to the terminal, or whole (every column, its own width) into a file
    or a pipe. ``table_factory(width)`` builds the table for ``width`` columns (None: all)."""
    stream = handle if handle is not None else sys.stdout
    console = Console(file=stream)
    if handle is None and console.is_terminal:
        console.print(table_factory(console.width))
        return
    table, needed = _natural_width(table_factory)
    Console(file=stream, width=max(needed, 20), no_color=True, highlight=False).print(table)


def print_rows(
    rows: pd.DataFrame,
    fmt: str,
    table_factory: Callable[[int | None], Any],
    out: Path | None = None,
) -> None:
    """Print rows as csv, json (an array of row objects) or a table, on stdout or into ``out``."""
    from drift.compare.ranking import rows_as_json

    handle = None if out is None else Path(out).open("w", encoding="utf-8", newline="")
    stream = handle if handle is not None else sys.stdout
    try:
        if fmt == "csv":
            stream.write(rows.to_csv(index=False))
        elif fmt == "json":
            stream.write(rows_as_json(rows))  # ends with a newline
        else:
            print_table(table_factory, handle)
    finally:
        if handle is not None:
            handle.close()
