"""A real browser (Debian's headless Chromium) opens the pages from file:// with no network.

Checked in the rendered DOM: plotly drew every figure (its ``main-svg`` elements), the page's
error hook recorded no script error, the console shows no error or refused script, and hostile
words show as text without running. Each page type is also laid out at 1400 and 420 CSS pixels
inside a harness page (an iframe of that width: headless Chromium opens no window narrower than
500 pixels), which reads the laid-out page back: nothing wider than the screen, no toolbar
button that sends data anywhere, hover labels and tables with the numbers of scores.parquet,
and the word index's search. Outside CI (env CI unset) the test skips when Chromium is missing;
in CI a missing Chromium is a failure.
"""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from chart_run_fixture import HOSTILE_WORDS, fixture_run_copy

from drift.publish import report

pytestmark = pytest.mark.browser

CHROMIUM_NAMES = ("chromium", "chromium-browser")


def chromium_path() -> str:
    for name in CHROMIUM_NAMES:
        found = shutil.which(name)
        if found:
            return found
    if os.environ.get("CI"):
        pytest.fail("CI is set but chromium is not on PATH; install Debian's chromium package.")
    pytest.skip("chromium is not installed and CI is unset; install chromium to run this test.")


def render(page: Path, scratch: Path) -> tuple[str, str]:
    """The DOM of ``page`` after its scripts ran, and Chromium's log (console messages)."""
    profile = scratch / f"profile-{page.stem}"
    command = [
        chromium_path(),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--no-first-run",
        f"--user-data-dir={profile}",
        # no network at all: every host resolves to nothing and any proxy is a dead end
        "--host-resolver-rules=MAP * ~NOTFOUND",
        "--proxy-server=127.0.0.1:9",
        "--enable-logging=stderr",
        "--v=0",
        "--virtual-time-budget=8000",
        "--window-size=1400,900",
        "--dump-dom",
        page.resolve().as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout, done.stderr


def console_problems(log: str) -> list[str]:
    """Console errors and refused (CSP-blocked) resources in Chromium's log."""
    return [
        line
        for line in log.splitlines()
        if "CONSOLE" in line and re.search(r"Uncaught|Error|Refused|violat", line)
    ]


def assert_page_ran_cleanly(dom: str, log: str, figures: int) -> None:
    recorded = re.search(r'<pre id="script-errors">([^<]*)</pre>', dom)
    assert recorded and recorded.group(1) == "", recorded
    assert not re.search(r"<html[^>]*data-script-errors", dom)
    assert not console_problems(log)
    # each drawn plotly figure holds an <svg class="main-svg"> (plotly.js's rendered output)
    drawn = len(re.findall(r'<div[^>]*class="[^"]*js-plotly-plot', dom))
    assert drawn == figures
    assert dom.count('class="main-svg"') >= figures
    assert '<p id="plotly-missing" class="nojs" hidden=""' in dom


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    chromium_path()
    root = fixture_run_copy(tmp_path_factory.mktemp("browser") / "run")
    report.build_report(root, top=2)
    return root


def test_word_page_draws_its_figures(run, tmp_path):
    dom, log = render(report.chart_word(run, "government"), tmp_path)
    assert_page_ran_cleanly(dom, log, figures=5)
    assert "<mark>government</mark>" in dom


def test_report_draws_its_figures_and_hostile_terms_as_text(run, tmp_path):
    dom, log = render(run / "charts" / "index.html", tmp_path)
    assert_page_ran_cleanly(dom, log, figures=2)
    ranked = dom.split('id="ranked"')[1].split('id="scatter"')[0]
    assert ranked.count('<a href="words/') == 2
    assert '<a href="word-index.html">' in dom
    assert "data-pwned" not in dom
    assert f'">{html.escape(HOSTILE_WORDS[0], quote=False)}</a></td>' in dom  # a linked term


# Markup-bearing words (the path-like one is a file-name concern, tested in test_report.py).
BROWSER_WORDS = [w for w in HOSTILE_WORDS if "pwned" in w or "<b>" in w]


@pytest.mark.parametrize("word", BROWSER_WORDS)
def test_hostile_words_render_as_text(run, tmp_path, word):
    dom, log = render(report.chart_word(run, word), tmp_path)
    assert_page_ran_cleanly(dom, log, figures=5)
    assert "data-pwned" not in dom  # no hostile handler or script ran
    assert "<img" not in dom
    # the word is the page's heading, as text (the serialised DOM escapes < > & as entities)
    heading = re.search(r'<h1 class="word">(.*?)</h1>', dom, flags=re.S)
    assert heading and html.unescape(heading.group(1)) == word
    # plotly drew the word in the path figure's legend verbatim: as text, not as its own markup
    svg_text = html.unescape(" ".join(re.findall(r"<text[^>]*>(.*?)</text>", dom, flags=re.S)))
    assert svg_text.count(f"“{word}” in each slice") == 1


def test_content_security_policy_blocks_markup_that_slipped_through(run, tmp_path):
    # Defence in depth: even raw markup in a page (an escaping bug) cannot run script, because
    # the page's policy allows only its own inline scripts by hash.
    leaked = (
        '<img src="x" onerror="document.body.dataset.pwned=1">'
        "<script>document.body.dataset.pwned=2</script>"
    )
    page = run / "charts" / "words" / "leak-test.html"
    page.write_text(report.page_html("leak", f"<p>{leaked}</p>", "../plotly.min.js"), "utf-8")
    dom, log = render(page, tmp_path)
    assert "data-pwned" not in dom
    assert any("Content Security Policy" in line or "Refused" in line for line in log.splitlines())


# ---------------------------------------------------------------------------- laid out at a width

#: Read back from the page inside the harness, once its figures are drawn.
HARNESS_SCRIPT = """
var frame = document.getElementById('page');
frame.addEventListener('load', function () {
  setTimeout(function () {
    var out = {};
    try {
      var win = frame.contentWindow, doc = win.document;
      out.width = doc.documentElement.clientWidth;
      out.scrollWidth = doc.documentElement.scrollWidth;
      out.errors = win.driftScriptErrors;
      out.figures = Array.prototype.map.call(doc.querySelectorAll('.js-plotly-plot'),
        function (gd) {
          var r = gd.getBoundingClientRect();
          return {id: gd.id, left: r.left, right: r.right,
                  svgs: gd.querySelectorAll('svg.main-svg').length};
        });
      // every block's right edge, except tables inside a scrolling box (they may be wider)
      out.boxes = Array.prototype.filter.call(
        doc.querySelectorAll('.table-wrap, table, p, h1, h2, pre, ol, .figure'),
        function (el) { return el.tagName !== 'TABLE' || !el.closest('.table-wrap'); }
      ).map(function (el) { return el.getBoundingClientRect().right; });
      out.buttons = Array.prototype.map.call(doc.querySelectorAll('.modebar-btn, a, button'),
        function (b) { return (b.getAttribute('data-title') || '') + ' ' +
                              (b.getAttribute('href') || '') + ' ' + b.textContent; });
      out.hover = {};
      Array.prototype.forEach.call(doc.querySelectorAll('.js-plotly-plot'), function (gd) {
        var labels = [];
        gd.data.forEach(function (trace, curve) {
          if (['distance', 'significant', 'words'].indexOf(trace.meta) < 0) { return; }
          var n = Math.min(gd.calcdata[curve].length, 3);
          for (var i = 0; i < n; i++) {
            win.Plotly.Fx.hover(gd, [{curveNumber: curve, pointNumber: i}]);
            var layer = gd.querySelector('.hoverlayer');
            labels.push({meta: trace.meta, point: i,
                         text: layer ? layer.textContent : ''});
          }
        });
        out.hover[gd.id] = labels;
      });
      var box = doc.getElementById('word-search');
      if (box) {
        box.value = 'SEARCH';
        box.dispatchEvent(new win.Event('input'));
        out.search = Array.prototype.filter.call(
          doc.querySelectorAll('#word-index tbody tr'), function (r) { return !r.hidden; }
        ).map(function (r) { return r.getAttribute('data-word'); });
      }
    } catch (e) { out.failure = String(e); }
    document.getElementById('result').textContent = JSON.stringify(out);
  }, 2000);
});
"""


def laid_out(page: Path, width: int, scratch: Path, search: str = "") -> tuple[dict, str]:
    """What the harness reads back from ``page`` laid out ``width`` CSS pixels wide, and the log."""
    harness = scratch / f"harness-{page.stem}-{width}.html"
    script = HARNESS_SCRIPT.replace("SEARCH", search.replace("'", "\\\\'"))
    harness.write_text(
        f'<!DOCTYPE html><html><body style="margin:0"><iframe id="page" '
        f'src="{html.escape(page.resolve().as_uri())}" '
        f'style="border:0;width:{width}px;height:1000px"></iframe>'
        f'<pre id="result">pending</pre><script>{script}</script></body></html>',
        encoding="utf-8",
    )
    command = [
        chromium_path(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
        f"--user-data-dir={scratch / f'profile-{page.stem}-{width}'}",
        "--host-resolver-rules=MAP * ~NOTFOUND", "--proxy-server=127.0.0.1:9",
        # the harness reads the page in its iframe: both are files, so let files share an origin
        "--allow-file-access-from-files",
        "--enable-logging=stderr", "--v=0", "--virtual-time-budget=10000",
        f"--window-size={max(width, 600) + 40},1100", "--dump-dom", harness.as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'<pre id="result">(.*?)</pre>', done.stdout, flags=re.S)
    assert found and found.group(1) != "pending", "the harness read nothing back"
    result = json.loads(html.unescape(found.group(1)))
    assert "failure" not in result, result.get("failure")
    return result, done.stderr


#: Toolbar buttons or links that would send a figure or the page somewhere else.
OFF_MACHINE = re.compile(r"cloud|share|chart studio|edit in|plotly\.com|plot\.ly|https?://", re.I)


def pages_of(run: Path) -> dict[str, Path]:
    charts = run / "charts"
    return {
        "word": report.chart_word(run, "government"),
        "report": charts / "index.html",
        "index": charts / "word-index.html",
    }


@pytest.mark.parametrize("width", [1400, 420])
@pytest.mark.parametrize("kind", ["word", "report", "index"])
def test_each_page_type_fits_its_width_runs_cleanly_and_stays_on_the_machine(
    run, tmp_path, kind, width
):
    result, log = laid_out(pages_of(run)[kind], width, tmp_path)
    assert result["errors"] == []
    assert not console_problems(log)
    # nothing wider than the screen: wide tables scroll inside their own box
    assert result["scrollWidth"] <= result["width"]
    assert max(result["boxes"]) <= result["width"] + 0.5
    expected = {"word": 5, "report": 2, "index": 0}[kind]
    assert len(result["figures"]) == expected
    for figure in result["figures"]:
        assert figure["svgs"] >= 1
        assert figure["left"] >= 0 and figure["right"] <= result["width"] + 0.5
    assert not [b for b in result["buttons"] if OFF_MACHINE.search(b)]
    if expected:
        assert any("Download plot" in b for b in result["buttons"])  # the toolbar is there


def js_precision(x: float, p: int) -> str:
    """``x.toPrecision(p)`` as JavaScript writes it (ECMA-262, Number.prototype.toPrecision),
    which d3-format's ``g`` type (plotly's hover formats) uses; minus signs as plain hyphens."""
    if x == 0:
        return "0" + ("." + "0" * (p - 1) if p > 1 else "")
    mantissa, exponent = f"{abs(x):.{p - 1}e}".split("e")
    e, digits = int(exponent), mantissa.replace(".", "")
    if e < -6 or e >= p:
        sign = "+" if e >= 0 else "-"
        text = digits[0] + ("." + digits[1:] if p > 1 else "") + f"e{sign}{abs(e)}"
    elif e >= 0:
        text = digits[: e + 1] + ("." + digits[e + 1 :] if p > e + 1 else "")
    else:
        text = "0." + "0" * (-e - 1) + digits
    return ("-" if x < 0 else "") + text


def test_js_precision_matches_javascript_examples():
    # examples worked from the ECMA-262 rules (values recalled from memory of JS behaviour)
    assert js_precision(37.2948, 3) == "37.3"
    assert js_precision(5.0, 3) == "5.00"
    assert js_precision(0.00000105, 3) == "0.00000105"
    assert js_precision(1.05e-7, 3) == "1.05e-7"
    assert js_precision(-2.5, 3) == "-2.50"
    assert js_precision(12345.0, 3) == "1.23e+4"


def test_hover_labels_and_tables_show_the_numbers_of_scores_parquet(run, tmp_path):
    import pandas as pd

    scores = pd.read_parquet(run / "scores.parquet").set_index("word")
    result, _ = laid_out(pages_of(run)["report"], 1400, tmp_path)
    labels = result["hover"]["fig-scatter"]
    assert labels and all(label["text"] for label in labels)
    for label in labels:
        label["text"] = label["text"].replace("\u2212", "-")
        word = re.match(r"(.*?) \(rank (\d+)\)", label["text"]).group(1)
        row = scores.loc[word]
        assert f"(rank {row['rank']})" in label["text"]
        assert f"displacement {row['displacement']:.3f}" in label["text"]
        assert f"z {js_precision(row['z'], 3)}, q {js_precision(row['q'], 3)}" in label["text"]
        assert f"count {row['count_from']:,} → {row['count_to']:,}" in label["text"]
    # the word page's timeline hover shows timeline.parquet's distance and the numbers table
    # the scores row
    timeline = pd.read_parquet(run / "timeline.parquet")
    rows = timeline[timeline["word"] == "government"].set_index("slice")
    result, _ = laid_out(pages_of(run)["word"], 1400, tmp_path)
    hovered = result["hover"]["fig-timeline"]
    assert len(hovered) == 3
    for label in hovered:
        # the label's lines run together in textContent: "<slice>distance <d> ± <sd>..."
        slice_label = next(s for s in rows.index if label["text"].startswith(f"{s}distance"))
        assert f"distance {rows.loc[slice_label, 'distance']:.3g}" in label["text"]
    dom, _ = render(pages_of(run)["word"], tmp_path)
    numbers = dom.split('id="numbers"', 1)[1]
    row = scores.loc["government"]
    assert f"z = {report.fmt(row['z'])}, p = {report.fmt(row['p'])}, q = {report.fmt(row['q'])}" \
        in html.unescape(numbers)


def test_the_word_index_finds_words_as_the_reader_types(run, tmp_path):
    import pandas as pd

    words = pd.read_parquet(run / "scores.parquet")["word"]
    result, _ = laid_out(pages_of(run)["index"], 420, tmp_path, search="gov")
    shown = [html.unescape(w) for w in result["search"]]
    assert shown and set(shown) == {w for w in words if "gov" in w.lower()}


@pytest.mark.parametrize("kind", ["word", "report"])
def test_pages_print_on_a4(run, tmp_path, kind):
    pdf = tmp_path / f"{kind}.pdf"
    command = [
        chromium_path(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
        f"--user-data-dir={tmp_path / 'profile'}", "--host-resolver-rules=MAP * ~NOTFOUND",
        "--proxy-server=127.0.0.1:9", "--virtual-time-budget=8000", "--no-pdf-header-footer",
        f"--print-to-pdf={pdf}", pages_of(run)[kind].resolve().as_uri(),
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and pdf.exists(), done.stderr[-2000:]
    boxes = re.findall(rb"/MediaBox \[0 0 ([0-9.]+) ([0-9.]+)\]", pdf.read_bytes())
    assert boxes
    # ISO 216 A4 is 210 x 297 mm = 595.3 x 841.9 PostScript points (1 pt = 1/72 inch)
    for width, height in boxes:
        assert float(width) == pytest.approx(595.3, abs=1.0)
        assert float(height) == pytest.approx(841.9, abs=1.0)
