"""STAGE charts: one HTML page per word and an overview report, readable offline.

Pages live in ``RUN/charts/``: ``index.html`` (the overview), ``words/<safe_name(word)>.html``
(one per word) and one shared ``plotly.min.js`` that every page references relatively, so the
folder opens from ``file://`` with no network and 500 pages do not hold 500 copies of plotly.

Words are data from strangers. In HTML they pass through :func:`html.escape`; in figures through
:func:`drift.publish.charts.plot_text`; plotly's own JSON writer turns ``<`` and ``>`` into
``\\u003c`` and ``\\u003e`` inside the page's scripts; file names come from
:func:`drift.runfolder.safe_name`.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math
import os
import re
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from drift import runfolder
from drift.compare import neighbours, ranking
from drift.compare.changepoint import change_warranted, is_significant
from drift.errors import DriftError, unknown_word_error
from drift.options import MEASURE_WORDS, ReportOptions, score_column_of
from drift.publish import charts, evidence, wordviews
from drift.runfolder import RunPaths

CAUTION = (
    "These are statistical results from this corpus, not proof. What the archive holds "
    "(which sources and genres, how much text per period) and OCR noise bias them: a word can "
    "look shifted because its slice changed rather than its meaning. Read the example sentences "
    "before concluding."
)
PLOTLY_JS = "plotly.min.js"
#: Defence in depth on top of escaping: no network, and only the page's own inline scripts run
#: (listed by hash), so markup that slipped into a page could not run script.
CSP_TEMPLATE = (
    "default-src 'none'; script-src 'self' {hashes}; style-src 'unsafe-inline'; "
    "img-src data: blob:; font-src data:; connect-src 'none'; base-uri 'none'; form-action 'none'"
)
_SCRIPT_RE = re.compile(r"<script[^>]*>(.*?)</script>", re.S | re.I)
#: Plotly's toolbar keeps only what works offline (download as SVG, zoom, pan, reset). Its
#: share ("send to cloud") control is switched off and removed, so no control on a page can send
#: data off the machine (plotly.js 3 has no other link); the page's policy forbids requests too.
FIGURE_CONFIG = {
    "displaylogo": False,
    "responsive": True,
    "showSendToCloud": False,
    "toImageButtonOptions": {"format": "svg"},
    "modeBarButtonsToRemove": [
        "sendDataToCloud", "select2d", "lasso2d", "zoomIn2d", "zoomOut2d",
        "autoScale2d", "toggleSpikelines", "hoverClosestCartesian", "hoverCompareCartesian",
    ],
}
#: Words of a page's figures: the title is the page's own heading, so figures carry none (the
#: toolbar would cover it on a narrow screen).
UNTITLED = {"title_text": "", "margin_t": 36}
# A click on a point of the overview scatter opens the word's page, when it has one.
_CLICK_TO_PAGE = (
    "var gd=document.getElementById('{plot_id}');"
    "gd.on('plotly_click',function(ev){var p=ev.points[0];"
    "var u=p&&p.customdata&&p.customdata[6];if(u){window.location.href=u;}});"
)


# ---------------------------------------------------------------------------- reading the run


@dataclass
class RunData:
    """What the pages need from one run folder, read once."""

    root: Path
    labels: list[str]
    summary: pd.DataFrame
    manifest: dict[str, Any]
    scores: pd.DataFrame
    timeline: pd.DataFrame
    terms: pd.DataFrame
    composition: pd.DataFrame | None = None
    _standardiser: Any = field(default=None, repr=False)

    @property
    def rank_params(self) -> dict[str, Any]:
        return self.manifest.get("stages", {}).get("rank", {}).get("params", {}) or {}

    @property
    def between(self) -> tuple[str, str]:
        pair = self.rank_params.get("between") or [self.labels[0], self.labels[-1]]
        return str(pair[0]), str(pair[-1])

    @property
    def reference(self) -> str:
        return str(self.rank_params.get("reference") or self.between[0])

    @property
    def k(self) -> int:
        return int(self.rank_params.get("k") or 10)

    @property
    def alpha(self) -> float:
        return float(self.rank_params.get("alpha") or 0.05)

    @property
    def rank_record(self) -> dict[str, Any]:
        return self.manifest.get("stages", {}).get("rank", {}) or {}

    @property
    def evidence_measures(self) -> list[str]:
        """The measures the ``evidence`` z combined (run.json; two before the context change)."""
        return list((self.rank_record.get("evidence") or {}).get("measures")
                    or ["displacement", "local"])

    @property
    def evidence_weighting(self) -> str:
        """How the ``evidence`` z weighed its measures: 'kinds', 'gls' or 'equal' (run.json;
        'equal' for runs made before the weighting was recorded)."""
        return str((self.rank_record.get("evidence") or {}).get("weighting") or "equal")

    @property
    def significance(self) -> dict[str, Any] | None:
        """``stages.rank.significance`` ({"status": "full"|"weak"|"unavailable", "reasons"})."""
        found = self.rank_record.get("significance")
        return found if isinstance(found, dict) else None

    @property
    def measure(self) -> str:
        return str(self.rank_params.get("measure") or "displacement")

    @property
    def unpaired_measures(self) -> list[str]:
        """The measures whose noise question did not compare each word with its own measure in
        the control pair: all of them with ``--compare steps`` or an unpaired calibration, else
        those whose paired null fell back to the unpaired test (``not paired`` in run.json,
        when too few words moved less than in the control)."""
        record = self.rank_record
        per_measure = {name: entry.get("noise_null") for name, entry in
                       ((record.get("evidence") or {}).get("nulls") or {}).items()}
        if not per_measure:
            per_measure = {self.measure: record.get("noise_null")}
        calibration = self.rank_params.get("calibration") or {}
        if self.rank_params.get("compare", "pair") != "pair" or not calibration.get("paired"):
            return list(per_measure)
        return [name for name, null in per_measure.items()
                if isinstance(null, dict) and "not paired" in null]

    @property
    def noise_paired(self) -> bool:
        """Whether the noise question compared each word with its own control measure, for at
        least one of the measures the ranking combines."""
        record = self.rank_record
        measures = list((record.get("evidence") or {}).get("nulls") or {}) or [self.measure]
        return len(self.unpaired_measures) < len(measures)

    def change_range(self, word: str) -> wordviews.ChangeRange | None:
        """The word's change point with its range, when one is warranted (see
        :func:`change_warranted`), else None."""
        row = self.score_row(word)
        if not change_warranted(row, len(self.labels)):
            return None
        if self._standardiser is None:
            self._standardiser = wordviews.slice_standardiser(self.timeline, self.labels)
        rows = charts._word_rows(self.word_timeline(word), self.labels)
        return wordviews.change_range(
            rows["distance"].to_numpy(), rows["distance_sd"].to_numpy(), self.labels,
            str(row["change_point"]), float(row["change_step"]), self._standardiser,
            reference=self.reference,
        )

    def known_words(self) -> set[str]:
        return set(self.scores["word"]) | set(self.timeline["word"])

    def word_timeline(self, word: str) -> pd.DataFrame:
        return self.timeline[self.timeline["word"] == word]

    def score_row(self, word: str) -> pd.Series | None:
        hits = self.scores[self.scores["word"] == word]
        return None if hits.empty else hits.iloc[0]


def load_run(run: Path) -> RunData:
    """Read the slice summary, the manifest and the rank stage's tables of ``run``."""
    run = Path(run)
    paths = runfolder.existing_run(run, needs="scores")
    summary = runfolder.read_table(paths.root, "summary")
    scores = ranking.read_scores(run)
    timeline = ranking.read_timeline(run)
    terms = ranking.read_terms(run)
    for table in (scores, timeline, terms):
        table["word"] = table["word"].astype(str)
    timeline["slice"] = timeline["slice"].astype(str)
    if "significant" in scores:
        # Undecided (no null) reads as None, which pages treat as "not significant".
        decided = scores["significant"].notna()
        scores["significant"] = scores["significant"].astype(object).where(decided, None)
    return RunData(
        root=run,
        labels=runfolder.slice_labels(run),
        summary=summary,
        manifest=runfolder.read_manifest(run),
        scores=scores,
        timeline=timeline,
        terms=terms,
        composition=read_composition(run),
    )


def read_composition(run: Path) -> pd.DataFrame | None:
    """The run's slice composition table, or None when the run has none."""
    if not runfolder.TABLES["composition"].path(run).is_file():
        return None
    return runfolder.read_table(run, "composition")
    return None


