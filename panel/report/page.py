"""One self-contained HTML page from a :class:`~panel.report.content.ReportContent`.

The page has no scripts and loads nothing: styles are inline and charts are SVG images embedded as
``data:`` URIs, and a Content-Security-Policy forbids anything else, so the file can be mailed and
opened offline.  Every piece of text from the store (asset and dataset names, labels, messages) is
HTML-escaped.  Premia are annualised percent (x periods a year); volatilities follow
:data:`panel.units.CONVENTION_NOTE`, stated wherever they are shown.
"""

from __future__ import annotations

import base64
import math
from html import escape

import numpy as np
import pandas as pd

from panel import plots, units
from panel.report.content import MAX_PAIRS, ReportContent, parameter_rows, revision_summary, setting_lines

Z90 = plots.Z90
#: Ljung-Box p-values below this flag autocorrelation left in the innovations (common practice: 5%).
LB_LEVEL = 0.05
SECTIONS = (("data", "Data"), ("settings", "Model settings"), ("fit", "Fit"),
            ("cross-section", "Cross-section"), ("paths", "Premium paths"), ("vintages", "Vintages"),
            ("parameters", "Parameters"), ("diagnostics", "Diagnostics"), ("caution", "Caution"))

_CSS = """
:root { --ink: #1d2733; --muted: #5b6673; --rule: #d9dee4; --accent: #0d5c63; --paper: #fbfaf7;
        --good: #2f7d4f; --warn: #a8650a; --bad: #a23b2c; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.5 "Segoe UI", "Helvetica Neue", Arial, sans-serif; }
main { max-width: 1080px; margin: 0 auto; padding: 28px 32px 48px; }
header.top { border-bottom: 3px double var(--accent); padding-bottom: 14px; margin-bottom: 18px; }
header.top h1 { font: 600 26px/1.25 Georgia, "Times New Roman", serif; margin: 0 0 4px; }
header.top .sub { color: var(--muted); }
.notice { border: 1px solid var(--warn); background: #fff6e6; padding: 8px 12px; margin: 14px 0;
          font-size: 14px; }
nav ol { columns: 3; margin: 8px 0 0; padding-left: 20px; color: var(--muted); font-size: 14px; }
nav a { color: var(--accent); text-decoration: none; }
section { margin-top: 30px; }
h2 { font: 600 19px/1.3 Georgia, "Times New Roman", serif; color: var(--accent); margin: 0 0 10px;
     padding-bottom: 4px; border-bottom: 1px solid var(--rule); }
p.note { color: var(--muted); font-size: 13.5px; margin: 6px 0; }
dl.facts { display: grid; grid-template-columns: 210px 1fr; gap: 3px 16px; margin: 0; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; }
table { border-collapse: collapse; margin: 8px 0; font-size: 13.5px;
        font-variant-numeric: tabular-nums; }
th, td { padding: 4px 10px; border-bottom: 1px solid var(--rule); text-align: left; }
th { font-weight: 600; background: #eef1f3; }
td.n, th.n { text-align: right; white-space: nowrap; }
tbody tr:nth-child(even) { background: #f4f5f2; }
.status { display: inline-block; padding: 2px 10px; border-radius: 3px; color: #fff; font-weight: 600; }
.status.ok { background: var(--good); } .status.edge { background: var(--warn); }
.status.stop { background: var(--bad); }
figure { margin: 12px 0; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); background: #fff; }
figcaption { color: var(--muted); font-size: 13px; }
.flag { color: var(--bad); font-weight: 600; }
footer { margin-top: 36px; color: var(--muted); font-size: 12.5px; border-top: 1px solid var(--rule);
         padding-top: 10px; }
@media print { body { background: #fff; } section, figure { break-inside: avoid; } nav { display: none; } }
"""


def _e(value) -> str:
    return escape("" if value is None else str(value))


def _missing(value) -> bool:
    return value is None or (isinstance(value, float) and not math.isfinite(value)) or value is pd.NaT


def _num(value, digits: int = 2) -> str:
    if _missing(value):
        return "–"
    return f"{float(value):,.{digits}f}"


def _pct(value, digits: int = 2) -> str:
    """A decimal (0.0123) as percent (1.23)."""
    return "–" if _missing(value) else _num(100.0 * float(value), digits)


def _day(value) -> str:
    return "–" if _missing(value) else str(pd.Timestamp(value).date())


