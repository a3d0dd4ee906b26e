"""A real browser (Debian's headless Chromium) opens the pages from file:// with no network.

Checked in the rendered DOM: plotly drew every figure (its ``main-svg`` elements), the page's
error hook recorded no script error, the console shows no error or refused script, and hostile
words show as text without running. Outside CI (env CI unset) the test skips when Chromium is
missing; in CI a missing Chromium is a failure.
"""

from __future__ import annotations

import html
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
from chart_run_fixture import HOSTILE_WORDS, fixture_run_copy

from drift import report

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
        "--window-size=1300,900",
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
    assert_page_ran_cleanly(dom, log, figures=3)
    assert "<mark>government</mark>" in dom


def test_report_draws_its_figures_and_hostile_terms_as_text(run, tmp_path):
    dom, log = render(run / "charts" / "index.html", tmp_path)
    assert_page_ran_cleanly(dom, log, figures=2)
    assert dom.count('<a href="words/') == 2
    assert "data-pwned" not in dom
    assert f'<td class="word">{html.escape(HOSTILE_WORDS[0], quote=False)}</td>' in dom


# Markup-bearing words (the path-like one is a file-name concern, tested in test_report.py).
BROWSER_WORDS = [w for w in HOSTILE_WORDS if "pwned" in w or "<b>" in w]


@pytest.mark.parametrize("word", BROWSER_WORDS)
def test_hostile_words_render_as_text(run, tmp_path, word):
    dom, log = render(report.chart_word(run, word), tmp_path)
    assert_page_ran_cleanly(dom, log, figures=3)
    assert "data-pwned" not in dom  # no hostile handler or script ran
    assert "<img" not in dom
    # the word is the page's heading, as text (the serialised DOM escapes < > & as entities)
    heading = re.search(r'<h1 class="word">(.*?)</h1>', dom, flags=re.S)
    assert heading and html.unescape(heading.group(1)) == word
    # plotly drew the word in its figure titles verbatim: as text, not as its own markup
    svg_text = html.unescape(" ".join(re.findall(r"<text[^>]*>(.*?)</text>", dom, flags=re.S)))
    assert svg_text.count(f"“{word}”") == 3


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