# ---------------------------------------------------------------------------- HTML pieces


def esc(value: object) -> str:
    """Any value as HTML text."""
    return html.escape(str(value), quote=True)


def fmt(value: object, digits: int = 3) -> str:
    """A number for a table cell: n/a for missing, thousands separators for integers."""
    if value is None:
        return "n/a"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    try:
        number = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if math.isnan(number):
        return "n/a"
    if number != 0 and (abs(number) < 1e-4 or abs(number) >= 1e6):
        return f"{number:.2e}"
    if abs(number) < 1:
        return f"{number:.{digits}g}"
    return f"{number:,.{digits}f}".rstrip("0").rstrip(".")


def highlight_html(sentence: str, word: str) -> str:
    """A sentence as HTML with each token equal to ``word`` wrapped in <mark>."""
    return " ".join(
        f"<mark>{esc(token)}</mark>" if token == word else esc(token)
        for token in sentence.split(" ")
    )


class Fragment(NamedTuple):
    """A piece of page: its HTML and the body of the one inline script inside it."""

    html: str
    script: str


def figure_html(fig: go.Figure, div_id: str, post_script: str | None = None) -> Fragment:
    """A figure as a <div> and its script, without plotly.js (the page loads the shared copy)."""
    fragment = fig.to_html(
        include_plotlyjs=False,
        full_html=False,
        div_id=div_id,
        config=FIGURE_CONFIG,
        post_script=post_script,
    )
    scripts = _SCRIPT_RE.findall(fragment)
    if len(scripts) != 1 or fragment.lower().count("<script") != 1:
        raise RuntimeError(f"plotly's HTML for {div_id} holds {len(scripts)} scripts, not one")
    return Fragment(fragment, scripts[0])


def script_hash(script: str) -> str:
    """The CSP source expression that allows exactly this inline script."""
    digest = hashlib.sha256(script.encode("utf-8")).digest()
    return f"'sha256-{base64.b64encode(digest).decode('ascii')}'"


def content_security_policy(scripts: Iterable[str]) -> str:
    """The page's CSP: the listed inline scripts, plus scripts from the page's own folder."""
    hashes = " ".join(dict.fromkeys(script_hash(s) for s in scripts))
    return CSP_TEMPLATE.format(hashes=hashes)


STYLE = """
:root { --ink: #222; --muted: #5f5f5f; --rule: #d9d9d9; --accent: #0072B2; --warn: #E69F00; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
  font: 16px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
  sans-serif; }
main { max-width: 1080px; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; }
nav { font-size: 0.9rem; margin-bottom: 0.5rem; }
a { color: var(--accent); }
h1 { font-size: 1.7rem; margin: 0.2rem 0 0.4rem; overflow-wrap: anywhere; }
h2 { font-size: 1.2rem; margin: 2rem 0 0.5rem; padding-bottom: 0.2rem;
  border-bottom: 1px solid var(--rule); }
h3 { font-size: 1rem; margin: 1rem 0 0.3rem; }
p.lead { font-size: 1.05rem; max-width: 60rem; }
.muted { color: var(--muted); font-size: 0.9rem; }
.caution { border-left: 4px solid var(--warn); background: #fdf6e6; padding: 0.6rem 0.9rem;
  margin: 1rem 0; max-width: 60rem; }
table { border-collapse: collapse; font-size: 0.92rem; margin: 0.4rem 0 1rem; }
th, td { text-align: left; padding: 0.25rem 0.7rem 0.25rem 0; border-bottom: 1px solid var(--rule);
  vertical-align: top; }
th { font-weight: 600; border-bottom: 1.5px solid #999; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; padding-right: 1rem; }
td.num { white-space: nowrap; }
table.facts th { border-bottom: 1px solid var(--rule); font-weight: 600; width: 14rem; }
.word { overflow-wrap: anywhere; }
td.word { min-width: 7rem; }
.words { max-width: 40rem; overflow-wrap: anywhere; }
.figure { margin: 0.5rem 0 1rem; break-inside: avoid; page-break-inside: avoid; }
ol.examples { padding-left: 1.3rem; margin: 0.2rem 0 0.8rem; }
ol.examples li { margin: 0.25rem 0; max-width: 60rem; }
mark { background: #ffe8a3; padding: 0 0.15em; font-weight: 600; }
.sig { font-weight: 600; }
.columns { display: flex; flex-wrap: wrap; gap: 2rem; }
.columns > div { flex: 1 1 22rem; }
#script-errors { display: none; }
.nojs { border: 1px solid var(--warn); padding: 0.5rem; }
footer { margin-top: 3rem; color: var(--muted); font-size: 0.85rem; }
.table-wrap { overflow-x: auto; max-width: 100%; margin: 0.4rem 0 1rem; }
.table-wrap > table { margin: 0; }
table.neighbours td, table.ranked td, table.ranked th { white-space: nowrap; }
table.neighbours td.new .word { font-weight: 700; }
.sim { color: var(--muted); font-size: 0.78rem; font-variant-numeric: tabular-nums; }
.warning { border-left: 4px solid #D55E00; background: #fbeee6; padding: 0.5rem 0.9rem;
  margin: 1rem 0; max-width: 60rem; }
.warning ul { margin: 0.3rem 0 0; padding-left: 1.2rem; }
p.change { max-width: 60rem; }
.search { display: flex; flex-wrap: wrap; gap: 0.5rem 1rem; align-items: center;
  margin: 0.6rem 0; padding: 0.4rem 0; position: sticky; top: 0; background: #fff; }
.search input[type=search] { font: inherit; padding: 0.3rem 0.5rem; width: 16rem;
  max-width: 100%; }
tr[hidden] { display: none; }
code { overflow-wrap: anywhere; }
@media (max-width: 640px) {
  main { padding: 1rem 0.7rem 2rem; }
  h1 { font-size: 1.4rem; }
  table { font-size: 0.85rem; }
  table.facts th { width: auto; min-width: 8rem; }
  th, td { padding-right: 0.5rem; }
}
@media print {
  @page { size: A4; margin: 15mm 14mm; }
  body { font-size: 10.5pt; }
  main { max-width: none; padding: 0; }
  nav, .modebar-container, .search, noscript { display: none !important; }
  a { color: inherit; text-decoration: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
  .table-wrap { overflow: visible; }
  table { font-size: 8.5pt; }
  tr { break-inside: avoid; page-break-inside: avoid; }
  .figure { max-width: 100%; overflow: hidden; }
}
"""

# Records script errors into the page (for tests and for readers), and warns when plotly.js is
# missing (the charts folder was split up).
ERROR_HOOK = """
window.driftScriptErrors = [];
window.addEventListener('error', function (event) {
  window.driftScriptErrors.push(String(event.message || event.type));
  document.documentElement.setAttribute('data-script-errors', window.driftScriptErrors.length);
  var box = document.getElementById('script-errors');
  if (box) { box.textContent = window.driftScriptErrors.join('\\n'); }
}, true);
"""
# Also fits the figures to the printed page's width (A4 less margins, about 680 CSS pixels)
# while printing, and back afterwards.
PLOTLY_CHECK = """
if (!window.Plotly) {
  var note = document.getElementById('plotly-missing');
  if (note) { note.hidden = false; }
} else {
  var driftFigures = function () { return document.querySelectorAll('.js-plotly-plot'); };
  window.addEventListener('beforeprint', function () {
    driftFigures().forEach(function (gd) { Plotly.relayout(gd, {width: 680}); });
  });
  window.addEventListener('afterprint', function () {
    driftFigures().forEach(function (gd) {
      Plotly.relayout(gd, {width: null, autosize: true});
    });
  });
}
"""