def _table(headers, rows, numeric_from: int = 1, caption: str = "", numeric_to: int | None = None) -> str:
    """Columns ``numeric_from`` up to (not including) ``numeric_to`` are right-aligned numbers."""
    end = len(headers) if numeric_to is None else numeric_to
    kind = ["n" if numeric_from <= i < end else "" for i in range(len(headers))]
    head = "".join(f'<th class="{kind[i]}">{_e(h)}</th>' for i, h in enumerate(headers))
    body = []
    for row in rows:
        cells = []
        for i, cell in enumerate(row):
            raw = cell if isinstance(cell, _Raw) else _e(cell)
            cells.append(f'<td class="{kind[i]}">{raw}</td>')
        body.append("<tr>" + "".join(cells) + "</tr>")
    note = f'<p class="note">{_e(caption)}</p>' if caption else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>{note}"


class _Raw(str):
    """Markup built here from escaped parts (passed through :func:`_table` unescaped)."""


def _facts(pairs) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in pairs) + "</dl>"


def _figure(fig, caption: str, alt: str) -> str:
    data = base64.b64encode(plots.render(fig, "svg")).decode("ascii")
    return (f'<figure><img src="data:image/svg+xml;base64,{data}" alt="{_e(alt)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _section(key: str, body: str) -> str:
    title = dict(SECTIONS)[key]
    return f'<section id="{key}"><h2>{_e(title)}</h2>{body}</section>'


# ---------------------------------------------------------------------------------------------
# the sections

def _data(c: ReportContent) -> str:
    values = c.panel.values
    cells = values.size
    observed = int(values.notna().sum().sum())
    meta = c.panel.meta or {}
    facts = [("dataset", f"{c.dataset or '(unnamed)'} (hash {c.run['dataset_hash'][:12]})"),
             ("source file", meta.get("source_file") or "–"),
             ("frequency", f"{c.panel.frequency} ({c.ppy} periods a year), {c.panel.returns} returns"),
             ("dates used", f"{_day(c.panel.dates[0])} to {_day(c.panel.dates[-1])} "
                            f"({len(c.panel.dates)} dates, data cut at the as-of date)"),
             ("assets", f"{len(c.assets)}: {', '.join(c.assets[:20])}" + (" ..." if len(c.assets) > 20 else "")),
             ("observed cells", f"{observed:,} of {cells:,} ({100 * observed / max(cells, 1):.1f}%)")]
    warnings = "".join(f"<li>{_e(w)}</li>" for w in c.panel.warnings)
    return _facts(facts) + (f'<p class="note">Ingest warnings:</p><ul>{warnings}</ul>' if warnings else "")


def _settings(c: ReportContent) -> str:
    run = c.run
    lines = setting_lines(c.spec, c.settings, c.params, c.ppy)
    record = [("run", f"{run['id']} ({run['kind']})"), ("label", run.get("label") or "–"),
              ("as of (data cut-off)", _day(run["as_of"])),
              ("started", f"{str(run.get('started_utc'))[:19]} UTC, {_num(run.get('duration_s'), 1)} s"),
              ("software", f"riskprem {run.get('riskprem_version') or '?'}, git "
                           f"{str(run.get('git_commit') or '?')[:12]}, Python {run.get('python_version') or '?'}, "
                           f"numpy {run.get('numpy_version') or '?'}, scipy {run.get('scipy_version') or '?'}")]
    note = ("Settings are stored with the run; <code>riskprem reproduce " + _e(run["id"]) + "</code> re-estimates "
            "it from the stored dataset snapshot and compares every number.")
    return (_facts(record + lines) + f'<p class="note">{_e(units.CONVENTION_NOTE)}</p>'
            + f'<p class="note">{note}</p>')


def _fit(c: ReportContent) -> str:
    run = c.run
    headline, meaning = c.status_words
    tone = {"converged": "ok", "fixed": "ok", "mixed": "ok", "boundary": "edge"}.get(str(run.get("status")),
                                                                                   "stop")
    facts = [("log-likelihood", _num(run.get("loglik"))), ("AIC", _num(run.get("aic"))),
             ("BIC", _num(run.get("bic"))), ("free parameters", run.get("n_params")),
             ("iterations (E-steps)", run.get("iterations")), ("estimator's message", run.get("message") or "–")]
    return (f'<p><span class="status {tone}">{_e(headline)}</span></p><p>{_e(meaning)}</p>' + _facts(facts))


def _cross_section(c: ReportContent) -> str:
    from panel.model.result import STALE_NOTE, asset_labels, stale

    cs = c.cross_section
    ranked = cs.table()
    rows = []
    for i, (r, label) in enumerate(zip(ranked.itertuples(index=False), asset_labels(ranked, cs.date))):
        m, s = r.mean * c.ppy, r.std * c.ppy
        lo, hi = plots.band_edges(r.mean, r.std, c.ppy, getattr(r, "q05", None), getattr(r, "q95", None))
        rows.append((i + 1, label, _pct(m), f"[{_pct(lo)}, {_pct(hi)}]", _pct(s),
                     f"{100 * r.prob_positive:.0f}%"))
    basis = ("the posterior draws (a Bayesian run: bands are posterior 5% and 95% quantiles)"
             if cs.mixture is not None else "the normal posterior")
    table = _table(["rank", "asset", "premium", "90% band", "std", "P(premium > 0)"], rows, numeric_from=2,
                   caption=f"% a year (x{c.ppy}); at the as-of date the filtered (real-time) and smoothed "
                           f"(revised) estimates coincide. P(premium > 0) from {basis}."
                           + (f" {STALE_NOTE}" if stale(ranked, cs.date).any() else ""))
    fig = plots.cross_section_chart(ranked, c.ppy, cs.date, "smoothed", cs.date,
                                    title=plots.heading("Cross-section", c.dataset, c.run.get("label")))
    body = _figure(fig, f"Premia at {_day(cs.date)}, dot = mean, bar = 90% band.", "cross-section chart") + table
    if len(cs.assets) <= MAX_PAIRS:
        order = list(ranked["asset"])
        matrix = cs.prob_greater.loc[order, order]
        pair_rows = []
        for a in order:
            cells = [a]
            for b in order:
                p = matrix.loc[a, b]
                if a == b or not np.isfinite(p):
                    cells.append("")
                    continue
                shade = f"rgba(13, 92, 99, {0.08 + 0.5 * abs(p - 0.5) * 2:.2f})" if p >= 0.5 else \
                    f"rgba(168, 101, 10, {0.08 + 0.5 * abs(p - 0.5) * 2:.2f})"
                cells.append(_Raw(f'<span style="background:{shade};padding:1px 4px">{100 * p:.0f}%</span>'))
            pair_rows.append(cells)
        body += ("<h3>Pairwise: P(premium of row > premium of column)</h3>"
                 + _table(["", *order], pair_rows, caption="From the joint posterior at the as-of date (it "
                          "accounts for the correlation of the estimates)."))
    else:
        body += (f'<p class="note">{len(cs.assets)} assets: the pairwise table is left out (shown up to '
                 f"{MAX_PAIRS}); <code>riskprem cross-section {_e(c.run['id'])} --pairs --csv</code> gives it.</p>")
    return body


def _paths(c: ReportContent) -> str:
    shown = c.charted
    fig = plots.premium_paths(c.tables["estimates"], shown, c.ppy, c.run["as_of"],
                              title=plots.heading("Premium paths", c.dataset, c.run.get("label")),
                              last_return=c.panel.last_returns())
    note = "" if len(shown) == len(c.assets) else \
        (f'<p class="note">The first {len(shown)} of {len(c.assets)} assets; <code>riskprem plot '
         f"{_e(c.run['id'])} --asset NAME</code> draws others.</p>")
    return note + _figure(fig, "Filtered (real-time: data up to each date) and smoothed (revised: all data "
                          "to the as-of date) premia, % a year, with 90% bands.", "premium paths chart")


def _vintages(c: ReportContent) -> str:
    if len(c.vintages) < 2:
        return ("<p>This is the only stored vintage of this model on this dataset up to its cut-off, so there "
                "are no revisions to show. A backfill (<code>riskprem backfill</code>) stores one vintage "
                "per past cut-off.</p>")
    rows = [(_day(v.as_of), v.run_id, v.kind, v.status, v.label or "–") for v in c.vintages.itertuples(index=False)]
    body = (f"<p>{len(c.vintages)} vintages of the same model and dataset up to this run's cut-off.</p>"
            + _table(["as of", "run", "kind", "status", "label"], rows, numeric_from=9))
    date = c.revision_date
    fig = plots.vintage_lines(c.revisions, date, c.ppy,
                              title=plots.heading("Revisions across vintages", c.dataset, c.run.get("label")))
    body += _figure(fig, f"Each asset's smoothed premium at {_day(date)} (the first vintage's cut-off) as "
                         "later vintages added data, % a year.", "revisions chart")
    summary = revision_summary(c)
    rows = [(r.asset, _pct(r.first_release * c.ppy), _pct(r.latest * c.ppy), _pct(r.revision * c.ppy),
             r.n_vintages) for r in summary.itertuples(index=False)]
    return body + _table(["asset", "first release (filtered)", "this run (smoothed)", "revision (points)",
                          "vintages"], rows,
                         caption=f"Premium at {_day(date)}, % a year: the real-time estimate in the first "
                                 "vintage against this run's revised estimate.")


def _parameters(c: ReportContent) -> str:
    frame = parameter_rows(c)
    value_columns = [col for col in frame.columns if col not in ("asset", "Ljung-Box p")]
    rows = [(r["asset"], *(_pct(r[col]) for col in value_columns)) for _, r in frame.iterrows()]
    return (_table(["asset", *value_columns], rows,
                   caption=f"% a year. Premium volatility = sqrt(q x {c.ppy}^3) (own: the asset's own part q; "
                           f"total: the diagonal of Sigma); loadings x {c.ppy}^1.5 in the same units; return-shock "
                           f"volatility = sqrt(h x {c.ppy}).")
            + f'<p class="note">{_e(units.CONVENTION_NOTE)}</p>')


def _diagnostics(c: ReportContent) -> str:
    diag = c.tables["diagnostics"]
    diag = diag[diag["statistic"] == "ljung_box"]
    if diag.empty:
        return "<p>No diagnostics were stored with this run.</p>"
    rows, flagged = [], 0
    for r in diag.itertuples(index=False):
        low = np.isfinite(r.pvalue) and r.pvalue < LB_LEVEL
        flagged += bool(low)
        verdict = _Raw('<span class="flag">autocorrelation left</span>') if low else "none detected"
        rows.append((r.asset, r.lags, _num(r.value), _num(r.pvalue, 3), verdict))
    return (_table(["asset", "lags", "Ljung-Box Q", "p-value", f"at {100 * LB_LEVEL:.0f}%"], rows, numeric_from=1,
                   numeric_to=4)
            + f'<p class="note">Ljung-Box test (Ljung &amp; Box 1978) on each asset\'s standardized one-step '
              f"innovations: a small p-value says the model leaves predictable structure in the returns. "
              f"{flagged} of {len(rows)} assets below {100 * LB_LEVEL:.0f}% (common-practice level; with many "
              "assets some fall below it by chance).</p>")


def _caution(caution: str) -> str:
    return (f"<p><strong>{_e(caution)}</strong></p><p>The premia are model-based estimates of expected excess "
            "returns with wide uncertainty: the bands describe the model's own uncertainty given its parameters "
            "and do not cover the risk that the model itself is wrong. Past vintages were estimated with the "
            "data available at their cut-off; later data revise them.</p>")


def render_page(content: ReportContent, caution: str, generated: str = "") -> str:
    """The report page (an HTML string).  ``caution``: the caution sentence shown at the top and in
    its own section; ``generated``: an optional line for the footer (e.g. when and by which version)."""
    run = content.run
    named = content.dataset or run["dataset_hash"][:12]
    title = f"Risk-premium report: {named}, as of {_day(run['as_of'])}"
    headline, _ = content.status_words
    sub = (f"Run {run['id']}" + (f" · {run['label']}" if run.get("label") else "") + f" · {len(content.assets)} "
           f"assets · {content.ppy} periods a year · fit: {headline.lower()}")
    nav = "".join(f'<li><a href="#{key}">{_e(name)}</a></li>' for key, name in SECTIONS)
    sections = [_section("data", _data(content)), _section("settings", _settings(content)),
                _section("fit", _fit(content)), _section("cross-section", _cross_section(content)),
                _section("paths", _paths(content)), _section("vintages", _vintages(content)),
                _section("parameters", _parameters(content)), _section("diagnostics", _diagnostics(content)),
                _section("caution", _caution(caution))]
    policy = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f'<meta http-equiv="Content-Security-Policy" content="{policy}">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>"
            f'<header class="top"><h1>{_e(title)}</h1><div class="sub">{_e(sub)}</div></header>'
            f'<p class="notice">{_e(caution)}</p>'
            f'<nav><strong>Contents</strong><ol>{nav}</ol></nav>' + "".join(sections)
            + f"<footer>{_e(generated)} Premia are annualised percent (per-period premium x {content.ppy}). "
              f"{_e(units.CONVENTION_NOTE)}</footer></main></body></html>\n")
