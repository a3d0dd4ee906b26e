"""Plotly figures for one word and for the overview: data in, ``plotly.graph_objects.Figure`` out.

The functions here read no files; :mod:`drift.publish.report` gathers the data from the run
folder. Every trace carries a ``meta`` string naming its role (``"distance"``, ``"seed-band"``,
...), so tests and callers can find it without relying on legend wording.

Colours come from the Okabe-Ito palette (Okabe and Ito 2008, "Color Universal Design"), which
stays distinguishable under the common colour-vision deficiencies; the heatmap uses the
ColorBrewer YlOrBr sequential scheme, recommended for colour-blind readers by Paul Tol's notes.
Words are data from strangers: every word that reaches a figure goes through :func:`plot_text`,
because plotly renders a subset of HTML tags in labels and hover text.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import pandas as pd
import plotly.graph_objects as go
from plotly.subplots import make_subplots

from drift.options import score_column_of
from drift.publish.wordviews import ChangeRange, WordGeometry

#: Okabe-Ito colours by name (hex values as published by Okabe and Ito, 2008).
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
#: Line colours in order; yellow is left out because it is hard to see on white paper.
LINE_COLOURS = [
    OKABE_ITO[name]
    for name in (
        "blue", "vermillion", "bluish_green", "reddish_purple", "orange", "sky_blue", "black"
    )
]
#: ColorBrewer YlOrBr (9 classes), light = low similarity, dark = high.
YLORBR = ["#FFFFE5", "#FFF7BC", "#FEE391", "#FEC44F", "#FB9A29", "#EC7014", "#CC4C02", "#993404",
          "#662506"]
GREY = "#BBBBBB"
LIGHT_GREY = "#EEEEEE"
INK = "#222222"
FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Helvetica Neue', Arial, sans-serif"


def plot_text(text: object) -> str:
    """Text made safe for plotly labels and hover: markup characters become entities.

    Plotly draws ``<b>``, ``<a href>``, ``<br>`` and similar tags found in text; it decodes
    ``&lt;``, ``&gt;`` and ``&amp;`` back to characters, so an escaped word shows as written.
    """
    return str(text).replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


_AXIS = {
    "linecolor": "rgb(36,36,36)",
    "showline": True,
    "ticks": "outside",
    "zeroline": False,
    "automargin": True,
    "title": {"standoff": 12},
    "gridcolor": LIGHT_GREY,
}
#: A small plain template (white, axis lines, outside ticks). Figures are built in one go from a
#: layout dictionary: plotly applies and copies its default template on every update_layout call,
#: which made a word page take about half a second to build.
TEMPLATE = {
    "layout": {
        "xaxis": _AXIS,
        "yaxis": _AXIS,
        "colorway": LINE_COLOURS,
        "hovermode": "closest",
        "paper_bgcolor": "white",
        "plot_bgcolor": "white",
    }
}


def _base_layout(
    title: str, x_title: str, y_title: str, height: int = 380, **axes: dict
) -> dict:
    """The layout every figure starts from; ``xaxis={...}`` etc. add to the axis settings."""
    layout = {
        "template": TEMPLATE,
        "title": {"text": title, "x": 0, "xanchor": "left", "font": {"size": 15}},
        "font": {"family": FONT, "size": 13, "color": INK},
        "height": height,
        "margin": {"l": 70, "r": 30, "t": 56, "b": 60},
        "xaxis": {"title": {"text": x_title}, "showgrid": False},
        "yaxis": {"title": {"text": y_title}, "showgrid": True, "gridcolor": LIGHT_GREY},
        "hoverlabel": {"font": {"family": FONT}},
        "legend": {"orientation": "h", "x": 0, "y": -0.22, "xanchor": "left", "yanchor": "top"},
        "paper_bgcolor": "white",
        "plot_bgcolor": "white",
    }
    for name, extra in axes.items():
        layout[name] = {**layout.get(name, {}), **extra}
    return layout


def _figure(traces: list, layout: dict) -> go.Figure:
    return go.Figure(data=traces, layout=layout)


def _fmt(value: object, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    return f"{float(value):.{digits}g}"


def _word_rows(timeline: pd.DataFrame, slices: Sequence[str]) -> pd.DataFrame:
    """One row per slice (time order) from a word's timeline rows; missing slices are NaN."""
    columns = ["distance", "distance_sd", "turnover", "count", "fpm", "null_p95", "typical"]
    rows = timeline.drop_duplicates("slice").set_index("slice").reindex(list(slices))
    for column in columns:
        if column not in rows:
            rows[column] = np.nan
    return rows[columns].astype(float)