def page_html(
    title: str, body: str, plotly_src: str | None, scripts: Sequence[str] = ()
) -> str:
    """A whole page: head with the style and error hook, the shared plotly.js, then ``body``.

    ``scripts`` are the bodies of the inline scripts inside ``body`` (from :func:`figure_html`);
    only they, the error hook and the plotly check may run. ``plotly_src`` None: a page without
    figures, which loads no plotly.js.
    """
    csp = content_security_policy([ERROR_HOOK, PLOTLY_CHECK, *scripts])
    plotly = (
        f'<script src="{esc(plotly_src)}"></script>' if plotly_src else ""
    )
    missing = (
        f"""<p id="plotly-missing" class="nojs" hidden>The charts need {esc(plotly_src)} next to
this page's folder; keep the charts folder together.</p>"""
        if plotly_src
        else ""
    )
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="{esc(csp)}">
<meta name="generator" content="drift {esc(runfolder.package_version())}">
<title>{esc(title)}</title>
<style>{STYLE}</style>
<script>{ERROR_HOOK}</script>
{plotly}
</head>
<body>
<main>
{missing}
<noscript><p class="nojs">The charts need JavaScript; the tables hold the numbers.</p>
</noscript>
{body}
<pre id="script-errors"></pre>
<footer>Made by drift {esc(runfolder.package_version())}.</footer>
</main>
<script>{PLOTLY_CHECK}</script>
</body>
</html>
"""


def caution_html() -> str:
    return f'<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>'


def facts_table(rows: Iterable[tuple[str, str]]) -> str:
    """A two-column table of label and (already HTML) value."""
    body = "".join(f"<tr><th>{esc(label)}</th><td>{value}</td></tr>" for label, value in rows)
    return f'<table class="facts">{body}</table>'


def _words_html(words: object) -> str:
    """Words (a list, or one space-separated string) as an HTML list, or 'none'."""
    items = [str(w) for w in words] if isinstance(words, list | tuple) else str(words or "").split()
    return esc(", ".join(items)) if items else '<span class="muted">none</span>'


def _list(words: Sequence[str], limit: int = 5) -> str:
    """'a, b and c' as HTML."""
    shown = [esc(w) for w in list(words)[:limit]]
    if len(shown) <= 1:
        return "".join(shown)
    return ", ".join(shown[:-1]) + " and " + shown[-1]


def _boundary(labels: Sequence[str], after: str) -> tuple[str, str]:
    at = list(labels).index(after)
    return labels[at - 1], labels[at]


@dataclass
class WordView:
    """Everything one word page shows, gathered once."""

    word: str
    row: pd.Series | None
    neighbours: pd.DataFrame  # slice, rank, neighbour, similarity (the word's rows)
    k: int
    change: wordviews.ChangeRange | None
    geometry: wordviews.WordGeometry | None = None

    def gained_lost(self, data: RunData) -> tuple[list[str], list[str]]:
        a, b = data.between
        return neighbours.gained_and_lost(self.neighbours, a, b, self.k)

    def turnover(self, data: RunData) -> float:
        a, b = data.between
        return neighbours.turnover(self.neighbours, a, b, self.k)


def verdict_html(data: RunData, row: pd.Series) -> str:
    return (
        f'<span class="sig">significant</span> at q ≤ {data.alpha:g}'
        if is_significant(row.get("significant"))
        else f"not significant at q ≤ {data.alpha:g}"
    )


def _lacking_clause(data: RunData) -> str:
    """Whether the words no control model has got a spread of their own (run.json's
    ``unpaired_class``)."""
    found = data.rank_record.get("unpaired_class") or {}
    words, spread = int(found.get("words") or 0), float(found.get("noise_spread") or 1.0)
    if spread > 1.0:
        return (f"its z was divided by the spread of the {words:,} words the control lacks "
                f"({spread:.2f}), which move more than the rest")
    return (f"the {words:,} words the control lacks were too few, or no wider than the rest, "
            "for a spread of their own")




def _measure_names(names: Sequence[str]) -> str:
    return " and ".join(MEASURE_WORDS.get(name, name) for name in names)


def _noise_question(data: RunData, row: pd.Series) -> str:
    """What the word's noise question compared it with (see :attr:`RunData.unpaired_measures`)."""
    like = "more than control words of its frequency and noise moved"
    if not data.noise_paired:
        said = like
    elif pd.isna(row.get("own_control", 0.0)):
        said = ("it is in no control model, so against control words of its frequency and "
                f"noise; {_lacking_clause(data)}")
    else:
        said = "more than the word itself moved in the control pair"
    unpaired = data.unpaired_measures if data.noise_paired else []
    said = f"{said}; {_measure_names(unpaired)}: {like}" if unpaired else said
    if data.measure == "evidence" and "context" in data.evidence_measures:
        said += ("; its counted contexts: more than between random halves of its own "
                 "occurrences, dealt in the proportion the two slices hold them")
    return said


def word_summary_html(data: RunData, view: WordView) -> str:
    """The lead: how the word changed (from which neighbours to which, and when), or that it
    did not move more than words of its frequency do."""
    a, b = data.between
    word, row = view.word, view.row
    w = f"“{esc(word)}”"
    if row is None:
        return (
            f'<p class="lead">{w} was not measured between {esc(a)} and {esc(b)} (it is missing '
            "or too rare in one of them); the charts show the slices where it was.</p>"
        )
    numbers = (
        f"It moved {fmt(row.get('displacement'))} in cosine distance (± "
        f"{fmt(row.get('displacement_sd'))} over seeds); z = {fmt(row.get('z'))}, "
        f"q = {fmt(row.get('q'))}: {verdict_html(data, row)}. It ranks {fmt(row.get('rank'))} "
        f"of {len(data.scores):,} measured words."
    )
    gained, lost = view.gained_lost(data)
    if is_significant(row.get("significant")):
        when = ""
        if view.change is not None:
            before, after = _boundary(data.labels, view.change.point)
            when = f", mostly between {esc(before)} and {esc(after)}"
        if gained and lost:
            how = (f"Between {esc(a)} and {esc(b)}, {w} moved from {_list(lost)} to "
                   f"{_list(gained)}{when}.")
        else:
            how = (f"Between {esc(a)} and {esc(b)}, {w} moved{when}, while its {view.k} nearest "
                   "neighbours stayed the same.")
        return f'<p class="lead">{how} {numbers}</p>'
    kept = view.k - len(gained)
    calibrated = pd.notna(row.get("z"))
    moved = (
        f"Between {esc(a)} and {esc(b)}, {w} did not move more than words of its frequency do "
        "by chance."
        if calibrated
        else f"Between {esc(a)} and {esc(b)}, {w} has no calibrated verdict (no control)."
    )
    return (
        f'<p class="lead">{moved} {numbers} Of its {view.k} nearest neighbours in {esc(a)}, '
        f"{kept} are still among its {view.k} nearest in {esc(b)}.</p>"
    )


def change_html(data: RunData, view: WordView) -> str:
    """One plain sentence about the change point and its range, or why there is none."""
    row = view.row
    if view.change is not None:
        c = view.change
        before, after = _boundary(data.labels, c.point)
        if c.low == c.high == c.point:
            spread = f"the same boundary in {c.share:.0%} of {c.redraws:,} redraws"
        else:
            lo_a, lo_b = _boundary(data.labels, c.low)
            hi_a, hi_b = _boundary(data.labels, c.high)
            spread = (
                f"range (shaded): from {esc(lo_a)} → {esc(lo_b)} to {esc(hi_a)} → {esc(hi_b)} in "
                f"{wordviews.COVERAGE:.0%} of {c.redraws:,} redraws; {c.share:.0%} chose "
                f"{esc(before)} → {esc(after)}"
            )
        return (
            f'<p class="change"><strong>Change point:</strong> it moved most between '
            f"{esc(before)} and {esc(after)} (mean distance after minus before: "
            f"+{fmt(c.step)}); {spread}. The range comes from a parametric bootstrap over the "
            "timeline: each slice's distance is redrawn around the before/after fit with its seed "
            "spread and the timeline's scatter, and the boundary chosen again.</p>"
        )
    if row is None:
        reason = "the word was not measured"
    elif len(data.labels) <= 2:
        reason = "a run of two slices has no boundary to choose"
    elif not is_significant(row.get("significant")):
        reason = "its change is not significant, so a boundary would only describe noise"
    else:
        reason = "its largest step goes back towards the reference, not away from it"
    return f'<p class="change"><strong>No clear change point:</strong> {reason}.</p>'


def _triple(row: pd.Series, prefix: str) -> str:
    return (f"z = {fmt(row.get(prefix + 'z'))}, p = {fmt(row.get(prefix + 'p'))}, "
            f"q = {fmt(row.get(prefix + 'q'))}")


