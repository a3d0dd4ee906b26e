"""How the rank commands look in a terminal: rich tables of scores and of neighbours.

Words are data from strangers: every cell is a :class:`rich.text.Text`, so a word such as
``[bold]`` is shown as typed and never read as console markup.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
from rich.table import Table
from rich.text import Text

#: Neighbours shown per cell in the scores table (the files hold all of them).
SHOWN_NEIGHBOURS = 4
#: Narrower screens get the compact scores table.
COMPACT_WIDTH = 130


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
    if not isinstance(row.change_point, str) or not row.change_point:
        return Text("-")
    return Text(f"{row.change_point} ({row.change_step:+.2f})")


def _first_words(value: Any) -> Text:
    words = value.split() if isinstance(value, str) else []
    more = len(words) - SHOWN_NEIGHBOURS
    shown = " ".join(words[:SHOWN_NEIGHBOURS]) + (f" +{more}" if more > 0 else "")
    return Text(shown or "-")


def scores_table(
    rows: pd.DataFrame, params: dict[str, Any], calibrated: bool, width: int = 160
) -> Table:
    """The top words: rank, word, the measures (the ranking one underlined), q, counts, change
    point and the strongest neighbours gained and lost. Below ``COMPACT_WIDTH`` columns of
    screen only the ranking measure and the neighbours gained are shown."""
    first, last = params.get("between", ["?", "?"])
    measure = params.get("measure", "score")
    table = Table(
        title=(
            f"Words that changed most from {first} to {last} "
            f"(ranked by z: {measure} beyond what frequency explains)"
            if calibrated
            else f"Words that changed most from {first} to {last} (ranked by {measure})"
        ),
        caption=(
            f"q: Benjamini-Hochberg q against the control null; * significant at alpha "
            f"{params.get('alpha', 0.05)}. change: first slice after the change point "
            f"(step in distance from {params.get('reference', first)})."
            if calibrated
            else "No control pair in this run: no z, p or q; the ranking is descriptive."
        ),
        title_justify="left",
        caption_justify="left",
    )
    compact = width < COMPACT_WIDTH
    measures = [measure] if compact else ["displacement", "turnover", "local"]
    if measure not in measures:
        measures.insert(0, measure)
    lists = ["gained"] if compact else ["gained", "lost"]
    short = {"displacement": "displ.", "combined": "comb."}
    columns = [("#", "right"), ("word", "left")] + [(m, "right") for m in measures]
    columns += [("z", "right")] if calibrated else []
    columns += [("q", "right"), ("count", "right"), ("change", "left")]
    for name, justify in columns:
        header = Text(short.get(name, name), style="bold underline" if name == measure else "bold")
        table.add_column(header, justify=justify, no_wrap=True)
    for name in lists:
        table.add_column(Text(name, style="bold"), overflow="fold", ratio=1, min_width=12)
    for row in rows.itertuples(index=False):
        values = row._asdict()
        table.add_row(
            Text(str(row.rank)),
            Text(str(row.word)),
            *(Text(_number(values["score" if m == measure else m])) for m in measures),
            *([Text(_number(row.z, 1))] if calibrated else []),
            _q_cell(row),
            Text(f"{row.count_from}>{row.count_to}"),
            _change_cell(row),
            *(_first_words(getattr(row, name)) for name in lists),
        )
    return table


def neighbours_table(word: str, frame: pd.DataFrame, labels: list[str]) -> Table:
    """One column per slice, one row per neighbour rank: 'neighbour similarity'."""
    table = Table(title=Text(f"Nearest neighbours of '{word}' per slice"), title_justify="left")
    table.add_column("#", justify="right")
    shown = [label for label in labels if label in set(frame["slice"])]
    for label in shown:
        table.add_column(label, overflow="fold")
    depth = int(frame["rank"].max()) if len(frame) else 0
    cells = {
        (r.slice, int(r.rank)): f"{r.neighbour} {r.similarity:.2f}" for r in frame.itertuples()
    }
    for rank in range(1, depth + 1):
        table.add_row(Text(str(rank)), *(Text(cells.get((label, rank), "")) for label in shown))
    absent = [label for label in labels if label not in shown]
    if absent:
        table.caption = Text(f"Not in the vocabulary of: {', '.join(absent)}")
        table.caption_justify = "left"
    return table
