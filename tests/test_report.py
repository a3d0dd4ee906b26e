"""Word pages and the overview report: files, links, escaping, one shared plotly.js, errors."""

from __future__ import annotations

import base64
import hashlib
import html
import json
import re
from pathlib import Path

import pytest
from chart_run_fixture import HOSTILE_WORDS, LABELS, fixture_run_copy
from plotly.offline import get_plotlyjs

from drift import report, runfolder
from drift.cli import main
from drift.errors import DriftError
from drift.runfolder import RunPaths

WORD = "government"
SAFE_FILE = re.compile(r"^[a-z0-9-]+-[0-9a-f]{8}\.html$")


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    return fixture_run_copy(tmp_path_factory.mktemp("report") / "run")


@pytest.fixture(scope="module")
def built(run) -> Path:
    return report.build_report(run, top=4)


def inline_scripts(page: str) -> list[str]:
    return re.findall(r"<script(?![^>]*\bsrc=)[^>]*>(.*?)</script>", page, flags=re.S)


def csp_of(page: str) -> str:
    found = re.search(r'http-equiv="Content-Security-Policy" content="([^"]*)"', page)
    assert found, "the page has no Content-Security-Policy"
    return html.unescape(found.group(1))


# ---------------------------------------------------------------------------- word page


def test_chart_word_writes_its_page_under_a_safe_name(run):
    path = report.chart_word(run, WORD)
    assert path == RunPaths(run).word_charts_dir / f"{runfolder.safe_name(WORD)}.html"
    page = path.read_text(encoding="utf-8")
    assert '<h1 class="word">government</h1>' in page
    assert '<script src="../plotly.min.js"></script>' in page
    for section in ("timeline", "neighbours", "frequency", "numbers", "examples"):
        assert f'id="{section}"' in page
    assert report.CAUTION in page
    assert len(page) < 300_000  # no inline copy of plotly.js (about 4.8 MB)


def test_word_page_shows_the_scores_row(run):
    import pandas as pd

    row = pd.read_parquet(RunPaths(run).scores_parquet).set_index("word").loc[WORD]
    page = report.chart_word(run, WORD).read_text(encoding="utf-8")
    assert f"{int(row['rank'])} of" in page
    assert f"{int(row['count_from'])} → {int(row['count_to'])}" in page
    assert report.fmt(row["q"]) in page and report.fmt(row["z"]) in page
    for neighbour in row["gained"].split()[:3] + row["lost"].split()[:3]:
        assert html.escape(neighbour) in page


def test_word_page_draws_the_rank_stages_neighbours(run):
    from drift.ranking import neighbours_by_slice

    page = report.chart_word(run, WORD, k=7).read_text(encoding="utf-8")
    table = neighbours_by_slice(run, WORD, k=7)
    assert len(table) == 7 * len(LABELS)
    for neighbour in table["neighbour"]:
        assert f'"{neighbour}"' in page  # a category of the heatmap's y axis


def test_word_page_examples_are_highlighted_per_slice(run):
    page = report.chart_word(run, WORD, examples=2, seed=5).read_text(encoding="utf-8")
    examples = page.split('id="examples"', 1)[1]
    for label in LABELS:
        assert f"<h3>{label}</h3>" in examples
    assert examples.count("<li>") == 2 * len(LABELS)
    assert "<mark>government</mark>" in examples


def test_word_page_is_reproducible(run):
    first = report.chart_word(run, WORD, seed=3).read_bytes()
    second = report.chart_word(run, WORD, seed=3).read_bytes()
    assert first == second


def test_plotly_js_is_one_shared_copy(run, built):
    charts_dir = RunPaths(run).charts_dir
    report.chart_word(run, WORD)
    copies = list(charts_dir.rglob("*.js"))
    assert copies == [charts_dir / "plotly.min.js"]
    assert copies[0].read_text(encoding="utf-8") == get_plotlyjs()
    for page in charts_dir.rglob("*.html"):
        text = page.read_text(encoding="utf-8")
        assert "Plotly.newPlot" in text
        assert len(text) < 300_000


