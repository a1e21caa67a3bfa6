"""Short views of a :class:`~panel.model.result.PanelFit` for people: annualised tables, a text
summary and an HTML one (Jupyter's ``_repr_html_``).  Returns strings and DataFrames; prints nothing.

Units (:mod:`panel.units`): premia and their standard deviations in percent a year (per-period
value x periods a year); premium volatility V in percent a year (the annualised premium moves V
points, 1 sd, over a year: ``q = (V/100)^2 / ppy^3``); return-shock volatility ``sqrt(h x ppy)``.
"""

from __future__ import annotations

import html

import numpy as np
import pandas as pd

from panel import units

#: How the annualised tables are expressed (their ``attrs["units"]``).
PREMIUM_UNITS = "percent a year: per-period premium (or its std) x periods_per_year"
#: Rows of the latest-premia part of a summary (the rest are counted, not shown).
SUMMARY_ROWS = 20
_Z90 = 1.6448536269514722


def annualised_estimates(fit) -> pd.DataFrame:
    """``date, asset`` and the filtered / smoothed premium and std in % a year (``*_pct_a_year``;
    a Bayesian run adds its posterior quantiles)."""
    ppy = fit.periods_per_year
    est = fit.estimates
    out = est[["date", "asset"]].copy()
    quantiles = ("filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95")   # Bayesian runs
    for col in ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std",
                *(c for c in quantiles if c in est)):
        out[f"{col}_pct_a_year"] = units.annual_premium(est[col].to_numpy(float), ppy) * 100.0
    out.attrs.update(units=PREMIUM_UNITS, periods_per_year=ppy)
    return out


def annualised_parameters(fit) -> pd.DataFrame:
    """One row per asset: premium-factor loadings and premium volatilities (own = the local level's,
    total = common + own) and return-shock volatility, all in % a year (conventions in ``attrs``)."""
    p, ppy = fit.params, fit.periods_per_year
    out = pd.DataFrame({"asset": list(fit.assets)})
    for j in range(p.Lambda.shape[1]):
        out[f"loading_f{j + 1}_pct_a_year"] = units.premium_loading(p.Lambda[:, j], ppy) * 100.0
    out["own_premium_vol_pct_a_year"] = units.premium_vol(p.q, ppy) * 100.0
    out["premium_vol_pct_a_year"] = units.premium_vol(np.diag(p.Sigma), ppy) * 100.0
    out["return_vol_pct_a_year"] = units.return_vol(np.diag(p.H), ppy) * 100.0
    out.attrs.update(units="percent a year", conventions=units.CONVENTION_NOTE, periods_per_year=ppy)
    return out


def _facts(fit) -> list[tuple[str, str]]:
    k, first, last = fit.params.Lambda.shape[1], fit.dates[0].date(), fit.dates[-1].date()
    return [
        ("data", f"{len(fit.assets)} assets x {len(fit.dates)} dates, {first} to {last} "
                 f"({fit.periods_per_year} a year)"),
        ("model", f"{k} common premium factor(s), {fit.structure} return shocks"),
        ("status", f"{fit.status} - {fit.message}"),
        ("fit", f"log-likelihood {fit.loglik:,.2f}, AIC {fit.aic:,.2f}, BIC {fit.bic:,.2f}, "
                f"{fit.n_params} parameters, {fit.n_iter} E-steps, {fit.elapsed:.1f} s"
         if fit.posterior is None else
         f"log-likelihood at the posterior-mean parameters {fit.loglik:,.2f}, {fit.n_params} "
         f"parameters, {fit.n_iter} Gibbs sweeps, {fit.elapsed:.1f} s"),
    ]


def _latest(fit) -> pd.DataFrame:
    """Per asset at the last date: filtered premium, 90% band (% a year), premium and return vol."""
    est = annualised_estimates(fit)
    now = est[est["date"] == fit.dates[-1]].set_index("asset")
    par = annualised_parameters(fit).set_index("asset")
    mean, std = now["filtered_mean_pct_a_year"], now["filtered_std_pct_a_year"]
    lo, hi = mean - _Z90 * std, mean + _Z90 * std
    if "filtered_q05_pct_a_year" in now:          # a Bayesian run: the posterior quantiles
        lo, hi = now["filtered_q05_pct_a_year"], now["filtered_q95_pct_a_year"]
    return pd.DataFrame({"premium": mean, "lo90": lo, "hi90": hi,
                         "premium vol": par["premium_vol_pct_a_year"],
                         "return vol": par["return_vol_pct_a_year"]}).loc[[a for a in fit.assets if a in now.index]]


def _caption(fit, shown: int, total: int) -> str:
    more = f"; {total - shown} more assets in .estimates" if total > shown else ""
    return (f"Premia at {fit.dates[-1].date()}: filtered, % a year, 90% band{more}. "
            f"{units.CONVENTION_NOTE}")


def summary_text(fit) -> str:
    """A few lines: data, model, status, fit statistics and the latest premia (at most
    :data:`SUMMARY_ROWS` assets)."""
    facts = _facts(fit)
    width = max(len(k) for k, _ in facts)
    lines = [f"{k.ljust(width)}  {v}" for k, v in facts]
    table = _latest(fit)
    shown = table.head(SUMMARY_ROWS)
    name_w = max([5] + [len(a) for a in shown.index])
    lines.append("")
    lines.append(f"{'asset'.ljust(name_w)}  {'premium':>8}  {'90% band':>16}  {'premium vol':>11}  {'return vol':>10}")
    for asset, r in shown.iterrows():
        band = f"[{r['lo90']:.1f}, {r['hi90']:.1f}]"
        lines.append(f"{str(asset).ljust(name_w)}  {r['premium']:>8.2f}  {band:>16}  {r['premium vol']:>11.2f}  "
                     f"{r['return vol']:>10.2f}")
    lines.append(_caption(fit, len(shown), len(table)))
    return "\n".join(lines)


def summary_html(fit) -> str:
    """The summary as a small HTML fragment (no scripts, no external resources)."""
    esc = html.escape
    facts = "".join(f"<tr><th style='text-align:left'>{esc(k)}</th><td style='text-align:left'>{esc(v)}</td></tr>"
                    for k, v in _facts(fit))
    table = _latest(fit)
    shown = table.head(SUMMARY_ROWS)
    head = "".join(f"<th>{esc(h)}</th>" for h in ("asset", "premium", "90% band", "premium vol", "return vol"))
    rows = "".join(
        f"<tr><td style='text-align:left'>{esc(str(a))}</td><td>{r['premium']:.2f}</td>"
        f"<td>[{r['lo90']:.1f}, {r['hi90']:.1f}]</td><td>{r['premium vol']:.2f}</td><td>{r['return vol']:.2f}</td></tr>"
        for a, r in shown.iterrows())
    return (f"<div><strong>PanelFit</strong><table>{facts}</table>"
            f"<table><thead><tr>{head}</tr></thead><tbody>{rows}</tbody></table>"
            f"<p><small>{esc(_caption(fit, len(shown), len(table)))}</small></p></div>")


def short_repr(fit) -> str:
    return (f"<PanelFit {len(fit.assets)} assets x {len(fit.dates)} dates to {fit.dates[-1].date()}, "
            f"status {fit.status}, loglik {fit.loglik:,.2f}; .summary() for more>")
