"""The figures hold the fixture run's numbers, in slice order, with words escaped for plotly."""

from __future__ import annotations

import html
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import pytest
from chart_run_fixture import HOSTILE_WORDS, LABELS, fixture_run_copy

from drift.embed.training import read_keyed_vectors
from drift.publish import charts
from drift.publish.wordviews import ChangeRange
from drift.runfolder import RunPaths

WORD = "government"


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return fixture_run_copy(tmp_path_factory.mktemp("charts") / "run")


@pytest.fixture(scope="module")
def timeline(run) -> pd.DataFrame:
    return pd.read_parquet(RunPaths(run).timeline_parquet)


@pytest.fixture(scope="module")
def scores(run) -> pd.DataFrame:
    return pd.read_parquet(RunPaths(run).scores_parquet)


def gensim_neighbours(run: Path, word: str, k: int = 10) -> pd.DataFrame:
    """Reference neighbours straight from gensim's KeyedVectors.most_similar (seed 0)."""
    rows = []
    for label in LABELS:
        kv = read_keyed_vectors(RunPaths(run).model_file(label, 0))
        for rank, (other, sim) in enumerate(kv.most_similar(word, topn=k), start=1):
            rows.append({"slice": label, "rank": rank, "neighbour": other, "similarity": sim})
    return pd.DataFrame(rows)


def trace(fig: go.Figure, role: str):
    found = [t for t in fig.data if t.meta == role]
    assert len(found) == 1, f"expected one {role} trace, found {len(found)}"
    return found[0]


def word_rows(timeline: pd.DataFrame, word: str) -> pd.DataFrame:
    return timeline[timeline["word"] == word].set_index("slice").loc[list(LABELS)]


# ---------------------------------------------------------------------------- timeline


def change(point: str, low: str | None = None, high: str | None = None) -> ChangeRange:
    return ChangeRange(point, 0.3, low or point, high or point, 0.9, 1000)


def test_timeline_traces_hold_distance_spread_and_null(timeline):
    rows = word_rows(timeline, WORD)
    # shuffled input order must not matter: the figure follows the slice order it is given
    shuffled = timeline[timeline["word"] == WORD].sample(frac=1, random_state=1)
    fig = charts.timeline_figure(
        shuffled, word=WORD, slices=LABELS, reference=LABELS[0], change=change(LABELS[1])
    )
    distance = trace(fig, "distance")
    assert list(distance.x) == list(LABELS)
    np.testing.assert_allclose(distance.y, rows["distance"].to_numpy())
    band = trace(fig, "seed-band")
    upper = (rows["distance"] + rows["distance_sd"]).to_numpy()
    lower = (rows["distance"] - rows["distance_sd"]).to_numpy()
    np.testing.assert_allclose(band.y, np.concatenate([upper, lower[::-1]]))
    null = trace(fig, "null-band")
    np.testing.assert_allclose(null.y[: len(LABELS)], rows["null_p95"].to_numpy())
    np.testing.assert_allclose(null.y[len(LABELS) :], 0.0)
    assert "95th percentile" in null.name  # labelled for what it is
    np.testing.assert_allclose(trace(fig, "turnover").y, rows["turnover"].to_numpy())
    assert trace(fig, "turnover").visible == "legendonly"


def test_timeline_marks_the_change_point_before_its_slice_with_its_range(timeline):
    fig = charts.timeline_figure(
        timeline[timeline["word"] == WORD], word=WORD, slices=LABELS,
        change=change(LABELS[2], low=LABELS[1], high=LABELS[2]),
    )
    lines = [s for s in fig.layout.shapes if s.type == "line"]
    assert len(lines) == 1
    assert lines[0].x0 == lines[0].x1 == pytest.approx(1.5)  # between slice 2 and slice 3
    (shaded,) = [s for s in fig.layout.shapes if s.type == "rect"]
    # the range runs from the boundary before slice 2 to the one before slice 3
    assert shaded.x0 < 0.5 < 1.5 < shaded.x1
    assert any(f"{LABELS[1]} → {LABELS[2]}" in a.text for a in fig.layout.annotations)


def test_timeline_without_change_point_or_null(timeline):
    rows = timeline[timeline["word"] == WORD].assign(null_p95=np.nan)
    fig = charts.timeline_figure(rows, word=WORD, slices=LABELS, change=None)
    assert not fig.layout.shapes
    assert all(t.meta != "null-band" for t in fig.data)
    assert all(t.meta != "typical" for t in fig.data)