# ---------------------------------------------------------------------------- one word


#: The timeline's y axis runs from 0 to this cosine distance on every page (further only when a
#: value exceeds it), so a word that moved 0.2 does not look like one that moved 1.1.
DISTANCE_AXIS_MAX = 1.2


def distance_axis_max(*values: object) -> float:
    """The top of the timeline's y axis: :data:`DISTANCE_AXIS_MAX`, or just above larger values."""
    finite = [float(v) for arr in values for v in np.ravel(np.asarray(arr, dtype=float))
              if np.isfinite(v)]
    top = max(finite, default=0.0)
    return DISTANCE_AXIS_MAX if top <= DISTANCE_AXIS_MAX else float(np.ceil(top * 10) / 10)


def timeline_figure(
    timeline: pd.DataFrame,
    *,
    word: str,
    slices: Sequence[str],
    reference: str | None = None,
    change: ChangeRange | None = None,
) -> go.Figure:
    """The word's cosine distance from the reference slice per slice.

    ``timeline`` holds the word's rows of timeline.parquet (``slice, distance, distance_sd,
    turnover, count, fpm, null_p95`` and, where the rank stage wrote it, ``typical``). Drawn: the
    seed spread (distance ± 1 sd) as a band; the control's per-slice 95th percentile at the word's
    frequency as a grey band from zero; the corpus's typical movement at the word's frequency as a
    dotted line where known; the turnover (hidden until picked in the legend); and, when
    ``change`` is given, the change point as a dashed line with its range shaded. The y axis runs
    from 0 to :func:`distance_axis_max` on every page.
    """
    rows = _word_rows(timeline, slices)
    x = list(slices)
    distance = rows["distance"].to_numpy()
    spread = np.nan_to_num(rows["distance_sd"].to_numpy())
    ref_text = plot_text(reference) if reference else "the reference slice"
    traces = []
    null = rows["null_p95"].to_numpy()
    typical = rows["typical"].to_numpy()
    if np.isfinite(null).any():
        traces.append(
            go.Scatter(
                x=x + x[::-1],
                y=list(np.nan_to_num(null)) + [0.0] * len(x),
                fill="toself",
                mode="lines",
                fillcolor="rgba(150,150,150,0.22)",
                line={"width": 0},
                hoverinfo="skip",
                name="control: 95th percentile at this frequency",
                meta="null-band",
            )
        )
    if np.isfinite(typical).any():
        traces.append(
            go.Scatter(
                x=x,
                y=typical,
                mode="lines",
                line={"color": INK, "width": 1.2, "dash": "dot"},
                name="typical movement at this frequency",
                hovertemplate="%{x}<br>typical movement %{y:.3f}<extra></extra>",
                meta="typical",
            )
        )
    traces.append(
        go.Scatter(
            x=x + x[::-1],
            y=list(distance + spread) + list((distance - spread)[::-1]),
            fill="toself",
            mode="lines",
            fillcolor="rgba(0,114,178,0.18)",
            line={"width": 0},
            hoverinfo="skip",
            name="seed spread (± 1 sd)",
            meta="seed-band",
        )
    )
    hover = [
        f"{plot_text(s)}<br>distance {_fmt(d)} ± {_fmt(sd)}<br>control 95%: {_fmt(n)}"
        for s, d, sd, n in zip(x, distance, rows["distance_sd"], null, strict=True)
    ]
    traces.append(
        go.Scatter(
            x=x,
            y=distance,
            mode="lines+markers",
            line={"color": OKABE_ITO["blue"], "width": 2.5},
            marker={"size": 8},
            name=f"cosine distance from {ref_text}",
            text=hover,
            customdata=np.column_stack([distance, rows["distance_sd"].to_numpy()]),
            hovertemplate="%{text}<extra></extra>",
            meta="distance",
        )
    )
    traces.append(
        go.Scatter(
            x=x,
            y=rows["turnover"].to_numpy(),
            mode="lines+markers",
            line={"color": OKABE_ITO["vermillion"], "width": 1.5, "dash": "dot"},
            marker={"size": 6, "symbol": "square"},
            name="neighbour turnover (Jaccard distance)",
            hovertemplate="%{x}<br>turnover %{y:.3f}<extra></extra>",
            visible="legendonly",
            meta="turnover",
        )
    )
    top = distance_axis_max(distance + spread, null, typical)
    layout = _base_layout(
        f"How far “{plot_text(word)}” moved from {ref_text}",
        "",
        "cosine distance",
        xaxis={"type": "category", "categoryorder": "array", "categoryarray": x},
        yaxis={"range": [0, top], "fixedrange": False},
    )
    if change is not None and change.point in x and x.index(change.point) > 0:
        at = x.index(change.point) - 0.5
        low, high = x.index(change.low) - 0.5, x.index(change.high) - 0.5
        layout["shapes"] = [
            {"type": "rect", "x0": low - 0.06, "x1": high + 0.06, "xref": "x", "y0": 0, "y1": 1,
             "yref": "paper", "fillcolor": "rgba(230,159,0,0.18)", "line": {"width": 0},
             "layer": "below"},
            {"type": "line", "x0": at, "x1": at, "xref": "x", "y0": 0, "y1": 1, "yref": "paper",
             "line": {"color": INK, "dash": "dash", "width": 1.5}},
        ]
        before, after = x[x.index(change.point) - 1], change.point
        layout["annotations"] = [
            {"x": at, "y": 1, "yref": "paper", "yanchor": "bottom", "xanchor": "center",
             "showarrow": False, "font": {"size": 12},
             "text": f"change: {plot_text(before)} → {plot_text(after)}"}
        ]
    return _figure(traces, layout)