def test_every_inline_script_is_allowed_by_hash_and_nothing_else(run, built):
    # Content-Security-Policy hash sources (CSP Level 2, W3C): base64 of the SHA-256 of the script
    for path in [built, report.chart_word(run, WORD)]:
        page = path.read_text(encoding="utf-8")
        policy = csp_of(page)
        assert "'unsafe-inline'" not in policy.split("script-src", 1)[1].split(";")[0]
        assert "'unsafe-eval'" not in policy
        allowed = set(re.findall(r"'sha256-([^']+)'", policy))
        scripts = inline_scripts(page)
        assert len(scripts) >= 3
        for script in scripts:
            digest = base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode()
            assert digest in allowed


# ---------------------------------------------------------------------------- hostile words


@pytest.mark.parametrize("word", HOSTILE_WORDS)
def test_hostile_word_is_text_and_never_a_path(run, word):
    path = report.chart_word(run, word)
    assert path.parent == RunPaths(run).word_charts_dir
    assert SAFE_FILE.match(path.name), path.name
    page = path.read_text(encoding="utf-8")
    assert f'<h1 class="word">{html.escape(word)}</h1>' in page
    if any(c in word for c in "<>&\""):
        assert word not in page  # only ever escaped: in HTML, in plotly text, in plotly JSON
    assert "<img" not in page  # markup from words appears only as text (&lt;img)
    assert page.count("<script") == 6  # error hook, plotly.js, three figures, plotly check


def test_report_escapes_hostile_words_in_tables(run, built):
    page = built.read_text(encoding="utf-8")
    terms = page.split('id="terms"', 1)[1]
    assert f'<td class="word">{html.escape(HOSTILE_WORDS[0])}</td>' in terms
    assert HOSTILE_WORDS[0] not in page


# ---------------------------------------------------------------------------- report


def test_report_writes_index_and_the_top_pages(run, built):
    import pandas as pd

    assert built == RunPaths(run).charts_dir / "index.html"
    page = built.read_text(encoding="utf-8")
    scores = pd.read_parquet(RunPaths(run).scores_parquet).sort_values("rank")
    links = re.findall(r'<a href="(words/[^"]+)">', page)
    assert len(links) == 4
    for word, link in zip(scores["word"].head(4), links, strict=True):
        assert link == f"words/{runfolder.safe_name(word)}.html"
        target = built.parent / link
        assert target.exists()
        assert '<a href="../index.html">' in target.read_text(encoding="utf-8")
    assert report.CAUTION in page
    assert '<script src="plotly.min.js"></script>' in page


def test_report_summarises_the_run(run, built):
    import pandas as pd

    page = built.read_text(encoding="utf-8")
    summary = pd.read_csv(RunPaths(run).slice_summary, dtype={"label": str})
    for row in summary.itertuples():
        assert f"<td>{row.label}</td>" in page
        assert f"{row.tokens:,}" in page
    manifest = json.loads(RunPaths(run).manifest.read_text())
    flagged = manifest["stages"]["rank"]["control_flagged"]
    assert f"flags <strong>{flagged}</strong> words" in page
    assert "measure = &quot;displacement&quot;" in page
    for kind in ("Emerging by 2003", "Fading since 2001"):
        assert kind in page
    assert manifest["stages"]["charts"]["params"]["top"] == 4
    assert manifest["stages"]["charts"]["pages"] == 4


