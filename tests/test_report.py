"""Word pages and the overview report: files, links, escaping, one shared plotly.js, errors."""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math
import re
from pathlib import Path

import numpy as np
import pytest
from chart_run_fixture import HOSTILE_WORDS, LABELS, fixture_run_copy
from plotly.offline import get_plotlyjs

from drift import runfolder
from drift.cli import main
from drift.errors import DriftError
from drift.publish import report
from drift.runfolder import RunPaths

WORD = "government"
SAFE_FILE = re.compile(r"^[a-z0-9-]+-[0-9a-f]{8}\.html$")


@pytest.fixture
def run(tmp_path) -> Path:
    """Each test's own copy of the fixture run: tests write pages and reports into it."""
    return fixture_run_copy(tmp_path / "run")


@pytest.fixture
def built(run) -> Path:
    return report.build_report(run, top=4)


def shown(text: str) -> float:
    """The number a page shows ('1,044.776', '1.23e+06', 'n/a' as NaN), read back independently
    of the code that wrote it."""
    text = html.unescape(text).strip().replace(",", "")
    return float("nan") if text == "n/a" else float(text)


def agrees(text: str, value: float) -> bool:
    """Whether a shown number is ``value`` at the page's precision (3 significant digits or 3
    decimals, whichever is finer): within half a unit of the third significant digit."""
    number = shown(text)
    if math.isnan(float(value)):
        return math.isnan(number)
    return number == pytest.approx(float(value), rel=5e-3, abs=5e-4)


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
    numbers = page.split('id="numbers"', 1)[1]
    assert f"{int(row['rank'])} of" in numbers
    assert f"{int(row['count_from'])} → {int(row['count_to'])}" in numbers
    text = html.unescape(re.sub(r"<[^>]+>", " ", numbers))
    assert agrees(re.search(r"q = (\S+)", text).group(1), row["q"])
    assert agrees(re.search(r"z = (\S+)", text).group(1), row["z"])
    spread = re.search(r"([\d.,e+-]+) ± ([\d.,e+-]+)", text)
    assert agrees(spread.group(1), row["displacement"])
    assert agrees(spread.group(2), row["displacement_sd"])


def test_word_page_draws_the_rank_stages_neighbours(run):
    from drift.compare.ranking import neighbours_by_slice

    page = report.chart_word(run, WORD, k=7).read_text(encoding="utf-8")
    table = neighbours_by_slice(run, WORD, k=7)
    assert len(table) == 7 * len(LABELS)
    for neighbour in table["neighbour"]:
        assert f'"{neighbour}"' in page  # a category of the heatmap's y axis


def neighbour_cells(page: str) -> dict[str, list[str]]:
    """The per-slice neighbours table of a word page, read back from its HTML."""
    table = re.search(r'<table class="neighbours">(.*?)</table>', page, flags=re.S).group(1)
    heads = [html.unescape(h) for h in re.findall(r"<th>(.*?)</th>", table)]
    rows = re.findall(r"<tr>(.*?)</tr>", table.split("<tbody>", 1)[1], flags=re.S)
    cells = [re.findall(r'<span class="word">(.*?)</span>', r) for r in rows]
    return {h: [html.unescape(c[i]) for c in cells if len(c) > i] for i, h in enumerate(heads)}


def test_word_page_lists_the_neighbours_per_slice_in_a_table(run):
    from drift.compare.neighbours import read_neighbours

    page = report.chart_word(run, WORD, k=7).read_text(encoding="utf-8")
    stored = read_neighbours(run)
    stored = stored[(stored["word"] == WORD) & (stored["rank"] <= 7)]
    cells = neighbour_cells(page)
    assert list(cells) == list(LABELS)
    for label in LABELS:
        assert cells[label] == list(stored.loc[stored["slice"] == label, "neighbour"])