def neighbour_heatmap(
    neighbours: pd.DataFrame,
    *,
    word: str,
    slices: Sequence[str],
    k: int | None = None,
) -> go.Figure:
    """The union of the word's top neighbours (rows) against the slices (columns).

    ``neighbours`` has columns ``slice, rank, neighbour, similarity``. A cell holds the cosine
    similarity where the neighbour is among the word's top ``k`` in that slice and is left
    (empty) where it is not, so neighbours that arrive and leave stand out. Rows are ordered by the
    slice where the neighbour first appears, then by its best rank.
    """
    x = list(slices)
    table = neighbours[neighbours["slice"].isin(x)]
    order = {label: i for i, label in enumerate(x)}
    if table.empty:
        names: list[str] = []
    else:
        first = table.assign(at=table["slice"].map(order)).groupby("neighbour").agg(
            first=("at", "min"), best=("rank", "min"), mean_sim=("similarity", "mean")
        )
        first = first.sort_values(["first", "best", "mean_sim"], ascending=[True, True, False])
        names = list(first.index)
    sim = table.pivot_table(index="neighbour", columns="slice", values="similarity", aggfunc="max")
    rank = table.pivot_table(index="neighbour", columns="slice", values="rank", aggfunc="min")
    sim = sim.reindex(index=names, columns=x)
    rank = rank.reindex(index=names, columns=x)
    k_text = f"top {k}" if k else "top neighbours"
    hover = [
        [
            (
                f"{plot_text(name)} in {plot_text(label)}<br>similarity {sim.at[name, label]:.3f}"
                f"<br>rank {int(rank.at[name, label])}"
            )
            if pd.notna(sim.at[name, label])
            else f"{plot_text(name)} in {plot_text(label)}<br>not in the {k_text}"
            for label in x
        ]
        for name in names
    ]
    # The palest classes are left out so a low similarity never looks like an empty cell.
    colours = YLORBR[2:]
    colourscale = [[i / (len(colours) - 1), c] for i, c in enumerate(colours)]
    heatmap = (
        go.Heatmap(
            z=sim.to_numpy(dtype=float),
            x=x,
            y=[plot_text(n) for n in names],
            text=hover,
            hovertemplate="%{text}<extra></extra>",
            hoverongaps=True,
            colorscale=colourscale,
            colorbar={"title": {"text": "cosine<br>similarity", "side": "top"}, "thickness": 14},
            xgap=2,
            ygap=2,
            meta="neighbours",
        )
    )
    height = max(260, 120 + 24 * len(names))
    layout = _base_layout(
        f"Nearest neighbours of “{plot_text(word)}” per slice ({k_text}; empty = not among them)",
        "",
        "neighbour",
        height=height,
        xaxis={"type": "category", "side": "top", "showline": False, "ticks": ""},
        yaxis={"autorange": "reversed", "type": "category", "showgrid": False,
               "showline": False, "ticks": "", "dtick": 1},
    )
    layout["margin"] = {"l": 150, "r": 30, "t": 56, "b": 60}
    return _figure([heatmap], layout)


