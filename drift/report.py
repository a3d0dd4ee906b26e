"""STAGE charts: one HTML page per word and an overview report, readable offline.

Pages live in ``RUN/charts/``: ``index.html`` (the overview), ``words/<safe_name(word)>.html``
(one per word) and one shared ``plotly.min.js`` that every page references relatively, so the
folder opens from ``file://`` with no network and 500 pages do not hold 500 copies of plotly.

Words are data from strangers. In HTML they pass through :func:`html.escape`; in figures through
:func:`drift.charts.plot_text`; plotly's own JSON writer turns ``<`` and ``>`` into ``\\u003c`` and
``\\u003e`` inside the page's scripts; file names come from :func:`drift.runfolder.safe_name`.
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
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from drift import charts, evidence, ranking, runfolder
from drift.errors import DriftError, unknown_word_error
from drift.options import ReportOptions
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
FIGURE_CONFIG = {
    "displaylogo": False,
    "responsive": True,
    "toImageButtonOptions": {"format": "svg"},
    "modeBarButtonsToRemove": ["select2d", "lasso2d"],
}
# A click on a point of the overview scatter opens the word's page, when it has one.
_CLICK_TO_PAGE = (
    "var gd=document.getElementById('{plot_id}');"
    "gd.on('plotly_click',function(ev){var p=ev.points[0];"
    "var u=p&&p.customdata&&p.customdata[5];if(u){window.location.href=u;}});"
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
    summary = pd.read_csv(paths.slice_summary, dtype={"label": str})
    scores = ranking.read_scores(run)
    timeline = ranking.read_timeline(run)
    terms = ranking.read_terms(run)
    for table in (scores, timeline, terms):
        table["word"] = table["word"].astype(str)
    timeline["slice"] = timeline["slice"].astype(str)
    return RunData(
        root=run,
        labels=ranking.slice_labels(run),
        summary=summary,
        manifest=runfolder.read_manifest(run),
        scores=scores,
        timeline=timeline,
        terms=terms,
    )


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
@media print {
  body { font-size: 11pt; }
  main { max-width: none; padding: 0; }
  nav, .modebar-container { display: none !important; }
  a { color: inherit; text-decoration: none; }
  h2 { break-after: avoid; page-break-after: avoid; }
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
PLOTLY_CHECK = """
if (!window.Plotly) {
  var note = document.getElementById('plotly-missing');
  if (note) { note.hidden = false; }
}
"""


def page_html(title: str, body: str, plotly_src: str, scripts: Sequence[str] = ()) -> str:
    """A whole page: head with the style and error hook, the shared plotly.js, then ``body``.

    ``scripts`` are the bodies of the inline scripts inside ``body`` (from :func:`figure_html`);
    only they, the error hook and the plotly check may run.
    """
    csp = content_security_policy([ERROR_HOOK, PLOTLY_CHECK, *scripts])
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
<script src="{esc(plotly_src)}"></script>
</head>
<body>
<main>
<p id="plotly-missing" class="nojs" hidden>The charts need {esc(plotly_src)} next to this page's
folder; keep the charts folder together.</p>
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


def _words_html(text: object) -> str:
    words = str(text or "").split()
    return esc(", ".join(words)) if words else '<span class="muted">none</span>'


# ---------------------------------------------------------------------------- word page


def word_summary_html(data: RunData, word: str, row: pd.Series | None) -> str:
    """One plain paragraph that says what the numbers mean for this word."""
    a, b = data.between
    w = f"“{esc(word)}”"
    if row is None:
        return (
            f'<p class="lead">{w} was not measured between {esc(a)} and {esc(b)} (it is missing '
            "or too rare in one of them); the charts show the slices where it was.</p>"
        )
    verdict = (
        f'<span class="sig">significant</span> at q ≤ {data.alpha:g}'
        if bool(row.get("significant"))
        else f"not significant at q ≤ {data.alpha:g}"
    )
    return (
        f'<p class="lead">Between {esc(a)} and {esc(b)}, {w} moved {fmt(row.get("displacement"))} '
        f"in cosine distance (spread over seeds ± {fmt(row.get('displacement_sd'))}). Against "
        f"control words of similar frequency that is z = {fmt(row.get('z'))}, "
        f"q = {fmt(row.get('q'))}: {verdict}. It ranks {fmt(row.get('rank'))} of "
        f"{len(data.scores):,} measured words.</p>"
    )


def word_facts_html(data: RunData, row: pd.Series | None) -> str:
    """The numbers of a word: score, z, p, q, counts, change point, neighbours gained and lost."""
    if row is None:
        return '<p class="muted">No scores for this word.</p>'
    a, b = data.between
    measure = data.rank_params.get("measure", "score")
    step = row.get("change_step")
    change = (
        f"from {esc(row.get('change_point'))} (step {fmt(step)})"
        if pd.notna(row.get("change_point")) and str(row.get("change_point"))
        else "none found"
    )
    return facts_table(
        [
            ("rank", f"{fmt(row.get('rank'))} of {len(data.scores):,}"),
            (f"score ({measure})", fmt(row.get("score"))),
            ("cosine displacement", f"{fmt(row.get('displacement'))} ± "
             f"{fmt(row.get('displacement_sd'))} (seeds)"),
            ("neighbour turnover", f"{fmt(row.get('turnover'))} ± {fmt(row.get('turnover_sd'))}"),
            ("local neighbourhood change", f"{fmt(row.get('local'))} ± {fmt(row.get('local_sd'))}"),
            ("z against the control", fmt(row.get("z"))),
            ("p against the control", fmt(row.get("p"))),
            ("q (Benjamini-Hochberg)", fmt(row.get("q"))),
            (f"significant at q ≤ {data.alpha:g}", fmt(bool(row.get("significant")))),
            (f"occurrences {a} → {b}",
             f"{fmt(row.get('count_from'))} → {fmt(row.get('count_to'))}"),
            ("per million tokens",
             f"{fmt(row.get('fpm_from'), 1)} → {fmt(row.get('fpm_to'), 1)}"),
            ("change point", change),
            (f"neighbours gained by {b} (top {data.k})",
             f'<span class="words">{_words_html(row.get("gained"))}</span>'),
            (f"neighbours lost since {a} (top {data.k})",
             f'<span class="words">{_words_html(row.get("lost"))}</span>'),
        ]
    )


def examples_html(examples: pd.DataFrame, word: str, labels: Sequence[str]) -> str:
    """Example passages per slice, the word highlighted, with where each comes from."""
    parts = []
    for label in labels:
        rows = examples[examples["slice"] == label]
        parts.append(f"<h3>{esc(label)}</h3>")
        if rows.empty:
            parts.append('<p class="muted">No occurrence in this slice.</p>')
            continue
        items = "".join(
            f'<li>{highlight_html(r.sentence, word)} <span class="muted">'
            f"(slices/{esc(label)}.txt, line {int(r.line):,})</span></li>"
            for r in rows.itertuples()
        )
        parts.append(f'<ol class="examples">{items}</ol>')
    return "\n".join(parts)


def run_word_figures(
    data: RunData, word: str, neighbours: pd.DataFrame, *, k: int = 10
) -> dict[str, go.Figure]:
    """The three figures of ``word`` from a loaded run and its neighbours per slice."""
    row = data.score_row(word)
    return charts.word_figures(
        data.word_timeline(word),
        neighbours,
        word=word,
        slices=data.labels,
        reference=data.reference,
        change_point=None if row is None else row.get("change_point"),
        k=k,
    )


def word_figure_set(run: Path, word: str, *, k: int = 10) -> dict[str, go.Figure]:
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
        ``neighbours`` and ``frequency``.

    Raises
    ------
    DriftError
        A run without scores, a word that is not in them (with close matches).

    Examples
    --------
    >>> import drift
    >>> figures = drift.word_figure_set(run, "tablet")
    >>> sorted(figures)
    ['frequency', 'neighbours', 'timeline']
    >>> figures["timeline"].show()  # doctest: +SKIP
    """
    data = load_run(Path(run))
    _check_word(data, word)
    return run_word_figures(data, word, ranking.neighbours_by_slice(run, word, k=k), k=k)