def test_timeline_draws_the_typical_movement_when_the_run_has_it(timeline):
    rows = timeline[timeline["word"] == WORD].assign(typical=0.25)
    line = trace(charts.timeline_figure(rows, word=WORD, slices=LABELS), "typical")
    np.testing.assert_allclose(line.y, 0.25)


def test_timeline_y_axis_is_the_same_on_every_page(timeline):
    # a word that moved 0.2 and one that moved 1.1 are drawn on one scale
    rows = timeline[timeline["word"] == WORD].assign(null_p95=0.1)
    tops = set()
    for moved in (0.2, 0.5, 1.1):
        shaped = rows.assign(distance=np.linspace(0, moved, len(rows)), distance_sd=0.01)
        fig = charts.timeline_figure(shaped, word=WORD, slices=LABELS)
        tops.add(tuple(fig.layout.yaxis.range))
    assert tops == {(0, charts.DISTANCE_AXIS_MAX)}
    # a value beyond the fixed top extends the axis rather than being cut off
    far = timeline[timeline["word"] == WORD].assign(distance=1.43, distance_sd=0.0)
    fig = charts.timeline_figure(far, word=WORD, slices=LABELS)
    assert fig.layout.yaxis.range[1] >= 1.43


def test_timeline_leaves_missing_slices_empty(timeline):
    rows = timeline[(timeline["word"] == WORD) & (timeline["slice"] != LABELS[1])]
    fig = charts.timeline_figure(rows, word=WORD, slices=LABELS)
    assert np.isnan(trace(fig, "distance").y[1])


def test_axes_are_labelled(timeline, scores, run):
    rows = timeline[timeline["word"] == WORD]
    figures = [
        charts.timeline_figure(rows, word=WORD, slices=LABELS, reference=LABELS[0]),
        charts.frequency_figure(rows, word=WORD, slices=LABELS),
        charts.change_vs_frequency_figure(scores),
    ]
    assert figures[0].layout.yaxis.title.text  # its x axis holds the slice labels
    for fig in figures[1:]:
        assert fig.layout.xaxis.title.text and fig.layout.yaxis.title.text
    assert "per million" in figures[1].layout.yaxis.title.text
    assert "cosine" in figures[0].layout.yaxis.title.text


# ---------------------------------------------------------------------------- neighbours


def test_heatmap_cells_are_gensim_similarities_and_gaps_elsewhere(run):
    table = gensim_neighbours(run, WORD, k=10)
    fig = charts.neighbour_heatmap(table, word=WORD, slices=LABELS, k=10)
    heat = trace(fig, "neighbours")
    names = [html.unescape(y) for y in heat.y]
    assert set(names) == set(table["neighbour"])  # the union over slices
    z = np.asarray(heat.z, dtype=float)
    assert z.shape == (len(names), len(LABELS))
    lookup = {(r.neighbour, r.slice): r.similarity for r in table.itertuples()}
    for i, name in enumerate(names):
        for j, label in enumerate(LABELS):
            if (name, label) in lookup:
                assert z[i, j] == pytest.approx(lookup[(name, label)])
            else:
                assert np.isnan(z[i, j])
                assert "not in the top 10" in heat.text[i][j]
    # each slice column has exactly its k neighbours filled
    assert (~np.isnan(z)).sum(axis=0).tolist() == [10] * len(LABELS)


def test_heatmap_rows_are_ordered_by_arrival(run):
    table = gensim_neighbours(run, WORD, k=5)
    fig = charts.neighbour_heatmap(table, word=WORD, slices=LABELS, k=5)
    z = np.asarray(trace(fig, "neighbours").z, dtype=float)
    first_slice = [int(np.flatnonzero(~np.isnan(row))[0]) for row in z]
    assert first_slice == sorted(first_slice)
    assert fig.layout.yaxis.autorange == "reversed"


def test_heatmap_of_a_word_without_neighbours_is_empty_not_an_error():
    empty = pd.DataFrame(columns=["slice", "rank", "neighbour", "similarity"])
    fig = charts.neighbour_heatmap(empty, word="x", slices=LABELS, k=10)
    assert len(trace(fig, "neighbours").y) == 0


# ---------------------------------------------------------------------------- frequency


def test_frequency_bars_match_token_counts_in_the_slice_files(run, timeline):
    fig = charts.frequency_figure(timeline[timeline["word"] == WORD], word=WORD, slices=LABELS)
    bars = trace(fig, "frequency")
    assert list(bars.x) == list(LABELS)
    for label, fpm, count in zip(LABELS, bars.y, bars.customdata, strict=True):
        # independent count: Counter over the slice file's space-separated tokens
        tokens = RunPaths(run).slice_file(label).read_text(encoding="utf-8").split()
        counted = Counter(tokens)[WORD]
        assert fpm == pytest.approx(counted * 1e6 / len(tokens))
        assert count == f"{counted:,}"