def frequency_figure(timeline: pd.DataFrame, *, word: str, slices: Sequence[str]) -> go.Figure:
    """The word's frequency per million tokens in each slice (bars), with raw counts on hover."""
    rows = _word_rows(timeline, slices)
    counts = [_fmt(int(c)) if pd.notna(c) else "n/a" for c in rows["count"]]
    bars = (
        go.Bar(
            x=list(slices),
            y=rows["fpm"].to_numpy(),
            marker={"color": OKABE_ITO["bluish_green"]},
            text=counts,
            customdata=counts,
            textposition="none",
            hovertemplate=(
                "%{x}<br>%{y:.1f} per million<br>%{customdata} occurrences<extra></extra>"
            ),
            name="frequency per million tokens",
            meta="frequency",
        )
    )
    layout = _base_layout(
        f"How often “{plot_text(word)}” occurs",
        "time slice",
        "per million tokens",
        height=300,
        xaxis={"type": "category"},
    )
    layout["showlegend"] = False
    return _figure([bars], layout)


#: Neighbours named on the path figure: those among the word's best this many in some slice
#: (the others are drawn unnamed, with their name on hover).
PATH_LABELS = 3


def path_figure(geometry: WordGeometry, *, word: str, slices: Sequence[str]) -> go.Figure:
    """The word's path through the slices among its neighbours, in two dimensions.

    Points are PCA scores of aligned vectors (see :mod:`drift.publish.wordviews`): the word in each
    slice (joined in time order, labelled by slice) and each neighbour where it ranked best (grey,
    named when it was among the word's best :data:`PATH_LABELS` somewhere). The two axes are
    scaled separately, each to its component's range.
    """
    path, near = geometry.path, geometry.neighbours
    named = set(near["neighbour"][near["rank"] <= PATH_LABELS]) if "rank" in near else set()
    order = {label: i for i, label in enumerate(slices)}
    path = path.sort_values("slice", key=lambda s: s.map(order), kind="stable")
    traces = [
        go.Scatter(
            x=near["x"],
            y=near["y"],
            mode="markers+text",
            text=[plot_text(n) if n in named else "" for n in near["neighbour"]],
            textposition="top center",
            textfont={"size": 11, "color": "#555555"},
            marker={"color": GREY, "size": 6, "symbol": "circle-open"},
            customdata=np.column_stack([[plot_text(n) for n in near["neighbour"]],
                                        [plot_text(s) for s in near["slice"]]])
            if len(near) else None,
            hovertemplate="%{customdata[0]}<br>neighbour, placed as in %{customdata[1]}"
            "<extra></extra>",
            name="neighbours (where each ranked best)",
            meta="path-neighbours",
        ),
        go.Scatter(
            x=path["x"],
            y=path["y"],
            mode="lines+markers+text",
            text=[plot_text(s) for s in path["slice"]],
            textposition="bottom center",
            textfont={"size": 12, "color": OKABE_ITO["blue"]},
            line={"color": OKABE_ITO["blue"], "width": 2},
            marker={"size": 9, "color": OKABE_ITO["blue"], "symbol": "diamond"},
            hovertemplate=f"{plot_text(word)} in %{{text}}<extra></extra>",
            name=f"“{plot_text(word)}” in each slice",
            meta="path",
        ),
    ]
    first, second = geometry.explained
    layout = _base_layout(
        f"Path of “{plot_text(word)}” among its neighbours",
        f"component 1 ({first:.0%} of variance)",
        f"component 2 ({second:.0%} of variance)",
        height=440,
        xaxis={"showgrid": False, "zeroline": False, "showticklabels": False, "ticks": ""},
        yaxis={"showgrid": False, "zeroline": False, "showticklabels": False, "ticks": ""},
    )
    return _figure(traces, layout)