def word_page(
    data: RunData,
    word: str,
    neighbours: pd.DataFrame,
    examples: pd.DataFrame,
    *,
    k: int = 10,
    report_link: bool = False,
) -> str:
    """The whole HTML page of one word; ``neighbours`` holds its top ``k`` per slice."""
    row = data.score_row(word)
    figures = run_word_figures(data, word, neighbours, k=k)
    parts = {name: figure_html(fig, f"fig-{name}") for name, fig in figures.items()}
    nav = '<nav><a href="../index.html">← overview report</a></nav>' if report_link else ""
    body = f"""
{nav}
<p class="muted">drift · {esc(data.root.name)} · word page</p>
<h1 class="word">{esc(word)}</h1>
{word_summary_html(data, word, row)}
{caution_html()}
<h2 id="timeline">Where it moved</h2>
<p class="muted">Distance of the word's vector in each slice from its vector in
{esc(data.reference)}, after aligning the slices (orthogonal Procrustes). The grey band is what
the time-shuffled control shows for words this frequent; points above it moved more than chance
would move them.</p>
<div class="figure">{parts["timeline"].html}</div>
<h2 id="neighbours">Its neighbours over time</h2>
<p class="muted">Rows are the words closest to it in any slice; a dark cell is a close neighbour in
that slice, an empty cell means the word was not among its {k} nearest there.</p>
<div class="figure">{parts["neighbours"].html}</div>
<h2 id="frequency">How often it occurs</h2>
<div class="figure">{parts["frequency"].html}</div>
<h2 id="numbers">The numbers</h2>
{word_facts_html(data, row)}
<h2 id="examples">Examples from each slice</h2>
<p class="muted">Drawn at random (fixed seed) from the slice files; read them to check the change
yourself.</p>
{examples_html(examples, word, data.labels)}
"""
    scripts = [part.script for part in parts.values()]
    return page_html(f"{word} · drift", body, f"../{PLOTLY_JS}", scripts)