def word_facts_html(data: RunData, view: WordView) -> str:
    """The numbers of a word: measures at the page's k, both nulls where the run has them,
    counts, change point and, for a significant word, the neighbours gained and lost."""
    row = view.row
    if row is None:
        return '<p class="muted">No scores for this word.</p>'
    a, b = data.between
    k = view.k
    facts = [
        ("rank", f"{fmt(row.get('rank'))} of {len(data.scores):,}"),
        ("cosine displacement", f"{fmt(row.get('displacement'))} ± "
         f"{fmt(row.get('displacement_sd'))} (seeds)"),
    ]
    if score_column_of(data.measure) != "displacement":
        rank_k = data.rank_params.get("k")
        facts.append((f"ranking score ({data.measure}, over the {rank_k} nearest as ranked)",
                      fmt(row.get("score"))))
    facts.append((f"neighbour turnover ({k} nearest, {a} vs {b})", fmt(view.turnover(data))))
    if "noise_z" in row.index and pd.notna(row.get("noise_z")):
        facts.append((f"beyond noise? ({_noise_question(data, row)})", _triple(row, "noise_")))
    if "drift_z" in row.index and pd.notna(row.get("drift_z")):
        facts.append(("more than typical words of its frequency? (this corpus)",
                      _triple(row, "drift_")))
    both = "noise_z" in row.index or "drift_z" in row.index
    facts += [
        ("headline (the more conservative)" if both else "against the time-shuffled control",
         _triple(row, "")),
        (f"significant at q ≤ {data.alpha:g}", fmt(is_significant(row.get("significant")))),
        (f"occurrences {a} → {b}", f"{fmt(row.get('count_from'))} → {fmt(row.get('count_to'))}"),
        ("per million tokens", f"{fmt(row.get('fpm_from'), 1)} → {fmt(row.get('fpm_to'), 1)}"),
    ]
    if view.change is not None:
        before, after = _boundary(data.labels, view.change.point)
        facts.append(("change point", f"{esc(before)} → {esc(after)} "
                      f"(step +{fmt(view.change.step)})"))
    else:
        facts.append(("change point", "none shown (see above)"))
    if is_significant(row.get("significant")):
        gained, lost = view.gained_lost(data)
        facts += [
            (f"neighbours gained by {b}", f'<span class="words">{_words_html(gained)}</span>'),
            (f"neighbours lost since {a}", f'<span class="words">{_words_html(lost)}</span>'),
        ]
    return facts_table(facts)