def self_similarity_figure(
    matrix: pd.DataFrame, *, word: str, slices: Sequence[str]
) -> go.Figure:
    """Cosine similarity of the word's aligned vectors between every two slices (0 to 1 scale)."""
    x = list(slices)
    values = matrix.reindex(index=x, columns=x).to_numpy(dtype=float)
    colours = YLORBR[1:]
    heatmap = go.Heatmap(
        z=values,
        x=x,
        y=x,
        zmin=0.0,
        zmax=1.0,
        colorscale=[[i / (len(colours) - 1), c] for i, c in enumerate(colours)],
        texttemplate="%{z:.2f}",
        hovertemplate=f"{plot_text(word)}: %{{y}} vs %{{x}}<br>cosine similarity %{{z:.3f}}"
        "<extra></extra>",
        hoverongaps=False,
        colorbar={"title": {"text": "cosine<br>similarity", "side": "top"}, "thickness": 14},
        xgap=2,
        ygap=2,
        meta="self-similarity",
    )
    size = max(300, 140 + 44 * len(x))
    layout = _base_layout(
        f"“{plot_text(word)}” compared with itself across slices",
        "",
        "",
        height=size,
        xaxis={"type": "category", "showline": False, "ticks": "", "showgrid": False},
        yaxis={"type": "category", "autorange": "reversed", "showline": False, "ticks": "",
               "showgrid": False},
    )
    return _figure([heatmap], layout)


def word_figures(
    timeline: pd.DataFrame,
    neighbours: pd.DataFrame,
    *,
    word: str,
    slices: Sequence[str],
    reference: str | None = None,
    change: ChangeRange | None = None,
    k: int | None = None,
    geometry: WordGeometry | None = None,
) -> dict[str, go.Figure]:
    """The figures of a word page: ``timeline``, ``neighbours``, ``frequency`` and, with
    ``geometry``, ``path`` and ``self_similarity``."""
    figures = {
        "timeline": timeline_figure(
            timeline, word=word, slices=slices, reference=reference, change=change
        ),
        "neighbours": neighbour_heatmap(neighbours, word=word, slices=slices, k=k),
        "frequency": frequency_figure(timeline, word=word, slices=slices),
    }
    if geometry is not None:
        figures["path"] = path_figure(geometry, word=word, slices=slices)
        figures["self_similarity"] = self_similarity_figure(
            geometry.self_similarity, word=word, slices=slices
        )
    return figures


# ---------------------------------------------------------------------------- overview


def rarer_count(scores: pd.DataFrame) -> pd.Series:
    """Each word's count in the rarer of the two compared slices (at least 1).

    This is the frequency the calibration judges a word by (drift.compare.calibration: a vector is
    only as stable as its less frequent side), so the null centre is a curve along this axis.
    """
    rarer = np.minimum(scores["count_from"].astype(float), scores["count_to"].astype(float))
    return np.maximum(rarer, 1.0)


def measure_column(scores: pd.DataFrame, measure: str | None) -> str:
    """The scores column holding the calibrated measure: the measure's own column or ``score``."""
    column = score_column_of(measure or "displacement")
    return column if column in scores else "score"


def plotted_words(
    scores: pd.DataFrame, max_points: int = 5000, keep_top: int = 500
) -> pd.DataFrame:
    """The rows to draw in the overview scatter: all of them, or the best ``keep_top`` by rank
    plus a seeded random sample of the rest when there are more than ``max_points``."""
    if len(scores) <= max_points:
        return scores
    ordered = scores.sort_values("rank", kind="stable")
    rest = ordered.iloc[keep_top:].sample(n=max_points - keep_top, random_state=0)
    return pd.concat([ordered.iloc[:keep_top], rest])