# ---------------------------------------------------------------------------- overview page


def slices_table_html(summary: pd.DataFrame) -> str:
    columns = [c for c in ("label", "start", "end", "documents", "tokens", "types", "dropped")
               if c in summary]
    numeric = {"documents", "tokens", "types", "dropped"}
    head = "".join(
        f'<th class="num">{esc(c)}</th>' if c in numeric else f"<th>{esc(c)}</th>" for c in columns
    )
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="num">{fmt(row[c])}</td>' if c in numeric else f"<td>{esc(row[c])}</td>"
            for c in columns
        )
        + "</tr>"
        for _, row in summary.iterrows()
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


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
    return (
        f"<p>In the time-shuffled control, where no real change exists, the null flags "
        f"<strong>{fmt(int(flagged))}</strong> words at q ≤ {data.alpha:g}. A count near zero "
        "means the null is well calibrated; many flagged control words mean the q values below "
        f"are optimistic. {fmt(int(data.scores['significant'].fillna(False).astype(bool).sum()))} "
        "real words are significant.</p>"
    )


def ranked_table_html(
    scores: pd.DataFrame, links: dict[str, str], measure: str | None = "displacement"
) -> str:
    """The ranked words; the score column is left out when it is the displacement itself."""
    show_score = measure != "displacement"
    head = (
        '<tr><th class="num">rank</th><th>word</th>'
        + (f'<th class="num">score ({esc(measure)})</th>' if show_score else "")
        + '<th class="num">displacement</th><th class="num">turnover</th><th class="num">z</th>'
        '<th class="num">q</th><th>significant</th><th class="num">count from → to</th>'
        "<th>change point</th><th>neighbours gained</th></tr>"
    )
    rows = []
    for row in scores.itertuples(index=False):
        word = str(row.word)
        cell = esc(word)
        if word in links:
            cell = f'<a href="{esc(links[word])}">{cell}</a>'
        gained = " ".join(str(getattr(row, "gained", "") or "").split()[:5])
        rows.append(
            f'<tr><td class="num">{fmt(row.rank)}</td><td class="word">{cell}</td>'
            + (f'<td class="num">{fmt(row.score)}</td>' if show_score else "")
            + f'<td class="num">{fmt(row.displacement)} ± {fmt(row.displacement_sd, 2)}</td>'
            f'<td class="num">{fmt(row.turnover)}</td><td class="num">{fmt(row.z)}</td>'
            f'<td class="num">{fmt(row.q)}</td>'
            f"<td>{'◆ yes' if bool(row.significant) else 'no'}</td>"
            f'<td class="num">{fmt(row.count_from)} → {fmt(row.count_to)}</td>'
            f"<td>{esc(row.change_point) if pd.notna(row.change_point) else ''}</td>"
            f'<td class="words">{esc(gained)}</td></tr>'
        )
    return f"<table><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>"


def terms_table_html(terms: pd.DataFrame, kind: str, a: str, b: str, limit: int = 15) -> str:
    part = terms[terms["kind"] == kind]
    if part.empty:
        return f'<p class="muted">No {esc(kind)} terms.</p>'
    growth = (part["fpm_to"] - part["fpm_from"]).abs()
    part = part.loc[growth.sort_values(ascending=False, kind="stable").index].head(limit)
    rows = "".join(
        f'<tr><td class="word">{esc(r.word)}</td><td class="num">{fmt(r.count_from)} → '
        f'{fmt(r.count_to)}</td><td class="num">{fmt(r.fpm_from, 1)} → {fmt(r.fpm_to, 1)}</td></tr>'
        for r in part.itertuples()
    )
    return (
        f"<table><thead><tr><th>word</th><th class=\"num\">count {esc(a)} → {esc(b)}</th>"
        f'<th class="num">per million</th></tr></thead><tbody>{rows}</tbody></table>'
    )