def neighbours_table_html(view: WordView, labels: Sequence[str]) -> str:
    """The word's nearest neighbours per slice as a plain table (readable without JavaScript).

    A neighbour in bold was not among the word's nearest in the slice before.
    """
    rows = view.neighbours
    columns = [label for label in labels if (rows["slice"] == label).any()]
    if not columns:
        return '<p class="muted">No neighbours: the word is in no slice of the candidates.</p>'
    lists = {label: neighbours.top_list(rows, label, view.k) for label in columns}
    sims = {
        label: dict(zip(rows.loc[rows["slice"] == label, "neighbour"],
                        rows.loc[rows["slice"] == label, "similarity"], strict=True))
        for label in columns
    }
    head = '<th class="num">#</th>' + "".join(f"<th>{esc(label)}</th>" for label in columns)
    body = []
    for i in range(view.k):
        cells = [f'<td class="num">{i + 1}</td>']
        previous: list[str] | None = None
        for label in columns:
            names = lists[label]
            if i < len(names):
                name = names[i]
                new = previous is not None and name not in previous
                cls = ' class="new"' if new else ""
                cells.append(f'<td{cls}><span class="word">{esc(name)}</span> '
                             f'<span class="sim">{sims[label][name]:.2f}</span></td>')
            else:
                cells.append("<td></td>")
            previous = names
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (
        f'<div class="table-wrap"><table class="neighbours"><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


def example_item_html(row: pd.Series | Any, word: str) -> str:
    """One example as a list item: the passage as written (the word marked, text escaped, its
    direction found per passage so right-to-left scripts read correctly), then where it is from:
    document id, date, metadata, and the source row or file."""
    data = row._asdict() if hasattr(row, "_asdict") else dict(row)
    left, match, right = (str(data.get(k) or "") for k in ("left", "match", "right"))
    if match:
        text = f"{esc(left)}<mark>{esc(match)}</mark>{esc(right)}"
    else:
        text = highlight_html(str(data.get("sentence") or left), word)
    tail = {"left", "match", "right", "sentence", "source_row", "source_file", "line",
            "original", "word", "slice", "document", "date", "Index"}
    facts = []
    if data.get("document") is not None and pd.notna(data.get("document")):
        facts.append(f"document <b>{esc(data['document'])}</b>")
    if data.get("date") is not None and pd.notna(data.get("date")):
        facts.append(esc(data["date"]))
    facts += [f"{esc(k)}: {esc(v)}" for k, v in data.items() if k not in tail and pd.notna(v)]
    if data.get("original"):
        where = data.get("source_file") or ""
        facts.append(f"{esc(where)}, row {int(data['source_row']):,}" if data.get("source_row")
                     else esc(where))
    else:
        facts.append(f"tokenized text, slices/{esc(data.get('slice'))}.txt line "
                     f"{int(data['line']):,}")
    return (f'<li><bdi dir="auto" class="passage">{text}</bdi> <span class="muted">('
            f"{' · '.join(facts)})</span></li>")


def examples_html(examples: pd.DataFrame, word: str, labels: Sequence[str]) -> str:
    """Example passages per slice, the word highlighted, with where each comes from."""
    parts = []
    for label in labels:
        rows = examples[examples["slice"] == label]
        parts.append(f"<h3>{esc(label)}</h3>")
        if rows.empty:
            parts.append('<p class="muted">No occurrence in this slice.</p>')
            continue
        items = "".join(example_item_html(r, word) for r in rows.itertuples(index=False))
        parts.append(f'<ol class="examples">{items}</ol>')
    for note in examples.attrs.get("notes", []):
        parts.append(f'<p class="muted">Note: {esc(note)}</p>')
    return "\n".join(parts)


def _anchors(data: RunData) -> Any:
    """The rank stage's anchors, parsed; all shared words when they cannot be read again."""
    from drift.compare.alignment import parse_anchors

    try:
        return parse_anchors(data.rank_params.get("anchors"))
    except DriftError:
        return None


def word_views(
    data: RunData, words: Sequence[str], *, k: int = neighbours.PAGE_K, geometry: bool = True,
    models: neighbours.RunModels | None = None,
) -> dict[str, WordView]:
    """The views of ``words``: neighbours from neighbours.parquet (or the models), change
    ranges and, with ``geometry``, path and self-similarity; each model is loaded at most once."""
    words = list(words)
    if not words:
        return {}
    table = neighbours.read_neighbours(data.root)
    needs_models = geometry or table is None or neighbours.stored_k(table) < k or not set(
        words
    ) <= set(table["word"])
    if needs_models and models is None:
        models = neighbours.load_run_models(data.root)
    near = neighbours.neighbours_for(data.root, words, k, models=models)
    shapes = (
        wordviews.word_geometry(models, words, near, data.reference, _anchors(data),
                                float(data.rank_params.get("anchor_trim", 0.0)))
        if geometry and models is not None
        else {}
    )
    return {
        word: WordView(
            word,
            data.score_row(word),
            near[near["word"] == word].drop(columns="word").reset_index(drop=True),
            k,
            data.change_range(word),
            shapes.get(word),
        )
        for word in words
    }


def run_word_figures(data: RunData, view: WordView) -> dict[str, go.Figure]:
    """The figures of one word from a loaded run and its view."""
    return charts.word_figures(
        data.word_timeline(view.word),
        view.neighbours,
        word=view.word,
        slices=data.labels,
        reference=data.reference,
        change=view.change,
        k=view.k,
        geometry=view.geometry,
    )


def word_figure_set(
    run: Path, word: str, *, k: int = neighbours.PAGE_K
) -> dict[str, go.Figure]:
    """The plotly figures of ``word``'s page, for a script or a notebook.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`drift.rank_run`.
    word : str
        A word of the scores (or an emerging or fading term).
    k : int
        Neighbours listed per slice in the neighbour figure.

    Returns
    -------
    dict of str to plotly.graph_objects.Figure
        ``timeline`` (distance from the reference slice, with the control's 95th percentile),
        ``neighbours``, ``frequency``, ``path`` (the word among its neighbours, PCA of the
        aligned vectors) and ``self_similarity``.

    Raises
    ------
    DriftError
        A run without scores, a word that is not in them (with close matches).

    Examples
    --------
    >>> import drift
    >>> figures = drift.word_figure_set(run, "tablet")
    >>> sorted(figures)
    ['frequency', 'neighbours', 'path', 'self_similarity', 'timeline']
    >>> figures["timeline"].show()  # doctest: +SKIP
    """
    data = load_run(Path(run))
    _check_word(data, word)
    return run_word_figures(data, word_views(data, [word], k=k)[word])


def _control_without_null(data: RunData) -> bool:
    """A control was trained but the rank stage could not fit a null from it."""
    stages = data.manifest.get("stages", {})
    trained = (stages.get("train") or {}).get("control") is not None
    return trained and data.rank_record.get("control_flagged", 0) is None


def mix_warnings(data: RunData) -> list[str]:
    """What ``drift slice`` warned of the slices' mix (:func:`drift.composition`): a metadata
    column whose token mix changes strongly between the compared slices or two neighbouring
    ones; none without a composition table."""
    if data.composition is None or data.composition.empty:
        return []
    from drift.ingest.documents import composition_shifts, mix_pairs

    return composition_shifts(data.composition, mix_pairs(data.labels, data.between))[1]


def warnings_html(data: RunData) -> str:
    """Warnings the terminal prints, for the pages: small slices, a mix of sources that
    changes strongly, a weak or missing null."""
    from drift.ingest.slicing import slice_warnings

    messages = []
    if "tokens" in data.summary:
        messages += [m[0].upper() + m[1:] for m in slice_warnings(data.summary)]
    messages += [m[0].upper() + m[1:] for m in mix_warnings(data)]
    sig = data.significance
    if sig and sig.get("status") in ("weak", "unavailable"):
        what = ("Significance is weak" if sig["status"] == "weak"
                else "Significance is unavailable")
        reasons = sig.get("reasons") or ([sig["reason"]] if sig.get("reason") else [])
        messages.append(f"{what}: {'; '.join(map(str, reasons)) or 'see the run record'}")
    elif sig is None and _control_without_null(data):
        messages.append(
            "The time-shuffled control gave no usable null (too few words measured in it), so "
            "z, p and q are empty and the ranking is descriptive."
        )
    if not messages:
        return ""
    items = "".join(f"<li>{esc(m)}</li>" for m in messages)
    return f'<div class="warning"><strong>Warnings</strong><ul>{items}</ul></div>'


def word_page(
    data: RunData,
    view: WordView,
    examples: pd.DataFrame,
    *,
    report_link: bool = False,
) -> str:
    """The whole HTML page of one word."""
    word, k = view.word, view.k
    figures = run_word_figures(data, view)
    parts = {
        name: figure_html(fig.update_layout(**UNTITLED), f"fig-{name}")
        for name, fig in figures.items()
    }
    nav = (
        '<nav><a href="../index.html">← overview report</a> · '
        '<a href="../word-index.html">all measured words</a></nav>'
        if report_link
        else ""
    )
    a, b = data.between
    geometry = ""
    wordviews_labels = charts.PATH_LABELS
    if "path" in parts:
        seeds = view.geometry.seeds if view.geometry else 1
        geometry = f"""
<h2 id="path">Its path among its neighbours</h2>
<p class="muted">Each slice's vectors are rotated onto {esc(data.reference)} (orthogonal
Procrustes); the word's vector in every slice and each neighbour's vector (in the slice where it
ranked best) are projected onto their first two principal components (PCA fitted on these points
only, first seed's models). The axes are scaled separately and keep only the share of variance
given on them, so read the order of the points more than their distances. Neighbours among the
{wordviews_labels} best somewhere are named; hover for the others.</p>
<div class="figure">{parts["path"].html}</div>
<h2 id="self-similarity">Compared with itself</h2>
<p class="muted">Cosine similarity of the word's aligned vectors between every two slices,
averaged over {seeds} seed{'s' if seeds != 1 else ''}, on a fixed 0 to 1 scale. Dark blocks of
similar slices before and after a boundary show a change; an even field shows a stable word.</p>
<div class="figure">{parts["self_similarity"].html}</div>"""
    evidence_note = _evidence_note(data.measure, data.evidence_measures, data.evidence_weighting)
    paired_drift = (data.rank_params.get("calibration") or {}).get("paired_drift", True)
    drift_covariates = (", seed-to-seed noise and control distance" if paired_drift
                        else " and seed-to-seed noise")
    body = f"""
{nav}
<p class="muted">drift · {esc(data.root.name)} · word page</p>
<h1 class="word">{esc(word)}</h1>
{word_summary_html(data, view)}
<p class="muted k-note">Neighbours on this page are the {k} nearest in each slice (similarity
averaged over seeds); gained, lost and turnover are counted among these {k}.</p>
{caution_html()}
{warnings_html(data)}
<h2 id="timeline">Where it moved</h2>
<p class="muted">Distance of the word's vector in each slice from its vector in
{esc(data.reference)}, after aligning the slices (orthogonal Procrustes). The y axis runs from 0 to
{charts.DISTANCE_AXIS_MAX:g} on every page, so pages compare at a glance. The grey band comes from
the control pair ({esc(a)} and {esc(b)} pooled and split at random, so without real change): 95%
of control words this frequent moved less than its top edge. It is a per-slice line, not corrected
for testing {len(data.scores):,} words at once, so a point above it is not by itself significant;
the verdict uses q, which is corrected (Benjamini-Hochberg). {_noise_sentence(data, view)} The
drift question compares it with words of the same frequency{drift_covariates} in this corpus;
the verdict needs both{evidence_note}.{
    ' The dotted line is the typical movement of words this frequent in this corpus.'
    if 'typical' in data.timeline else ''}</p>
{change_html(data, view)}
<div class="figure">{parts["timeline"].html}</div>
<h2 id="neighbours">Its neighbours in each slice</h2>
<p class="muted">The {k} nearest words in each slice, closest first, with their cosine
similarity; a word in bold was not among the {k} nearest in the slice before.</p>
{neighbours_table_html(view, data.labels)}
<div class="figure">{parts["neighbours"].html}</div>
{geometry}
<h2 id="frequency">How often it occurs</h2>
<div class="figure">{parts["frequency"].html}</div>
<h2 id="numbers">The numbers</h2>
{word_facts_html(data, view)}
<h2 id="examples">Examples from each slice</h2>
<p class="muted">Passages from the original documents, as written, drawn at random (fixed seed),
one per document and spread over sources; read them to check the change yourself.</p>
{examples_html(examples, word, data.labels)}
"""
    scripts = [part.script for part in parts.values()]
    return page_html(f"{word} · drift", body, f"../{PLOTLY_JS}", scripts)


# ---------------------------------------------------------------------------- overview page


def _wrap(table: str) -> str:
    """A table in a box that scrolls sideways on a narrow screen instead of the page."""
    return f'<div class="table-wrap">{table}</div>'


def frame_table_html(frame: pd.DataFrame, numeric: Iterable[str] | None = None) -> str:
    """Any small table (every column shown, numbers right-aligned)."""
    numeric = set(numeric) if numeric is not None else {
        c for c in frame.columns if pd.api.types.is_numeric_dtype(frame[c])
    }
    head = "".join(
        f'<th class="num">{esc(c)}</th>' if c in numeric else f"<th>{esc(c)}</th>"
        for c in frame.columns
    )
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="num">{fmt(value)}</td>' if c in numeric else f"<td>{esc(value)}</td>"
            for c, value in zip(frame.columns, row, strict=True)
        )
        + "</tr>"
        for row in frame.itertuples(index=False)
    )
    return _wrap(f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")


def slices_table_html(summary: pd.DataFrame) -> str:
    columns = [c for c in ("label", "start", "end", "documents", "tokens", "types", "dropped")
               if c in summary]
    return frame_table_html(summary[columns], {"documents", "tokens", "types", "dropped"})


def composition_html(data: RunData) -> str:
    """The slice composition table when the run has one (what each slice is made of)."""
    if data.composition is None or data.composition.empty:
        return (
            '<p class="muted">This run records no slice composition (no metadata was read); '
            "what each slice holds is known only by its size above.</p>"
        )
    frame = data.composition
    if len(frame) > 200:
        frame = frame.head(200)
    return (
        '<p class="muted">What each slice is made of: a change in what the archive collects '
        "moves words too.</p>" + frame_table_html(frame)
    )


def parameters_html(manifest: dict[str, Any]) -> str:
    stages = manifest.get("stages", {})
    rows = []
    for stage in ("slice", "train", "rank"):
        params = (stages.get(stage) or {}).get("params") or {}
        if params:
            text = ", ".join(
                f"{k} = {json.dumps(v, default=str)}" for k, v in sorted(params.items())
            )
            rows.append((stage, esc(text)))
    return facts_table(rows) if rows else '<p class="muted">No parameters recorded.</p>'


def control_html(data: RunData) -> str:
    stages = data.manifest.get("stages", {})
    train = stages.get("train") or {}
    if "control" in train and train.get("control") is None:
        return (
            "<p>No time-shuffled control was trained for this run, so z, p and q are not "
            "calibrated against a null; treat the ranking as descriptive.</p>"
        )
    flagged = (stages.get("rank") or {}).get("control_flagged")
    if flagged is None:
        return (
            "<p>The time-shuffled control gave no usable null (too few words measured in it), "
            "so z, p and q are not calibrated; treat the ranking as descriptive.</p>"
        )
    splits = int((train.get("control") or {}).get("splits", 1))
    averaged = (
        f" Each word's own control measure is its average over {splits} control pairs, each the "
        "compared slices pooled and split at random anew; the null is the first pair's."
        if splits > 1 else ""
    )
    return (
        f"<p>In the time-shuffled control, where no real change exists, the null flags "
        f"<strong>{fmt(int(flagged))}</strong> words at q ≤ {data.alpha:g}. A count near zero "
        "means the null is well calibrated; many flagged control words mean the q values below "
        f"are optimistic. {fmt(int(data.scores['significant'].fillna(False).astype(bool).sum()))} "
        f"real words are significant.{averaged}</p>"
    )


def _change_cell(row: Any, n_slices: int, labels: Sequence[str]) -> str:
    series = pd.Series(row._asdict())
    if not change_warranted(series, n_slices):
        return ""
    before, after = _boundary(labels, str(series["change_point"]))
    return f"{esc(before)} → {esc(after)}"


def _noise_sentence(data: RunData, view: WordView) -> str:
    """How the word page's noise question was asked, for this word."""
    if not data.noise_paired:
        return ("The noise question compares the log of the word's distance with control words "
                "of the same frequency and seed-to-seed noise.")
    row = view.row
    if row is not None and pd.isna(row.get("own_control", 0.0)):
        said = ("The noise question would compare the log of the word's distance with the log "
                "of its own distance between the control pair's halves, but no control model "
                "has this word (it fell under the minimum count in one half); it is compared "
                "with the distance expected of control words of its frequency and noise, and "
                f"{_lacking_clause(data)}.")
    else:
        said = ("The noise question compares the log of the word's distance with the log of its "
                "own distance between the control pair's halves.")
    unpaired = data.unpaired_measures
    if unpaired:
        said += (f" For {_measure_names(unpaired)} too few words moved less than in the control "
                 "pair for that comparison, so there it compares the word with control words of "
                 "the same frequency and seed-to-seed noise.")
    return said


def _evidence_note(
    measure: str, parts: Sequence[str] = ("displacement", "local"), weighting: str = "equal"
) -> str:
    """A sentence on how the ``evidence`` measure's z is made ('' for the other measures)."""
    if measure != "evidence":
        return ""
    if "context" not in parts:
        return (
            " (z combines two measures, each calibrated the same way: the cosine displacement "
            "and the change of the word's place among its own nearest neighbours; Stouffer's "
            "method, corrected for the correlation between them)"
        )
    how = {
        "kinds": "half the weight to the counted contexts and half to the two trained measures, "
                 "the sum's spread from the correlation between them, so that shared noise is "
                 "not counted twice",
        "gls": "weighted by their correlation (O'Brien's GLS combination), so that shared noise "
               "is not counted twice and the least correlated measure counts most",
    }.get(weighting, "Stouffer's method, corrected for the correlation between them, so that "
                     "shared noise is not counted twice")
    return (
        " (z combines three measures: the cosine displacement and the change of the word's "
        "place among its own nearest neighbours, each calibrated the same way, and the change "
        "of its contexts counted from the text, whose noise question is the word's own "
        "permutation null, its occurrences dealt at random between the two slices in the "
        f"proportion they hold them; {how})"
    )


def ranked_table_html(
    scores: pd.DataFrame,
    links: dict[str, str],
    measure: str | None = "displacement",
    labels: Sequence[str] | None = None,
) -> str:
    """The ranked words; the score column is left out when it is the displacement itself. A
    change point is shown only where it is warranted (significant, positive step)."""
    show_score = score_column_of(measure or "displacement") != "displacement"
    labels = list(labels or [])
    head = (
        '<tr><th class="num">rank</th><th>word</th>'
        + (f'<th class="num">score ({esc(measure)})</th>' if show_score else "")
        + '<th class="num">displacement</th><th class="num">z</th>'
        '<th class="num">q</th><th>significant</th><th class="num">count from → to</th>'
        "<th>change point</th></tr>"
    )
    rows = []
    for row in scores.itertuples(index=False):
        word = str(row.word)
        cell = esc(word)
        if word in links:
            cell = f'<a href="{esc(links[word])}">{cell}</a>'
        rows.append(
            f'<tr data-word="{esc(word)}"><td class="num">{fmt(row.rank)}</td>'
            f'<td class="word">{cell}</td>'
            + (f'<td class="num">{fmt(row.score)}</td>' if show_score else "")
            + f'<td class="num">{fmt(row.displacement)} ± {fmt(row.displacement_sd, 2)}</td>'
            f'<td class="num">{fmt(row.z)}</td><td class="num">{fmt(row.q)}</td>'
            f"<td>{'◆ yes' if is_significant(row.significant) else 'no'}</td>"
            f'<td class="num">{fmt(row.count_from)} → {fmt(row.count_to)}</td>'
            f"<td>{_change_cell(row, len(labels), labels) if labels else ''}</td></tr>"
        )
    return _wrap(f'<table class="ranked"><thead>{head}</thead><tbody>{"".join(rows)}</tbody>'
                 "</table>")


def shown_terms(terms: pd.DataFrame, kind: str, limit: int = 15) -> pd.DataFrame:
    """The terms of one kind the overview lists: the largest changes of frequency first."""
    part = terms[terms["kind"] == kind]
    growth = (part["fpm_to"] - part["fpm_from"]).abs()
    return part.loc[growth.sort_values(ascending=False, kind="stable").index].head(limit)


def terms_table_html(
    terms: pd.DataFrame, kind: str, a: str, b: str, limit: int = 15,
    links: dict[str, str] | None = None,
) -> str:
    part = shown_terms(terms, kind, limit)
    if part.empty:
        return f'<p class="muted">No {esc(kind)} terms.</p>'
    links = links or {}

    def word_cell(word: str) -> str:
        link = links.get(word)
        return f'<a href="{esc(link)}">{esc(word)}</a>' if link else esc(word)

    rows = "".join(
        f'<tr><td class="word">{word_cell(r.word)}</td><td class="num">{fmt(r.count_from)} → '
        f'{fmt(r.count_to)}</td><td class="num">{fmt(r.fpm_from, 1)} → {fmt(r.fpm_to, 1)}</td></tr>'
        for r in part.itertuples()
    )
    return _wrap(
        f"<table><thead><tr><th>word</th><th class=\"num\">count {esc(a)} → {esc(b)}</th>"
        f'<th class="num">per million</th></tr></thead><tbody>{rows}</tbody></table>'
    )


def term_rule_html(data: RunData) -> str:
    """The emerging/fading rule of the run, in words."""
    params = data.rank_params
    count = params.get("term_count", ranking.TERM_MIN_COUNT)
    ratio = params.get("term_ratio", ranking.TERM_RATIO)
    return (
        f"A word is <b>emerging</b> when it occurs at least {fmt(count)} times in "
        f"{esc(data.between[1])} "
        f"and its frequency per million tokens there is at least {fmt(ratio)} times that in "
        f"{esc(data.between[0])}; <b>fading</b> is the same the other way round "
        "(--term-count, --term-ratio)."
    )


def unmeasured_html(unmeasured: pd.DataFrame | None) -> str:
    """Target words that have no score, each with the reason."""
    if unmeasured is None or unmeasured.empty:
        return ""
    items = "".join(
        f'<li><span class="word">{esc(r.word)}</span>: {esc(r.reason)}</li>'
        for r in unmeasured.itertuples()
    )
    return f"<h3>Target words not measured</h3><ul>{items}</ul>"


def term_page(
    data: RunData,
    word: str,
    neighbours: pd.DataFrame,
    examples: pd.DataFrame,
    *,
    report_link: bool = False,
) -> str:
    """The page of an emerging or fading term: the rule it met, its frequency in every slice,
    its neighbours in the slices whose models know it, and examples from each slice."""
    term = data.terms[data.terms["word"] == word].iloc[0]
    a, b = data.between
    from drift.ingest.slicing import read_counts

    table = read_counts(data.root)
    counts = table.loc[word] if word in table.index else None
    tokens = dict(zip(data.summary["label"].astype(str), data.summary["tokens"], strict=False))
    rows = pd.DataFrame({
        "slice": list(data.labels),
        "count": [float(counts[label]) if counts is not None and label in counts else 0.0
                  for label in data.labels],
    })
    rows["fpm"] = [c * 1e6 / tokens[label] if tokens.get(label) else float("nan")
                   for c, label in zip(rows["count"], rows["slice"], strict=True)]
    figure = figure_html(
        charts.frequency_figure(rows, word=word, slices=data.labels), "fig-frequency"
    )
    if neighbours.empty:
        near = '<p class="muted">No slice\'s model knows this word (it is under the minimum count '
        near += "everywhere), so it has no neighbours.</p>"
    else:
        near = facts_table(
            (label, f'<span class="words">{_words_html(" ".join(part["neighbour"]))}</span>')
            for label, part in neighbours.groupby("slice", sort=False)
        )
    nav = '<nav><a href="../index.html">← overview report</a></nav>' if report_link else ""
    body = f"""
{nav}
<p class="muted">drift · {esc(data.root.name)} · {esc(term["kind"])} term</p>
<h1 class="word">{esc(word)}</h1>
<p class="lead">{esc(term["kind"]).capitalize()} between {esc(a)} and {esc(b)}:
{fmt(term["count_from"])} → {fmt(term["count_to"])} uses,
{fmt(term["fpm_from"], 1)} → {fmt(term["fpm_to"], 1)} per million tokens.
{'Its displacement is measured too (both slices know it).' if term.get("measured") else
 'It is too rare in one of the slices to measure its displacement.'}</p>
<p class="muted">{term_rule_html(data)}</p>
{caution_html()}
<h2 id="frequency">How often it occurs</h2>
<div class="figure">{figure.html}</div>
<h2 id="neighbours">Its neighbours where it is known</h2>
{near}
<h2 id="examples">Examples from each slice</h2>
<p class="muted">Passages from the original documents, as written, drawn at random (fixed seed),
one per document and spread over sources.</p>
{examples_html(examples, word, data.labels)}
"""
    return page_html(f"{word} · drift", body, f"../{PLOTLY_JS}", [figure.script])


def report_page(
    data: RunData, links: dict[str, str], top: int, targets: pd.DataFrame | None = None,
    unmeasured: pd.DataFrame | None = None,
) -> str:
    """The whole HTML page of the overview report (``targets``: the rows of the target words
    to list instead of the top ones, ``unmeasured``: target words without a score)."""
    a, b = data.between
    ranked = (data.scores.sort_values("rank", kind="stable").head(top) if targets is None
              else targets)
    scatter = charts.change_vs_frequency_figure(
        data.scores, measure=data.rank_params.get("measure"), links=links, alpha=data.alpha
    )
    drawn = len(charts.plotted_words(data.scores))
    sampled = (
        f" The chart draws {drawn:,} of the {len(data.scores):,} words: the top 500 and a random "
        "sample of the rest."
        if drawn < len(data.scores)
        else ""
    )
    parts = [figure_html(scatter.update_layout(**UNTITLED), "fig-scatter", _CLICK_TO_PAGE)]
    if not data.terms.empty:
        terms = charts.terms_figure(data.terms, slices=data.labels).update_layout(**UNTITLED)
        parts.append(figure_html(terms, "fig-terms"))
    terms_fig = f'<div class="figure">{parts[1].html}</div>' if len(parts) > 1 else ""
    tokens = int(data.summary["tokens"].sum()) if "tokens" in data.summary else 0
    significant = int(data.scores["significant"].fillna(False).astype(bool).sum())
    order_note = (
        "by z, how far each word moved beyond both nulls: its own movement in the control pair, "
        "and what words of its frequency and noisiness generally moved in this corpus"
        if data.scores["z"].notna().any()
        else "by the corpus drift null's z (no control in this run)"
    ) + _evidence_note(data.measure, data.evidence_measures, data.evidence_weighting)
    body = f"""
<nav><a href="word-index.html">All {len(data.scores):,} measured words</a></nav>
<p class="muted">drift · overview report</p>
<h1>{esc(data.root.name)}</h1>
<p class="lead">{len(data.labels)} time slices, {tokens:,} tokens. Words are compared between
{esc(a)} and {esc(b)}; {len(data.scores):,} words were measured in both, {significant:,} of them
significant at q ≤ {data.alpha:g}. <a href="word-index.html">Search every measured word</a>.</p>
{caution_html()}
{warnings_html(data)}
<h2 id="ranked">Most shifted words</h2>
<p class="muted">The top {len(ranked)} {order_note}; each word links to its page with
timeline, neighbours and example sentences. A change point is listed only for a significant word
whose distance stepped up.</p>
{ranked_table_html(ranked, links, data.rank_params.get("measure"), data.labels)}
{unmeasured_html(unmeasured)}
<h2 id="scatter">Change against frequency</h2>
<p class="muted">Rare words move more by chance. The line is the control's typical
{esc(charts.MEASURE_TITLES.get(charts.measure_column(data.scores, data.measure), "score"))} at
each frequency and the grey band its spread (z from −{charts.SPREAD_UNITS:g} to
{charts.SPREAD_UNITS:g}); words far above it moved more than their frequency explains. The best
ranked significant words are named. Hover for the word, click a charted word to open its
page.{sampled}</p>
<div class="figure">{parts[0].html}</div>
<h2 id="terms">Emerging and fading terms</h2>
<p class="muted">Words present in one period and absent or rare in the other cannot be measured by
displacement; here are their frequencies. {term_rule_html(data)}</p>
<div class="columns">
<div><h3>Emerging by {esc(b)}</h3>{terms_table_html(data.terms, "emerging", a, b, 15, links)}</div>
<div><h3>Fading since {esc(a)}</h3>{terms_table_html(data.terms, "fading", a, b, 15, links)}</div>
</div>
{terms_fig}
<h2 id="run">The run</h2>
<h3>Slices</h3>
{slices_table_html(data.summary)}
<h3>Slice composition</h3>
{composition_html(data)}
<h3>Control check</h3>
{control_html(data)}
<h3>Parameters</h3>
{parameters_html(data.manifest)}
"""
    scripts = [part.script for part in parts]
    return page_html(f"{data.root.name} · drift report", body, PLOTLY_JS, scripts)


# Filters the word index as the reader types (no server: the rows are in the page).
INDEX_SCRIPT = """
(function () {
  var box = document.getElementById('word-search');
  var only = document.getElementById('only-significant');
  var rows = document.querySelectorAll('#word-index tbody tr');
  var count = document.getElementById('shown-count');
  function apply() {
    var text = box.value.trim().toLowerCase();
    var shown = 0;
    for (var i = 0; i < rows.length; i++) {
      var row = rows[i];
      var hit = row.getAttribute('data-word').toLowerCase().indexOf(text) !== -1 &&
        (!only.checked || row.getAttribute('data-significant') === '1');
      row.hidden = !hit;
      if (hit) { shown++; }
    }
    count.textContent = shown.toLocaleString('en') + ' shown';
  }
  box.addEventListener('input', apply);
  only.addEventListener('change', apply);
  document.getElementById('search-tools').hidden = false;
  apply();
})();
"""


def word_index_page(data: RunData, links: dict[str, str]) -> str:
    """Every measured word with its numbers, searchable in the page (no server needed)."""
    rows = []
    labels = data.labels
    for row in data.scores.sort_values("rank", kind="stable").itertuples(index=False):
        word = str(row.word)
        cell = esc(word)
        if word in links:
            cell = f'<a href="{esc(links[word])}">{cell}</a>'
        sig = is_significant(row.significant)
        rows.append(
            f'<tr data-word="{esc(word)}" data-significant="{int(sig)}">'
            f'<td class="num">{fmt(row.rank)}</td><td class="word">{cell}</td>'
            f'<td class="num">{fmt(row.displacement)} ± {fmt(row.displacement_sd, 2)}</td>'
            f'<td class="num">{fmt(row.z)}</td><td class="num">{fmt(row.q)}</td>'
            f"<td>{'◆ yes' if sig else 'no'}</td>"
            f'<td class="num">{fmt(row.count_from)} → {fmt(row.count_to)}</td>'
            f"<td>{_change_cell(row, len(labels), labels)}</td></tr>"
        )
    a, b = data.between
    table = (
        '<table id="word-index" class="ranked"><thead><tr><th class="num">rank</th><th>word</th>'
        '<th class="num">displacement</th><th class="num">z</th><th class="num">q</th>'
        f'<th>significant</th><th class="num">count {esc(a)} → {esc(b)}</th>'
        f"<th>change point</th></tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )
    body = f"""
<nav><a href="index.html">← overview report</a></nav>
<p class="muted">drift · {esc(data.root.name)} · word index</p>
<h1>All {len(data.scores):,} measured words</h1>
<p class="lead">Every word measured in both {esc(a)} and {esc(b)}, best ranked first. Linked
words have a page; make a page for any other word with <code>drift chart RUN WORD</code>,
where RUN is this run's folder (the one holding <code>charts/</code>).</p>
<div id="search-tools" class="search" hidden>
<label for="word-search">Find a word</label>
<input id="word-search" type="search" autocomplete="off" spellcheck="false">
<label><input id="only-significant" type="checkbox"> significant only</label>
<span id="shown-count" class="muted"></span>
</div>
<noscript><p class="muted">Without JavaScript, use the browser's find (Ctrl+F).</p></noscript>
{_wrap(table)}
<script>{INDEX_SCRIPT}</script>
"""
    return page_html(f"{data.root.name} · all words · drift", body, None, [INDEX_SCRIPT])


# ---------------------------------------------------------------------------- writing


def write_plotly_js(charts_dir: Path) -> Path:
    """Write the one shared plotly.min.js into ``charts_dir`` unless an identical copy is there."""
    from plotly.offline import get_plotlyjs

    target = Path(charts_dir) / PLOTLY_JS
    content = get_plotlyjs().encode("utf-8")
    if not (target.exists() and target.stat().st_size == len(content)
            and target.read_bytes() == content):
        with runfolder.atomic_path(target) as tmp:
            tmp.write_bytes(content)
    os.chmod(target, 0o644)
    return target


def write_page(target: Path, text: str) -> None:
    """Write a page atomically, readable by others (a web server may publish the folder)."""
    runfolder.write_text_atomic(target, text)
    os.chmod(target, 0o644)


def word_page_path(run: Path, word: str) -> Path:
    """Where the page of ``word`` goes: charts/words/<safe_name(word)>.html."""
    return RunPaths(Path(run)).word_page(word)


def _check_word(data: RunData, word: str) -> None:
    known = data.known_words()
    if word in known or word in set(data.terms["word"]):
        return
    raise unknown_word_error(word, known, where=f"the measured words of {data.root}")


def _write_word_pages(
    data: RunData,
    words: Sequence[str],
    *,
    k: int,
    examples: int,
    seed: int,
    report_link: bool,
) -> dict[str, Path]:
    drawn = evidence.examples_for_words(data.root, words, per_slice=examples, seed=seed)
    measured = data.known_words()
    terms = [w for w in words if w not in measured]  # emerging or fading terms without a score
    models = neighbours.load_run_models(data.root) if terms else None  # loaded once for both
    views = word_views(data, [w for w in words if w in measured], k=k, models=models)
    near = neighbours.compute_neighbours(models, terms, k) if terms else None
    written = {}
    for word in words:
        examples_of = drawn[drawn["word"] == word]
        if word in views:
            page = word_page(data, views[word], examples_of, report_link=report_link)
        else:
            own = near[near["word"] == word].drop(columns="word").reset_index(drop=True)
            page = term_page(data, word, own, examples_of, report_link=report_link)
        target = word_page_path(data.root, word)
        write_page(target, page)
        written[word] = target
    return written


_REPORT = ReportOptions()  # the defaults of chart_word's and build_report's keyword arguments


def chart_word(
    run: Path, word: str, *, k: int = _REPORT.k, examples: int = _REPORT.examples,
    seed: int = _REPORT.seed,
) -> Path:
    """Write the HTML page of ``word`` and return its path.

    The page (``charts/words/<safe name>.html``) shows the word's timeline, its neighbours per
    slice, its frequency and example sentences; it works offline. Defaults and help texts of
    the options: :class:`drift.options.ChartOptions`.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`drift.rank_run`.
    word : str
        A word of the scores (or an emerging or fading term).
    k : int
        Neighbours listed per slice (``--neighbours``).
    examples : int
        Example sentences per slice.
    seed : int
        Seed of the example draw.

    Returns
    -------
    pathlib.Path
        The page.

    Raises
    ------
    DriftError
        A run without scores, a word that is not in them (with close matches), a bad number.

    Examples
    --------
    >>> import drift
    >>> page = drift.chart_word(run, "tablet", examples=1)
    >>> page.parent.name, page.suffix
    ('words', '.html')
    """
    run = Path(run)
    ReportOptions(k=k, examples=examples, seed=seed)
    data = load_run(run)
    _check_word(data, word)
    paths = RunPaths(run)
    with runfolder.run_lock(run):
        write_plotly_js(paths.charts_dir)
        report_link = paths.charts_dir.joinpath("index.html").exists()
        written = _write_word_pages(
            data, [word], k=k, examples=examples, seed=seed, report_link=report_link
        )
    return written[word]


def build_report(
    run: Path, *, top: int = _REPORT.top, k: int = _REPORT.k, examples: int = _REPORT.examples,
    seed: int = _REPORT.seed, words: str | Path | Sequence[str] | None = _REPORT.words,
) -> Path:
    """Write the overview report, the word index, the pages of the ``top`` ranked words (or
    of the target ``words``) and of the emerging and fading terms it lists.

    Defaults and help texts of the options: :class:`drift.options.ReportOptions`.

    Parameters
    ----------
    run : str or Path
        A run folder ranked with :func:`drift.rank_run`.
    top : int
        How many of the top-ranked words get a page.
    k : int
        Neighbours listed per slice (``--neighbours``).
    examples : int
        Example sentences per slice.
    seed : int
        Seed of the example draw.
    words : str, Path or list of str, optional
        Target words (a word-list file or a list): chart exactly these; the overview lists the
        ones not measured with the reason.

    Returns
    -------
    pathlib.Path
        ``charts/index.html``.

    Raises
    ------
    DriftError
        A run without scores, a bad number, a folder in use by another drift process.

    Examples
    --------
    >>> import drift
    >>> index = drift.build_report(run, top=2, examples=1)
    >>> index.name, len(list(index.parent.glob("words/*.html"))) >= 2
    ('index.html', True)
    """
    from drift.compare.targets import read_word_list, target_scores

    run = Path(run)
    ReportOptions(top=top, k=k, examples=examples, seed=seed)
    started = time.perf_counter()
    data = load_run(run)
    paths = RunPaths(run)
    targets = unmeasured = None
    if words is not None:
        wanted = read_word_list(words) if isinstance(words, str | Path) else list(words)
        targets, unmeasured = target_scores(run, wanted, data.scores)
        charted = list(targets["word"])
    else:
        charted = list(data.scores.sort_values("rank", kind="stable")["word"].head(top))
    terms = [w for kind in ("emerging", "fading") for w in shown_terms(data.terms, kind)["word"]]
    charted += [w for w in terms if w not in set(charted)]
    with runfolder.run_lock(run):
        write_plotly_js(paths.charts_dir)
        written = _write_word_pages(
            data, charted, k=k, examples=examples, seed=seed, report_link=True
        )
        links = {word: f"words/{path.name}" for word, path in written.items()}
        existing = {
            word: f"words/{word_page_path(run, word).name}"
            for word in data.scores["word"]
            if word not in links and word_page_path(run, word).exists()
        }
        write_page(paths.word_index,
                   word_index_page(data, {**existing, **links}))
        index = paths.report_index
        write_page(index, report_page(data, links, top, targets, unmeasured))
        runfolder.record_stage(
            run,
            "charts",
            {"top": top, "k": k, "examples": examples, "seed": seed},
            runfolder.content_print(paths.scores_parquet),
            time.perf_counter() - started,
            {"pages": len(written)},
        )
    return index