MEASURE_TITLES = {
    "displacement": "cosine displacement",
    "turnover": "neighbour turnover (Jaccard)",
    "local": "local neighbourhood change",
}


#: Significant words labelled by name on the overview scatter (the best ranked ones).
LABELLED_POINTS = 12
#: Label positions taken in turn, so names of nearby points do not all sit on one side.
LABEL_POSITIONS = ["top right", "bottom right", "top left", "bottom left"]
#: The null's spread is drawn as its centre ± this many spread units (z between -2 and 2).
SPREAD_UNITS = 2.0


def change_vs_frequency_figure(
    scores: pd.DataFrame,
    *,
    measure: str | None = "displacement",
    links: dict[str, str] | None = None,
    alpha: float | None = None,
    max_points: int = 5000,
    labelled: int = LABELLED_POINTS,
) -> go.Figure:
    """The ranked measure of every scored word against its frequency (log scale), word on hover.

    x is the word's count in the rarer of the two compared slices, the frequency the null is a
    function of; y is the measure the ranking calibrated (``measure`` names it). The control's
    null centre (column ``null_centre``) is drawn as a line and its spread as a band (centre ±
    :data:`SPREAD_UNITS` × ``null_spread``), so the frequency confound (rare words move more) is
    visible. Significant words are filled vermillion diamonds, the best ``labelled`` of them
    named; the rest are hollow grey circles: they differ by shape as well as colour. ``links``
    maps words to page addresses that a click on the point opens (see drift.publish.report).
    Hover data (``customdata``): word, rank, z, q, count from, count to, link.
    """
    rows = plotted_words(scores, max_points=max_points)
    links = links or {}
    column = measure_column(rows, measure)
    traces = []
    if "null_centre" in rows and rows["null_centre"].notna().any():
        line = pd.DataFrame(
            {"x": rarer_count(rows), "y": rows["null_centre"].astype(float),
             "s": rows["null_spread"].astype(float) if "null_spread" in rows else np.nan}
        )
        line = line.dropna(subset=["y"]).sort_values("x", kind="stable").drop_duplicates("x")
        if line["s"].notna().any():
            band = line.dropna(subset=["s"])
            traces.append(
                go.Scatter(
                    x=list(band["x"]) + list(band["x"][::-1]),
                    y=list(band["y"] + SPREAD_UNITS * band["s"])
                    + list((band["y"] - SPREAD_UNITS * band["s"])[::-1]),
                    fill="toself",
                    mode="lines",
                    fillcolor="rgba(120,120,120,0.16)",
                    line={"width": 0},
                    hoverinfo="skip",
                    name=f"control null spread (z from −{SPREAD_UNITS:g} to {SPREAD_UNITS:g})",
                    meta="null-spread",
                )
            )
        traces.append(
            go.Scatter(
                x=line["x"],
                y=line["y"],
                mode="lines",
                line={"color": INK, "width": 1.5},
                name="control null centre at this frequency",
                hoverinfo="skip",
                meta="null-centre",
            )
        )
    if "significant" in rows:
        significant = rows["significant"].fillna(False).astype(bool)
    else:
        significant = pd.Series(False, index=rows.index)
    alpha_text = f" (q ≤ {alpha:g})" if alpha else ""
    named = set(
        rows[significant].sort_values("rank", kind="stable")["word"].head(max(labelled, 0))
    )
    styles = (
        (False, "not significant", {"color": GREY, "symbol": "circle-open", "size": 7}, "words"),
        (True, f"significant{alpha_text}",
         {"color": OKABE_ITO["vermillion"], "symbol": "diamond", "size": 9}, "significant"),
    )
    for flag, name, marker, role in styles:
        part = rows[significant == flag]
        if part.empty and flag:
            continue
        custom = np.empty((len(part), 7), dtype=object)
        for i, (w, r, z, q, cf, ct) in enumerate(
            zip(part["word"], part["rank"], part["z"], part["q"], part["count_from"],
                part["count_to"], strict=True)
        ):
            custom[i] = [plot_text(w), int(r), _num(z), _num(q), int(cf), int(ct),
                         links.get(w, "")]
        text = [plot_text(w) if w in named else "" for w in part["word"]]
        traces.append(
            go.Scatter(
                x=rarer_count(part),
                y=part[column].astype(float),
                mode="markers+text" if flag and named else "markers",
                text=text if flag else None,
                textposition=[LABEL_POSITIONS[i % len(LABEL_POSITIONS)]
                              for i in range(len(part))] if flag else "top right",
                textfont={"size": 11, "color": INK},
                marker=marker,
                name=name,
                customdata=custom,
                hovertemplate=(
                    "<b>%{customdata[0]}</b> (rank %{customdata[1]})<br>"
                    f"{column} %{{y:.3f}}<br>"
                    "z %{customdata[2]:.3g}, q %{customdata[3]:.3g}<br>"
                    "count %{customdata[4]:,} → %{customdata[5]:,}<extra></extra>"
                ),
                meta=role,
            )
        )
    note = "" if len(rows) == len(scores) else f" ({len(rows):,} of {len(scores):,} words drawn)"
    layout = _base_layout(
        f"Change against frequency{note}",
        "count in the rarer compared slice (log scale)",
        MEASURE_TITLES.get(column, f"score ({plot_text(measure or 'score')})"),
        height=480,
        xaxis={"type": "log"},
    )
    return _figure(traces, layout)