def test_word_page_states_one_k_and_counts_turnover_at_it(run):
    from drift.compare.neighbours import read_neighbours

    stored = read_neighbours(run)
    for k in (5, 10):
        page = report.chart_word(run, WORD, k=k).read_text(encoding="utf-8")
        text = html.unescape(re.sub(r"<[^>]+>", " ", page.split("<body>", 1)[1]))
        assert set(re.findall(r"(\d+) nearest", text)) == {str(k)}
        assert set(re.findall(r"top (\d+)", text)) <= {str(k)}  # the heatmap says the same k
        # turnover on the page: the Jaccard distance of the k-sets shown (computed here by hand)
        rows = stored[(stored["word"] == WORD) & (stored["rank"] <= k)]
        first = set(rows.loc[rows["slice"] == LABELS[0], "neighbour"])
        last = set(rows.loc[rows["slice"] == LABELS[-1], "neighbour"])
        turnover = 1 - len(first & last) / len(first | last)
        cell = re.search(rf"\({k} nearest, {LABELS[0]} vs {LABELS[-1]}\)</th><td>([^<]*)<", page)
        assert agrees(cell.group(1), turnover)


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
        if page.name == "word-index.html":  # a page of tables only: no plotly at all
            assert "Plotly.newPlot" not in text and "plotly.min.js" not in text
            continue
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
    assert page.count("<script") == 8  # error hook, plotly.js, five figures, plotly check


def test_report_escapes_hostile_words_in_tables(run, built):
    page = built.read_text(encoding="utf-8")
    terms = page.split('id="terms"', 1)[1]
    assert f'">{html.escape(HOSTILE_WORDS[0])}</a></td>' in terms  # a term, linked to its page
    assert HOSTILE_WORDS[0] not in page


# ---------------------------------------------------------------------------- report


def test_report_writes_index_and_the_top_pages(run, built):
    import pandas as pd

    assert built == RunPaths(run).charts_dir / "index.html"
    page = built.read_text(encoding="utf-8")
    scores = pd.read_parquet(RunPaths(run).scores_parquet).sort_values("rank")
    ranked = page.split('id="ranked"')[1].split('id="scatter"')[0]
    links = re.findall(r'<a href="(words/[^"]+)">', ranked)
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
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    listed = {w for kind in ("emerging", "fading") for w in report.shown_terms(terms, kind)["word"]}
    scores = pd.read_parquet(RunPaths(run).scores_parquet).sort_values("rank")
    assert manifest["stages"]["charts"]["pages"] == len(listed | set(scores["word"].head(4)))


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
    # the few-control-words case reaches the warnings every page shows
    assert "gave no usable null" in report.warnings_html(report.load_run(run))



def test_pages_carry_the_slice_stages_warning_of_a_changing_mix(tmp_path):
    """A metadata column whose token mix changes strongly between the compared slices is a
    warning on the pages as on the terminal (the same sentence as drift.composition gives),
    and a mix that hardly changes is none."""
    import pandas as pd

    from drift.ingest.documents import composition_shifts

    data = report.load_run(fixture_run_copy(tmp_path / "run"))
    first, last = data.between
    rows = []
    for label, sport in ((first, 900), (last, 100)):
        for value, tokens in (("sport", sport), ("news", 1000 - sport)):
            rows.append({"slice": label, "column": "desk", "value": value, "documents": 1,
                         "tokens": tokens, "share": tokens / 1000})
    data.composition = pd.DataFrame(rows)
    expected = composition_shifts(data.composition, [(first, last)])[1]
    assert len(expected) == 1 and "the mix of 'desk' changes strongly" in expected[0]
    assert report.mix_warnings(data) == expected
    assert report.esc(expected[0][1:]) in report.warnings_html(data)
    data.composition["tokens"] = 500
    assert report.mix_warnings(data) == []
    assert "mix of" not in report.warnings_html(data)