# ---------------------------------------------------------------------------- overview


def test_scatter_holds_every_word_with_its_measure_and_rarer_count(scores):
    fig = charts.change_vs_frequency_figure(scores, measure="displacement", alpha=0.05)
    points = [t for t in fig.data if t.meta in ("words", "significant")]
    assert sum(len(t.x) for t in points) == len(scores)
    by_word = scores.set_index("word")
    for part in points:
        for x, y, custom in zip(part.x, part.y, part.customdata, strict=True):
            row = by_word.loc[html.unescape(custom[0])]
            assert y == pytest.approx(row["displacement"])
            assert x == pytest.approx(max(1, min(row["count_from"], row["count_to"])))
    assert fig.layout.xaxis.type == "log"
    centre = trace(fig, "null-centre")
    assert list(centre.x) == sorted(centre.x)


def test_scatter_separates_significant_words_by_shape(scores):
    marked = scores.assign(significant=scores["rank"] <= 5)
    fig = charts.change_vs_frequency_figure(marked, alpha=0.05)
    sig = trace(fig, "significant")
    assert sorted(html.unescape(c[0]) for c in sig.customdata) == sorted(
        marked.loc[marked["significant"], "word"]
    )
    assert sig.marker.symbol != trace(fig, "words").marker.symbol


def test_scatter_samples_large_vocabularies_but_keeps_the_top(scores):
    many = pd.concat([scores.assign(word=scores["word"] + f"_{i}") for i in range(20)])
    many["rank"] = np.arange(1, len(many) + 1)
    fig = charts.change_vs_frequency_figure(many, max_points=1000)
    custom = [c for t in fig.data if t.customdata is not None for c in t.customdata]
    drawn = {html.unescape(c[0]) for c in custom}
    assert len(drawn) == 1000
    assert set(many.nsmallest(500, "rank")["word"]) <= drawn
    again = charts.change_vs_frequency_figure(many, max_points=1000)
    assert again.to_json() == fig.to_json()  # the sample is seeded


def test_scatter_links_points_to_pages(scores):
    word = scores["word"].iloc[0]
    fig = charts.change_vs_frequency_figure(scores, links={word: "words/x-1.html"})
    custom = [c for t in fig.data if t.customdata is not None for c in t.customdata]
    linked = [c for c in custom if c[6]]
    assert len(linked) == 1 and html.unescape(linked[0][0]) == word


def test_terms_figure_draws_frequency_curves_per_kind(run):
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    fig = charts.terms_figure(terms, slices=LABELS, per_kind=4)
    emerging = [t for t in fig.data if t.meta == "emerging"]
    fading = [t for t in fig.data if t.meta == "fading"]
    assert len(emerging) == 4 and len(fading) == 4
    by_word = terms.set_index("word")
    for t in emerging + fading:
        row = by_word.loc[html.unescape(t.name)]
        np.testing.assert_allclose(t.y, [row[f"fpm:{label}"] for label in LABELS])
    # the strongest change comes first
    change = (by_word["fpm_to"] - by_word["fpm_from"]).abs()
    shown = [change[html.unescape(t.name)] for t in emerging]
    assert shown == sorted(shown, reverse=True)


# ---------------------------------------------------------------------------- hostile words


def all_strings(value):
    """Every string inside a nested figure dictionary (keys excluded)."""
    if isinstance(value, str):
        yield value
    elif isinstance(value, dict):
        for item in value.values():
            yield from all_strings(item)
    elif isinstance(value, (list, tuple, np.ndarray)):
        for item in value:
            yield from all_strings(item)


@pytest.mark.parametrize("word", HOSTILE_WORDS)
def test_plot_text_leaves_no_markup_and_round_trips(word):
    safe = charts.plot_text(word)
    assert "<" not in safe and ">" not in safe
    # html.unescape (Python's reference HTML entity decoder) gives the word back exactly
    assert html.unescape(safe) == word