def test_report_says_when_there_is_no_control(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    manifest = json.loads(RunPaths(run).manifest.read_text())
    manifest["stages"]["train"]["control"] = None  # as 'drift train --no-control' records it
    manifest["stages"]["rank"]["control_flagged"] = None
    RunPaths(run).manifest.write_text(json.dumps(manifest))
    data = report.load_run(run)
    assert "No time-shuffled control" in report.control_html(data)
    manifest["stages"]["train"]["control"] = {"between": list(data.between)}
    RunPaths(run).manifest.write_text(json.dumps(manifest))
    assert "gave no usable null" in report.control_html(report.load_run(run))


def test_report_with_top_zero_writes_no_word_pages(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    index = report.build_report(run, top=0)
    assert index.exists()
    assert not list(RunPaths(run).word_charts_dir.glob("*.html"))


def test_pages_are_readable_by_others(run, built):
    for path in [built, built.parent / "plotly.min.js", report.chart_word(run, WORD)]:
        assert path.stat().st_mode & 0o044 == 0o044


# ---------------------------------------------------------------------------- bad input


def test_unknown_word_suggests_close_words(run):
    with pytest.raises(DriftError, match="'goverment' is not in .*did you mean government"):
        report.chart_word(run, "goverment")


def test_emerging_term_is_explained_not_just_unknown(run):
    import pandas as pd

    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    scored = set(pd.read_parquet(RunPaths(run).scores_parquet)["word"])
    for kind in ("emerging", "fading"):
        word = next(w for w in terms.loc[terms["kind"] == kind, "word"] if w not in scored)
        with pytest.raises(DriftError, match=f"'{word}' was not measured: it is an? {kind} term"):
            report.chart_word(run, word)


def test_run_without_scores_is_a_clear_error(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    RunPaths(run).scores_parquet.unlink()
    with pytest.raises(DriftError, match="no scores yet; compute them with 'drift rank"):
        report.build_report(run)
    with pytest.raises(DriftError, match="no scores yet"):
        report.chart_word(run, WORD)


def test_run_without_timeline_is_a_clear_error(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    RunPaths(run).timeline_parquet.unlink()
    with pytest.raises(DriftError, match="no timeline"):
        report.chart_word(run, WORD)


def test_missing_folder_is_a_clear_error(tmp_path):
    with pytest.raises(DriftError, match="does not exist"):
        report.build_report(tmp_path / "nowhere")


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda run: report.chart_word(run, WORD, k=0), "--neighbours must be a whole number"),
        (lambda run: report.chart_word(run, WORD, examples=-1), "--examples must be a whole"),
        (lambda run: report.build_report(run, top=-1), "--top must be a whole number"),
    ],
)
def test_bad_numbers_are_clear_errors(run, call, message):
    with pytest.raises(DriftError, match=message):
        call(run)


# ---------------------------------------------------------------------------- command line


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    try:
        main(args)
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_chart_prints_the_page_path(run, capsys):
    code, out, _ = run_cli(["chart", str(run), WORD], capsys)
    assert code == 0
    assert Path(out.strip()) == report.word_page_path(run, WORD)


def test_cli_report_prints_the_index_path(tmp_path, capsys):
    run = fixture_run_copy(tmp_path / "run")
    code, out, _ = run_cli(["report", str(run), "--top", "2"], capsys)
    assert code == 0
    assert Path(out.strip()) == RunPaths(run).charts_dir / "index.html"
    assert len(list(RunPaths(run).word_charts_dir.glob("*.html"))) == 2


def test_cli_unknown_word_exits_2_with_suggestions(run, capsys):
    code, out, err = run_cli(["chart", str(run), "goverment"], capsys)
    assert code == 2
    assert out == ""
    assert "did you mean government" in err
    assert "Traceback" not in err


def test_cli_open_calls_the_browser(run, capsys, monkeypatch):
    opened = []
    monkeypatch.setattr("webbrowser.open", lambda url: opened.append(url))
    code, out, _ = run_cli(["chart", str(run), WORD, "--open"], capsys)
    assert code == 0
    assert opened == [Path(out.strip()).resolve().as_uri()]


# ---------------------------------------------------------------------------- small pieces


def test_ranked_table_shows_the_score_only_when_it_is_not_the_displacement(run):
    import pandas as pd

    scores = pd.read_parquet(RunPaths(run).scores_parquet).head(3)
    assert "score (" not in report.ranked_table_html(scores, {}, "displacement")
    table = report.ranked_table_html(scores, {}, "combined")
    assert "<th class=\"num\">score (combined)</th>" in table
    assert table.count("<tr>") == 4


@pytest.mark.parametrize(
    "value, text",
    [(1234567.0, "1.23e+06"), (0.000166, "0.000166"), (1.67e-05, "1.67e-05"),
     (1044.776, "1,044.776"), (12, "12"), (float("nan"), "n/a"), (None, "n/a"), (True, "yes"),
     (0.5, "0.5")],
)
def test_number_formatting(value, text):
    assert report.fmt(value) == text


def test_highlight_marks_whole_tokens_and_escapes():
    sentence = "the fire and <b>fire</b> wildfire fire"
    assert report.highlight_html(sentence, "fire") == (
        "the <mark>fire</mark> and &lt;b&gt;fire&lt;/b&gt; wildfire <mark>fire</mark>"
    )
    assert report.highlight_html("a <b> c", "<b>") == "a <mark>&lt;b&gt;</mark> c"