def test_report_says_when_the_own_control_is_averaged_over_splits(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    assert "control pairs" not in report.control_html(report.load_run(run))
    manifest = json.loads(RunPaths(run).manifest.read_text())
    manifest["stages"]["train"]["control"]["splits"] = 2  # as --control-splits 2 records it
    RunPaths(run).manifest.write_text(json.dumps(manifest))
    assert "average over 2 control pairs" in report.control_html(report.load_run(run))


def test_report_with_top_zero_writes_only_term_pages(tmp_path):
    import pandas as pd

    run = fixture_run_copy(tmp_path / "run")
    index = report.build_report(run, top=0)
    assert index.exists()
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    listed = {w for kind in ("emerging", "fading") for w in report.shown_terms(terms, kind)["word"]}
    written = {p.name for p in RunPaths(run).word_charts_dir.glob("*.html")}
    assert written == {f"{runfolder.safe_name(w)}.html" for w in listed}


def test_pages_are_readable_by_others(run, built):
    for path in [built, built.parent / "plotly.min.js", report.chart_word(run, WORD)]:
        assert path.stat().st_mode & 0o044 == 0o044


# ---------------------------------------------------------------------------- bad input


def test_unknown_word_suggests_close_words(run):
    with pytest.raises(DriftError, match="'goverment' is not in .*did you mean government"):
        report.chart_word(run, "goverment")


def test_emerging_term_gets_a_term_page(run):
    import pandas as pd

    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    scored = set(pd.read_parquet(RunPaths(run).scores_parquet)["word"])
    for kind in ("emerging", "fading"):
        word = next(w for w in terms.loc[terms["kind"] == kind, "word"] if w not in scored)
        page = report.chart_word(run, word).read_text(encoding="utf-8")
        assert f"{kind} term" in page and 'id="frequency"' in page and 'id="examples"' in page


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
    import pandas as pd

    run = fixture_run_copy(tmp_path / "run")
    code, out, _ = run_cli(["report", str(run), "--top", "2"], capsys)
    assert code == 0
    assert Path(out.strip()) == RunPaths(run).charts_dir / "index.html"
    written = {p.name for p in RunPaths(run).word_charts_dir.glob("*.html")}
    top = pd.read_parquet(RunPaths(run).scores_parquet).sort_values("rank")["word"].head(2)
    assert {f"{runfolder.safe_name(w)}.html" for w in top} <= written


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
    assert table.count("<tr") == 4


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


# ---------------------------------------------------------------------------- what pages say


def edited_run(tmp_path: Path, **changes) -> Path:
    """A fixture copy whose scores rows for WORD carry ``changes`` (other rows untouched)."""
    import pandas as pd

    copy = fixture_run_copy(tmp_path / "run")
    scores = pd.read_parquet(RunPaths(copy).scores_parquet)
    for column, value in changes.items():
        if column not in scores:
            scores[column] = np.nan
        if value is None:  # a null in a bool column, as the rank stage writes an undecided one
            scores[column] = scores[column].astype(object)
        scores.loc[scores["word"] == WORD, column] = value
    scores.to_parquet(RunPaths(copy).scores_parquet, index=False)
    return copy


def values(data: object) -> list:
    """A plotly data array as a list: plotly writes numeric arrays as base64 typed arrays."""
    if isinstance(data, dict) and "bdata" in data:
        return np.frombuffer(base64.b64decode(data["bdata"]), dtype=data["dtype"]).tolist()
    return list(data)


def plotly_figures(page: str) -> list[dict]:
    """The data, layout and config of every figure of a page, as plotly.js receives them
    (the arguments of each ``Plotly.newPlot(id, data, layout, config)`` call)."""
    decoder = json.JSONDecoder()
    found = []
    for script in inline_scripts(page):
        at = script.find("Plotly.newPlot(")
        if at < 0:
            continue
        args, pos = [], at + len("Plotly.newPlot(")
        for _ in range(4):
            while script[pos] in " \n\t,":
                pos += 1
            value, pos = decoder.raw_decode(script, pos)
            args.append(value)
        found.append({"data": args[1], "layout": args[2], "config": args[3]})
    return found


def test_a_stable_word_shows_no_change_point_and_no_noise_lists(tmp_path):
    run = edited_run(tmp_path, significant=False, change_point=LABELS[1], change_step=0.2)
    page = report.chart_word(run, WORD).read_text(encoding="utf-8")
    assert "No clear change point:</strong> its change is not significant" in page
    assert "neighbours gained" not in page and "neighbours lost" not in page
    timeline = plotly_figures(page)[0]
    assert not timeline["layout"].get("shapes")
    assert "did not move more than words of its frequency" in page


def test_a_significant_word_says_how_and_when_it_changed(tmp_path):
    from drift.compare.neighbours import read_neighbours

    run = edited_run(tmp_path, significant=True, change_point=LABELS[2], change_step=0.3)
    page = report.chart_word(run, WORD).read_text(encoding="utf-8")
    stored = read_neighbours(run)
    rows = stored[stored["word"] == WORD]
    first = list(rows.loc[rows["slice"] == LABELS[0], "neighbour"])
    last = list(rows.loc[rows["slice"] == LABELS[-1], "neighbour"])
    lost = [w for w in first if w not in last]
    gained = [w for w in last if w not in first]
    lead = re.search(r'<p class="lead">(.*?)</p>', page, flags=re.S).group(1)
    assert f"moved from {html.escape(lost[0])}, " in lead
    assert f" to {html.escape(gained[0])}, " in lead
    assert f"mostly between {LABELS[1]} and {LABELS[2]}" in lead
    change = re.search(r'<p class="change">(.*?)</p>', page, flags=re.S).group(1)
    assert "Change point:" in change and "redraws" in change and "bootstrap" in change
    shapes = plotly_figures(page)[0]["layout"]["shapes"]
    assert {s["type"] for s in shapes} == {"line", "rect"}  # the point and its range
    numbers = page.split('id="numbers"', 1)[1]
    assert f"neighbours gained by {LABELS[-1]}" in numbers


def test_a_step_back_is_not_drawn_as_a_change_point(tmp_path):
    run = edited_run(tmp_path, significant=True, change_point=LABELS[2], change_step=-0.3)
    page = report.chart_word(run, WORD).read_text(encoding="utf-8")
    assert "No clear change point:</strong> its largest step goes back" in page
    assert not plotly_figures(page)[0]["layout"].get("shapes")


def test_both_nulls_are_shown_where_the_run_has_them(tmp_path):
    run = edited_run(tmp_path, noise_z=7.5, noise_p=0.0004, noise_q=0.002, drift_z=2.25,
                     drift_p=0.03, drift_q=0.25)
    numbers = report.chart_word(run, WORD).read_text(encoding="utf-8").split('id="numbers"')[1]
    # the fixture's null is a plain frequency-bin null, not the paired test
    assert "beyond noise? (more than control words of its frequency and noise moved)" in numbers
    assert "z = 7.5, p = 0.0004, q = 0.002" in numbers
    assert "more than typical words of its frequency? (this corpus)" in numbers
    assert "z = 2.25, p = 0.03, q = 0.25" in numbers
    assert "headline (the more conservative)" in numbers


def _with_rank_params(run: Path, record: dict | None = None, **params) -> None:
    manifest = json.loads(RunPaths(run).manifest.read_text())
    manifest["stages"]["rank"]["params"].update(params)
    manifest["stages"]["rank"].update(record or {})
    RunPaths(run).manifest.write_text(json.dumps(manifest))


def test_the_noise_question_says_what_the_word_was_compared_with(tmp_path):
    """Paired (the default calibration, --compare pair): against the word's own control
    measure, or, for a word no control model has (own_control empty), against control words
    like it with the spread of such words; --compare steps is unpaired."""
    paired = {"compare": "pair", "calibration": {"paired": True}}
    cases = [
        ({"own_control": 0.2}, paired, "more than the word itself moved in the control pair",
         "its own distance between the control pair's halves."),
        ({"own_control": None}, paired, "it is in no control model",
         "but no control model has this word"),
        ({"own_control": None},
         {**paired, "record": {"unpaired_class": {"words": 230, "noise_spread": 1.41}}},
         "it is in no control model", "divided by the spread of the 230 words the control lacks "
         "(1.41)"),
        ({"own_control": 0.2}, {**paired, "compare": "steps"},
         "more than control words of its frequency and noise moved",
         "with control words of the same frequency and seed-to-seed noise."),
    ]
    # on a long archive the local measure's paired null can fall back to the unpaired test
    fell_back = {"evidence": {"nulls": {"displacement": {"noise_null": {}},
                                        "local": {"noise_null": {"not paired": "Only 15 words"}}}}}
    cases.append(({"own_control": 0.2}, {**paired, "record": fell_back},
                  "more than the word itself moved in the control pair; local change: more than "
                  "control words", "For local change too few words moved less than in the control"))
    for number, (row, params, label, sentence) in enumerate(cases):
        run = edited_run(tmp_path / str(number), noise_z=3.0, noise_p=0.001, noise_q=0.01,
                         **row)
        _with_rank_params(run, **params)
        page = report.chart_word(run, WORD).read_text(encoding="utf-8")
        assert f"beyond noise? ({label}" in page.split('id="numbers"')[1]
        assert sentence in page


def test_a_weak_significance_record_reaches_every_page(tmp_path):
    run = fixture_run_copy(tmp_path / "run")
    manifest = json.loads(RunPaths(run).manifest.read_text())
    manifest["stages"]["rank"]["significance"] = {
        "status": "weak", "reason": "the control pair measured only 60 words"}
    RunPaths(run).manifest.write_text(json.dumps(manifest))
    index = report.build_report(run, top=1)
    for page in (index, next(RunPaths(run).word_charts_dir.glob("*.html"))):
        text = page.read_text(encoding="utf-8")
        assert "Significance is weak: the control pair measured only 60 words" in text
        # the fixture's slices are small: the terminal's small-slice warning is on the page too
        assert "under a million tokens" in text


def test_report_index_lists_every_measured_word_with_its_numbers(run, built):
    import pandas as pd

    page = (built.parent / "word-index.html").read_text(encoding="utf-8")
    scores = pd.read_parquet(RunPaths(run).scores_parquet)
    rows = re.findall(r'<tr data-word="([^"]*)" data-significant="([01])">(.*?)</tr>', page,
                      flags=re.S)
    assert [html.unescape(w) for w, _, _ in rows] == list(scores.sort_values("rank")["word"])
    by_word = scores.set_index("word")
    for word, significant, cells in rows:
        row = by_word.loc[html.unescape(word)]
        numbers = re.findall(r'<td class="num">(.*?)</td>', cells)
        assert len(numbers) == 5
        assert shown(numbers[0]) == row["rank"]
        mean, spread = html.unescape(numbers[1]).split(" ± ")
        assert agrees(mean, row["displacement"])
        assert shown(spread) == pytest.approx(row["displacement_sd"], abs=5e-3)  # 2 digits
        assert agrees(numbers[2], row["z"]) and agrees(numbers[3], row["q"])
        assert html.unescape(numbers[4]) == f"{row['count_from']:,} → {row['count_to']:,}"
        assert significant == str(int(row["significant"]))
    assert '<a href="word-index.html">' in built.read_text(encoding="utf-8")
    # the search box runs under the page's policy: its script is allowed by hash
    for script in inline_scripts(page):
        assert report.script_hash(script).strip("'") in csp_of(page)


def test_report_hover_data_and_tables_are_the_scores_numbers(run, built):
    import pandas as pd

    page = built.read_text(encoding="utf-8")
    scores = pd.read_parquet(RunPaths(run).scores_parquet).set_index("word")
    scatter = plotly_figures(page)[0]
    points = [t for t in scatter["data"] if t.get("meta") in ("words", "significant")]
    hovered = 0
    for part in points:
        for y, custom in zip(values(part["y"]), part["customdata"], strict=True):
            row = scores.loc[html.unescape(custom[0])]
            assert y == pytest.approx(row["displacement"])
            assert custom[1:6] == [row["rank"], pytest.approx(row["z"]),
                                   pytest.approx(row["q"]), row["count_from"], row["count_to"]]
            hovered += 1
    assert hovered == len(scores)
    ranked = page.split('id="ranked"', 1)[1].split("</table>", 1)[0]
    for word, cells in re.findall(r'<tr data-word="([^"]*)">(.*?)</tr>', ranked, flags=re.S):
        row = scores.loc[html.unescape(word)]
        numbers = re.findall(r'<td class="num">(.*?)</td>', cells)
        assert agrees(numbers[2], row["z"]) and agrees(numbers[3], row["q"])


def test_report_shows_the_slice_composition_when_the_run_has_it(tmp_path):
    import pandas as pd

    run = fixture_run_copy(tmp_path / "run")
    page = report.build_report(run, top=0).read_text(encoding="utf-8")
    assert "records no slice composition" in page
    from drift import runfolder

    runfolder.write_table(run, "composition", pd.DataFrame(
        {"slice": list(LABELS), "column": "source", "value": ["wire"] * 3,
         "documents": [90, 95, 99], "tokens": [9000, 9500, 9900], "share": [1.0, 1.0, 1.0]}))
    page = report.build_report(run, top=0).read_text(encoding="utf-8")
    section = page.split("Slice composition", 1)[1].split("<h3>", 1)[0]
    assert "<td>wire</td>" in section and '<td class="num">95</td>' in section


def test_a_report_of_twenty_words_loads_each_model_once(tmp_path, monkeypatch):
    from collections import Counter

    import pandas as pd
    from chart_run_fixture import SEEDS

    import drift.embed.training

    run = fixture_run_copy(tmp_path / "run")
    loads: Counter = Counter()
    real = drift.embed.training.load_vectors

    def counted(run, label, seed, control=False):
        loads[(label, seed, control)] += 1
        return real(run, label, seed, control=control)

    monkeypatch.setattr(drift.embed.training, "load_vectors", counted)
    report.build_report(run, top=20)
    terms = pd.read_parquet(RunPaths(run).terms_parquet)
    listed = {w for kind in ("emerging", "fading") for w in report.shown_terms(terms, kind)["word"]}
    top = set(pd.read_parquet(RunPaths(run).scores_parquet).sort_values("rank")["word"].head(20))
    pages = len(list(RunPaths(run).word_charts_dir.glob("*.html")))
    assert pages == len(top | listed)  # the top words' pages and the listed terms' pages
    assert loads == Counter({(label, seed, False): 1 for label in LABELS for seed in range(SEEDS)})


# ------------------------------------------------------------------ no way off the machine


def test_no_page_offers_a_control_that_sends_data_off_the_machine(run, built):
    pages = [built, built.parent / "word-index.html", report.chart_word(run, WORD)]
    for path in pages:
        page = path.read_text(encoding="utf-8")
        for figure in plotly_figures(page):
            config = figure["config"]
            assert config["showSendToCloud"] is False
            assert "sendDataToCloud" in config["modeBarButtonsToRemove"]
            assert not config.get("plotlyServerURL")
            assert not config.get("showLink") and not config.get("showEditInChartStudio")
        assert not re.search(r"https?://", page.split("<body>", 1)[1])  # no outside link
        policy = csp_of(page)
        for directive in ("default-src 'none'", "connect-src 'none'", "form-action 'none'"):
            assert directive in policy


def test_plotly_is_pinned_to_the_tested_major_version():
    from importlib.metadata import version

    import tomllib

    pyproject = Path(__file__).resolve().parents[1] / "pyproject.toml"
    deps = tomllib.loads(pyproject.read_text())["project"]["dependencies"]
    (spec,) = [d for d in deps if d.startswith("plotly")]
    upper = re.search(r"<\s*(\d+)", spec)
    assert upper, f"plotly is not pinned below a major version: {spec}"
    # the installed major version (the one the tests ran against) is the one allowed
    assert int(version("plotly").split(".")[0]) == int(upper.group(1)) - 1


def test_a_click_on_a_charted_word_opens_its_page(run, built):
    page = built.read_text(encoding="utf-8")
    (scatter,) = [s for s in inline_scripts(page) if "plotly_click" in s]
    at = int(re.search(r"p\.customdata\[(\d+)\];if\(u\)", scatter).group(1))
    links = {html.unescape(w): u for w, u in re.findall(
        r'<tr data-word="([^"]*)"><td class="num">\d+</td><td class="word"><a href="([^"]+)">',
        page)}
    clicked = {}
    for part in plotly_figures(page)[0]["data"]:
        for custom in part.get("customdata") or []:
            if custom[at]:
                clicked[html.unescape(custom[0])] = custom[at]
    assert len(links) == 4 and links.items() <= clicked.items()
    # other clickable words are listed terms with pages of their own
    assert all((built.parent / url).exists() for url in clicked.values())


def test_an_undecided_verdict_counts_as_not_significant(tmp_path):
    # without a usable null the rank stage leaves significant empty (null), and z, p, q too
    run = edited_run(tmp_path, significant=None, z=np.nan, p=np.nan, q=np.nan,
                     change_point=LABELS[2], change_step=0.4)
    page = report.chart_word(run, WORD).read_text(encoding="utf-8")
    assert "has no calibrated verdict" in page
    assert "No clear change point:</strong> its change is not significant" in page
    assert "neighbours gained" not in page


@pytest.mark.parametrize("value, expected", [(True, True), (np.bool_(True), True), (False, False),
                                             (None, False), (np.nan, False), ("NA", False)])
def test_is_significant_treats_missing_as_not(value, expected):
    import pandas as pd

    value = pd.NA if value == "NA" else value
    assert report.is_significant(value) is expected  # bool(nan) would say True


def test_evidence_note_says_how_the_measures_were_weighted():
    """The report's sentence on the evidence names the weighting run.json recorded: by kind
    (the default), O'Brien's GLS weights, or Stouffer's equal weights."""
    from drift.publish.report import _evidence_note

    parts = ("displacement", "local", "context")
    assert "half the weight to the counted contexts" in _evidence_note("evidence", parts, "kinds")
    assert "O'Brien's GLS" in _evidence_note("evidence", parts, "gls")
    assert "Stouffer's method" in _evidence_note("evidence", parts, "equal")
    assert _evidence_note("displacement", parts, "kinds") == ""