def test_hostile_words_reach_figures_only_escaped(run, timeline, scores):
    word = HOSTILE_WORDS[0]
    table = gensim_neighbours(run, word, k=10)
    figures = charts.word_figures(
        timeline[timeline["word"] == word], table, word=word, slices=LABELS, k=10
    )
    figures["scatter"] = charts.change_vs_frequency_figure(scores)
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    figures["terms"] = charts.terms_figure(terms, slices=LABELS, per_kind=20)
    hostile_neighbours = set(table["neighbour"]) & set(HOSTILE_WORDS)
    assert hostile_neighbours, "the fixture's hostile words should be each other's neighbours"
    marked_up = [w for w in HOSTILE_WORDS if "<" in w or "&" in w]
    for name, fig in figures.items():
        strings = list(all_strings(fig.to_plotly_json()))
        for hostile in marked_up:
            assert not [s for s in strings if hostile in s], f"{hostile!r} raw in the {name} figure"
        assert any(charts.plot_text(HOSTILE_WORDS[0]) in s for s in strings)
        # plotly's JSON writer also escapes "<", so no "</script>" can close the page's script
        text = fig.to_json()
        assert "</" not in text and "<script" not in text
    assert charts.plot_text(word) in figures["timeline"].layout.title.text


def test_scatter_hover_data_are_the_scores_numbers(scores):
    fig = charts.change_vs_frequency_figure(scores, measure="displacement", alpha=0.05)
    by_word = scores.set_index("word")
    seen = 0
    for part in (t for t in fig.data if t.meta in ("words", "significant")):
        for custom in part.customdata:
            row = by_word.loc[html.unescape(custom[0])]
            assert custom[1] == row["rank"]
            assert custom[2] == pytest.approx(row["z"]) and custom[3] == pytest.approx(row["q"])
            assert (custom[4], custom[5]) == (row["count_from"], row["count_to"])
            seen += 1
    assert seen == len(scores)


def test_scatter_names_the_best_significant_words_and_draws_the_null_spread(scores):
    marked = scores.assign(significant=scores["rank"] <= 20)
    fig = charts.change_vs_frequency_figure(marked, alpha=0.05, labelled=5)
    sig = trace(fig, "significant")
    named = {html.unescape(t) for t in sig.text if t}
    assert named == set(marked.nsmallest(5, "rank")["word"])
    assert not trace(fig, "words").text  # the others carry no label
    band = trace(fig, "null-spread")
    centre = trace(fig, "null-centre")
    n = len(centre.x)
    upper, lower = np.asarray(band.y[:n]), np.asarray(band.y[n:])[::-1]
    # centre ± 2 spreads, i.e. z = ±2 under the null's own standardisation
    np.testing.assert_allclose((upper + lower) / 2, centre.y)
    lookup = marked.assign(x=charts.rarer_count(marked)).drop_duplicates("x").set_index("x")
    spread = lookup.loc[list(centre.x), "null_spread"].to_numpy()
    # the band is as wide as its legend says
    import re

    units = float(re.search(r"z from −([0-9.]+) to", band.name).group(1))
    np.testing.assert_allclose((upper - lower) / 2, units * spread)


def test_terms_lines_differ_by_colour_dash_and_marker_across_both_panels(run):
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    fig = charts.terms_figure(terms, slices=LABELS, per_kind=4)
    styles = [(t.line.color, t.line.dash, t.marker.symbol) for t in fig.data]
    assert len(set(styles)) == len(styles) == 8
    assert len({t.line.color for t in fig.data}) == min(8, len(charts.LINE_COLOURS))
    assert fig.layout.yaxis.title.text and fig.layout.yaxis2.title.text


def geometry(run):
    from drift.compare import neighbours
    from drift.publish import wordviews

    models = neighbours.load_run_models(run)
    near = neighbours.neighbours_for(run, [WORD], 10, models=models)
    return wordviews.word_geometry(models, [WORD], near, LABELS[0])[WORD]


def test_path_figure_joins_the_word_in_time_order_among_its_neighbours(run):
    shape = geometry(run)
    fig = charts.path_figure(shape, word=WORD, slices=LABELS)
    path = trace(fig, "path")
    assert [html.unescape(t) for t in path.text] == list(LABELS)
    np.testing.assert_allclose(path.x, shape.path["x"])
    near = trace(fig, "path-neighbours")
    assert len(near.x) == len(shape.neighbours)
    named = {html.unescape(t) for t in near.text if t}
    assert named == set(shape.neighbours.loc[shape.neighbours["rank"] <= 3, "neighbour"])
    assert "% of variance" in fig.layout.xaxis.title.text


def test_self_similarity_figure_is_on_a_fixed_scale(run):
    shape = geometry(run)
    fig = charts.self_similarity_figure(shape.self_similarity, word=WORD, slices=LABELS)
    heat = trace(fig, "self-similarity")
    assert (heat.zmin, heat.zmax) == (0.0, 1.0)
    np.testing.assert_allclose(np.diag(np.asarray(heat.z, dtype=float)), 1.0, atol=1e-6)
