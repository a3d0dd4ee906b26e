"""The Python API: every public name of the drift package resolves, and returns DataFrames and
figures on a real run (the session's demo run)."""

from __future__ import annotations

import pandas as pd
import plotly.graph_objects as go
import pytest

import drift


@pytest.mark.parametrize("name", sorted(drift._API))
def test_public_name_resolves(name):
    assert callable(getattr(drift, name))


def test_unknown_attribute_is_an_attribute_error():
    with pytest.raises(AttributeError):
        drift.no_such_function  # noqa: B018


def test_tables_and_figures_from_a_run(demo_run):
    summary = drift.read_summary(demo_run.run)
    scores = drift.read_scores(demo_run.run)
    assert isinstance(summary, pd.DataFrame) and len(summary) == 6
    word = scores.sort_values("rank")["word"].iloc[0]
    figures = drift.word_figure_set(demo_run.run, word)
    assert set(figures) == {"timeline", "neighbours", "frequency", "path", "self_similarity"}
    assert all(isinstance(fig, go.Figure) for fig in figures.values())
    neighbours = drift.neighbours_by_slice(demo_run.run, word, k=5)
    assert set(neighbours["slice"]) == set(summary["label"])


def test_unknown_word_suggests_close_words(demo_run):
    with pytest.raises(drift.DriftError, match="did you mean"):
        drift.word_figure_set(demo_run.run, "screan")