def report_page(data: RunData, links: dict[str, str], top: int) -> str:
    """The whole HTML page of the overview report."""
    a, b = data.between
    ranked = data.scores.sort_values("rank", kind="stable").head(top)
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
    untitled = {"title_text": "", "margin_t": 30}
    parts = [figure_html(scatter.update_layout(**untitled), "fig-scatter", _CLICK_TO_PAGE)]
    if not data.terms.empty:
        terms = charts.terms_figure(data.terms, slices=data.labels).update_layout(**untitled)
        parts.append(figure_html(terms, "fig-terms"))
    terms_fig = parts[1].html if len(parts) > 1 else ""
    tokens = int(data.summary["tokens"].sum()) if "tokens" in data.summary else 0
    order_note = (
        "by z, how far each word moved beyond what words of its frequency move in the control"
        if data.scores["z"].notna().any()
        else "by score (no control in this run)"
    )
    body = f"""
<p class="muted">drift · overview report</p>
<h1>{esc(data.root.name)}</h1>
<p class="lead">{len(data.labels)} time slices, {tokens:,} tokens. Words are compared between
{esc(a)} and {esc(b)}; {len(data.scores):,} words were measured in both.</p>
{caution_html()}
<h2 id="ranked">Most shifted words</h2>
<p class="muted">The top {len(ranked)} {order_note}; each word links to its page with
timeline, neighbours and example sentences.</p>
{ranked_table_html(ranked, links, data.rank_params.get("measure"))}
<h2 id="scatter">Change against frequency</h2>
<p class="muted">Rare words move more by chance. The line is the control's typical displacement at
each frequency; words far above it moved more than their frequency explains. Hover for the word,
click a charted word to open its page.{sampled}</p>
<div class="figure">{parts[0].html}</div>
<h2 id="terms">Emerging and fading terms</h2>
<p class="muted">Words present in one period and absent or rare in the other cannot be measured by
displacement; here are their frequencies.</p>
<div class="columns">
<div><h3>Emerging by {esc(b)}</h3>{terms_table_html(data.terms, "emerging", a, b)}</div>
<div><h3>Fading since {esc(a)}</h3>{terms_table_html(data.terms, "fading", a, b)}</div>
</div>
<div class="figure">{terms_fig}</div>
<h2 id="run">The run</h2>
<h3>Slices</h3>
{slices_table_html(data.summary)}
<h3>Control check</h3>
{control_html(data)}
<h3>Parameters</h3>
{parameters_html(data.manifest)}
"""
    scripts = [part.script for part in parts]
    return page_html(f"{data.root.name} · drift report", body, PLOTLY_JS, scripts)


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
    return RunPaths(Path(run)).word_charts_dir / f"{runfolder.safe_name(word)}.html"


def _check_word(data: RunData, word: str) -> None:
    known = data.known_words()
    if word in known:
        return
    term = data.terms[data.terms["word"] == word]
    if not term.empty:
        kind = str(term["kind"].iloc[0])
        a, b = data.between
        raise DriftError(
            f"'{word}' was not measured: it is {'an' if kind[0] in 'aeiou' else 'a'} {kind} term "
            f"(too rare in "
            f"{a if kind == 'emerging' else b} to compare); see its frequencies in the report's "
            f"emerging and fading terms ('drift report {data.root}')."
        )
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
    written = {}
    for word in words:
        page = word_page(
            data,
            word,
            ranking.neighbours_by_slice(data.root, word, k=k),
            drawn[drawn["word"] == word],
            k=k,
            report_link=report_link,
        )
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
    seed: int = _REPORT.seed,
) -> Path:
    """Write the overview report and the pages of the ``top`` ranked words.

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
    >>> index.name, len(list(index.parent.glob("words/*.html")))
    ('index.html', 2)
    """
    run = Path(run)
    ReportOptions(top=top, k=k, examples=examples, seed=seed)
    started = time.perf_counter()
    data = load_run(run)
    paths = RunPaths(run)
    words = list(data.scores.sort_values("rank", kind="stable")["word"].head(top))
    with runfolder.run_lock(run):
        write_plotly_js(paths.charts_dir)
        written = _write_word_pages(
            data, words, k=k, examples=examples, seed=seed, report_link=True
        )
        links = {
            word: f"words/{path.name}" for word, path in written.items()
        }
        index = paths.charts_dir / "index.html"
        write_page(index, report_page(data, links, top))
        runfolder.record_stage(
            run,
            "charts",
            {"top": top, "k": k, "examples": examples, "seed": seed},
            runfolder.fingerprint_path(paths.scores_parquet),
            time.perf_counter() - started,
            {"pages": len(written)},
        )
    return index