def _num(value: object) -> float | None:
    """A number for plotly data: None (JSON null) for missing values."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(number) else number


#: Line dashes and marker symbols, so lines differ by more than colour.
DASHES = ["solid", "dash", "dot", "dashdot", "longdash", "longdashdot"]
SYMBOLS = ["circle", "square", "diamond", "triangle-up", "x", "cross", "star"]


def terms_figure(terms: pd.DataFrame, *, slices: Sequence[str], per_kind: int = 6) -> go.Figure:
    """Frequency curves (per million) of the strongest emerging and fading terms, side by side.

    ``terms`` has columns ``word, kind, count_from, count_to, fpm_from, fpm_to`` and one
    ``fpm:<label>`` column per slice. Every line has its own colour, dash and marker across both
    panels, so no two words look alike and none is told apart by colour alone.
    """
    x = list(slices)
    fig = make_subplots(rows=1, cols=2, subplot_titles=("emerging", "fading"), shared_yaxes=False,
                        horizontal_spacing=0.14)
    line = 0
    for col, kind in enumerate(("emerging", "fading"), start=1):
        part = terms[terms["kind"] == kind]
        growth = (part["fpm_to"] - part["fpm_from"]).abs()
        part = part.loc[growth.sort_values(ascending=False, kind="stable").index].head(per_kind)
        for _, row in part.iterrows():
            values = [float(row.get(f"fpm:{label}", np.nan)) for label in x]
            fig.add_trace(
                go.Scatter(
                    x=x,
                    y=values,
                    mode="lines+markers",
                    name=plot_text(row["word"]),
                    legendgroup=kind,
                    legendgrouptitle={"text": kind},
                    line={"color": LINE_COLOURS[line % len(LINE_COLOURS)],
                          "dash": DASHES[line % len(DASHES)]},
                    marker={"symbol": SYMBOLS[line % len(SYMBOLS)], "size": 7},
                    hovertemplate=f"{plot_text(row['word'])}<br>%{{x}}: %{{y:.1f}} per million"
                    "<extra></extra>",
                    meta=kind,
                ),
                row=1,
                col=col,
            )
            line += 1
    layout = _base_layout(
        "Emerging and fading terms", "time slice", "per million tokens", height=480
    )
    layout.pop("xaxis")
    layout.pop("yaxis")
    layout["legend"] = {"orientation": "h", "x": 0, "y": -0.2, "xanchor": "left",
                        "yanchor": "top", "groupclick": "toggleitem"}
    fig.update_layout(**layout)
    fig.update_xaxes(type="category")
    fig.update_yaxes(title_text="per million tokens", gridcolor=LIGHT_GREY, showgrid=True,
                     rangemode="tozero")
    return fig
