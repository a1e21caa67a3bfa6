"""Commands that estimate: ``fit`` a model and store the run, ``reproduce`` a stored run."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from panel import units
from panel.cli import output
from panel.cli.common import (JsonFlag, RunArg, State, existing_folder, fail, info, parse_date,
                              progress, state, store_exists, store_for, user_errors)
from panel.cli.model_options import ModelOptions, with_model_options
from panel.cli.data import (AssetColOpt, Compounding, DateColOpt, DateFormatOpt, DelimiterOpt, ExtremeOpt,
                            FrequencyOpt, LayoutOpt, MinObsOpt, RefuseShortOpt, ReturnsOpt, RiskFreeOpt, TotalOpt,
                            UnitsOpt, ValueColOpt, file_options, read_file)


def _vintage(panel, as_of: pd.Timestamp | None, what: str):
    """The data up to ``as_of`` (all of it when None)."""
    if as_of is None:
        return panel
    if as_of < panel.dates[0]:
        fail(f"--as-of {as_of.date()} is before the first date {panel.dates[0].date()} of {what}; "
             "give a later date")
    return panel.cut(as_of)


_FILE_PARAMS = ("layout", "units", "returns", "total_returns", "risk_free", "date_col", "date_format", "delimiter",
                "frequency", "asset_col", "value_col", "min_obs", "refuse_short", "allow_extreme")


class _FitProgress:
    """The fit's progress on the bar: E-steps (or sweeps) with the objective, then the standard
    errors' E-steps under their own name (``panel.model.fit.fit``'s ``progress``)."""

    def __init__(self, bar, label: str):
        self.bar, self.label = bar, label

    def __call__(self, n, objective) -> None:
        self.bar.update(n, description=self.label if objective is None else
                        f"{self.label}, objective {objective:,.2f}")

    def stage(self, name: str, expected: int) -> None:
        self.label = f"{name}, E-steps"
        self.bar.update(0, description=self.label, total=max(expected, 1))


def _file_options_given(ctx: typer.Context) -> bool:
    """Whether any file option was given on the command line (they mean nothing with --data)."""
    return any(getattr(ctx.get_parameter_source(p), "name", None) in ("COMMANDLINE", "ENVIRONMENT")
               for p in _FILE_PARAMS)


def year_before(dates):
    """The last of ``dates`` (a DatetimeIndex) on or before a calendar year before the last one,
    or None: counting back periods a year would miss on business-day data (about 261 dates a
    year against 252 periods)."""
    import pandas as pd

    back = int(dates.searchsorted(dates[-1] - pd.DateOffset(years=1), side="right")) - 1
    return dates[back] if back >= 0 else None


def latest_rows(result, ppy: int) -> tuple[list, dict, bool]:
    """Rows of the latest-premia table, the same numbers for JSON (per period), and whether an
    asset's last return precedes the last date (its label says so)."""
    from panel.model.result import asset_labels, stale

    est = result.estimates
    last = result.dates[-1]
    year_back = year_before(result.dates)
    cs = result.cross_section(last, "filtered")
    prob = dict(zip(cs.assets, cs.prob_positive))
    last_return = dict(zip(cs.assets, cs.last_return))
    ranked = cs.table()
    label = dict(zip(ranked["asset"], asset_labels(ranked, last)))
    now = est[est["date"] == last].set_index("asset")
    then = est[est["date"] == year_back].set_index("asset") if year_back is not None else None
    rows, records = [], []
    for asset in result.assets:
        r = now.loc[asset]
        earlier = then.loc[asset] if then is not None and asset in then.index else None
        rows.append((label.get(asset, asset),
                     output.num(output.premium_pct(r.filtered_mean, ppy), 1),
                     output.row_band(r, "filtered", ppy), output.pct(prob.get(asset)),
                     "-" if earlier is None else output.num(output.premium_pct(earlier.filtered_mean, ppy), 1),
                     "-" if earlier is None else output.num(output.premium_pct(earlier.smoothed_mean, ppy), 1)))
        quantiles = {c: r[c] for c in ("filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95")
                     if c in r.index}
        records.append({"asset": asset, "date": last, "filtered_mean": r.filtered_mean,
                        "filtered_std": r.filtered_std, "smoothed_mean": r.smoothed_mean,
                        "smoothed_std": r.smoothed_std, **quantiles, "prob_positive": prob.get(asset),
                        "last_return": last_return.get(asset),
                        "year_earlier_date": year_back,
                        "year_earlier_filtered_mean": None if earlier is None else earlier.filtered_mean,
                        "year_earlier_smoothed_mean": None if earlier is None else earlier.smoothed_mean})
    return rows, {"date": last, "year_earlier": year_back, "rows": records}, bool(stale(ranked, last).any())


def print_latest(result, ppy: int, rows: list, year_back, stale: bool = False) -> None:
    """The latest-premia table; ``stale``: some asset's last return precedes the last date."""
    from panel.model.result import STALE_NOTE

    last = output.day(result.dates[-1])
    then = output.day(year_back) if year_back is not None else "a year earlier"
    headers = ["asset", "premium", "90% band", "P(premium > 0)", f"filtered {then}", f"smoothed {then}"]
    output.show(output.table(
        f"Premia at {last}, annualised % (x{ppy}); at the as-of date filtered = smoothed. "
        f"A year earlier: filtered (real-time) vs smoothed (revised)",
        headers, rows,
        caption=output.BAND_NOTE + " The last two columns show how a year of data revised the "
                "estimate made then." + (" " + STALE_NOTE if stale else "")))


def fit(
    ctx: typer.Context,
    data: Annotated[str | None, typer.Option("--data", help="A stored dataset: name or hash (prefix).",
                                             show_default=False)] = None,
    file: Annotated[Path | None, typer.Option("--file", help="A return file: ingested as a dataset first "
                                              "(see `riskprem ingest`).", show_default=False)] = None,
    name: Annotated[str | None, typer.Option("--name", help="With --file: the dataset name (default: the "
                                             "file name without suffix).", show_default=False)] = None,
    layout: LayoutOpt = None,
    units: UnitsOpt = None,
    returns: ReturnsOpt = Compounding.simple,
    total_returns: TotalOpt = False,
    risk_free: RiskFreeOpt = None,
    date_col: DateColOpt = None,
    date_format: DateFormatOpt = None,
    delimiter: DelimiterOpt = None,
    frequency: FrequencyOpt = None,
    asset_col: AssetColOpt = "asset",
    value_col: ValueColOpt = "value",
    min_obs: MinObsOpt = 24,
    refuse_short: RefuseShortOpt = False,
    allow_extreme: ExtremeOpt = False,
    as_of: Annotated[str | None, typer.Option("--as-of", help="Data cut-off YYYY-MM-DD (a vintage); "
                                              "default: all data.", show_default=False)] = None,
    model: ModelOptions = ModelOptions(),
    label: Annotated[str | None, typer.Option("--label", help="A note stored with the run.",
                                              show_default=False)] = None,
    save_draws: Annotated[Path | None, typer.Option(
        "--save-draws", metavar="FILE.nc", help="With --bayes: also write every parameter draw of "
        "every chain to this NetCDF file (ArviZ InferenceData; the store keeps summaries only).",
        show_default=False)] = None,
    as_json: JsonFlag = False,
) -> None:
    """Estimate the premia of a dataset and store the run (a vintage at its as-of date).

    Prints the run id, convergence status, log-likelihood, AIC/BIC and the latest premia
    (annualised %, with 90% bands).  Volatility options are annualised percent.  The store is
    written only after a successful fit, in one transaction.  With --bayes the posterior is
    sampled: the status says whether the chains mixed and the bands are posterior quantiles.
    """
    import pandas as pd

    from panel.model.fit import fit as estimate
    from panel.store import json_ready
    from panel.vintages.reproduce import record_fit

    st: State = state(ctx)
    if (data is None) == (file is None):
        raise typer.BadParameter("give exactly one of --data NAME or --file PATH", param_hint="--data/--file")
    if file is None and _file_options_given(ctx):
        raise typer.BadParameter("the file options (--units, --layout, --risk-free, ...) go with --file; a stored "
                                 "dataset was read with its own", param_hint="--file")
    if name is not None and file is None:
        raise typer.BadParameter("--name goes with --file (it names the dataset the file becomes)",
                                 param_hint="--name")
    cutoff = parse_date(as_of, "--as-of")
    spec = model.spec()
    if save_draws is not None:
        if not spec.bayes:
            raise typer.BadParameter("--save-draws goes with --bayes (an ML fit has no draws)",
                                     param_hint="--save-draws")
        if save_draws.suffix.lower() != ".nc":
            raise typer.BadParameter(f"{save_draws.name} does not end in .nc; the draws are written as "
                                     "NetCDF (e.g. draws.nc)", param_hint="--save-draws")
        existing_folder(save_draws, "--save-draws")
    if file is not None:
        panel = read_file(file, file_options(layout, units, returns, total_returns, risk_free, date_col, date_format,
                                             delimiter, frequency, asset_col, value_col, min_obs, refuse_short,
                                             allow_extreme))
        dataset = (name or file.stem).strip()
        digest = panel.hash
        source = {"dataset": dataset, "file": file.name, "ingest": panel.meta.get("options")}
    else:
        from panel.store import load_panel, resolve_dataset

        with store_for(st) as store, user_errors():
            digest = resolve_dataset(store, data)
            panel = load_panel(store, digest)
        dataset = data
        source = {"dataset": data, "ingest": panel.meta.get("options")}
    vintage = _vintage(panel, cutoff, f"dataset {dataset}")
    with user_errors():
        spec.resolve(len(vintage.assets), vintage.periods_per_year, len(vintage.dates), vintage.assets)
        json_ready(spec.to_dict(), "model settings")   # storable settings (no NaN), checked before the fit
    if store_exists(st):
        with store_for(st, write=True):
            pass  # the store is writable now: a fit that cannot be stored is not started
    with user_errors():
        info(st, f"fitting {len(vintage.assets)} assets x {len(vintage.dates)} dates "
                 f"(as of {vintage.dates[-1].date()})")
        started = pd.Timestamp.now(tz="UTC").tz_localize(None).to_pydatetime()
        label_text = f"estimating ({len(vintage.assets)} assets x {len(vintage.dates)} dates)"
        total = spec.max_iter
        if spec.bayes:
            label_text = f"sampling ({len(vintage.assets)} assets x {len(vintage.dates)} dates), sweeps"
            total = spec.chains * (spec.draws + (spec.draws if spec.warmup is None else spec.warmup))
        with progress(st, label_text, total=total) as bar:
            result = estimate(vintage, spec, progress=_FitProgress(bar, label_text))
    from panel.store import write_dataset, write_run

    with store_for(st, write=True) as store, user_errors():
        if file is not None:
            write_dataset(store, panel, dataset)
        run, tables = record_fit(result, digest, kind="fit", label=label, source=source, started_utc=started)
        run_id = write_run(store, run, tables)
    if save_draws is not None:
        result.posterior.to_inference_data().to_netcdf(str(save_draws))
    ppy = result.periods_per_year
    rows, latest, marked = latest_rows(result, ppy)
    summary = {"run_id": run_id, "dataset": dataset, "dataset_hash": digest, "as_of": result.dates[-1],
               "status": result.status, "converged": result.converged, "message": result.message,
               "loglik": result.loglik, "aic": result.aic, "bic": result.bic, "n_params": result.n_params,
               "iterations": result.n_iter, "seconds": result.elapsed, "n_assets": len(result.assets),
               "n_dates": len(result.dates), "periods_per_year": ppy, "units": output.MACHINE_UNITS,
               "settings": run["settings"], "latest": latest, "caution": output.CAUTION}
    if result.posterior is not None:
        from panel.bayes.diagnostics import mixing_numbers

        max_rhat, min_ess = mixing_numbers(result.parameters)
        summary["mixing"] = {"status": result.status, "max_split_rhat": max_rhat, "min_ess": min_ess,
                             "chains": spec.chains, "draws": spec.draws,
                             "sampler_seed": run["settings"].get("sampler_seed"),
                             "draws_file": None if save_draws is None else str(save_draws)}
    if as_json:
        output.emit_json(summary)
        return
    output.line(f"run {run_id} stored: dataset {dataset} ({output.short_hash(digest)}), as of "
                f"{output.day(result.dates[-1])}, {len(result.assets)} assets x {len(result.dates)} dates",
                style="bold")
    if result.posterior is not None:
        print_mixing(result.status, result.parameters, spec.chains)
        output.line(f"log-likelihood at the posterior-mean parameters {result.loglik:,.2f}   "
                    f"parameters {result.n_params}   sweeps {result.n_iter}   {result.elapsed:.1f} s"
                    + (f"   draws written to {save_draws}" if save_draws is not None else ""))
    else:
        status_style = "green" if result.converged and result.status == "converged" else "yellow"
        output.line(f"status: {result.status} - {result.message}", style=status_style)
        output.line(f"log-likelihood {result.loglik:,.2f}   AIC {result.aic:,.2f}   BIC {result.bic:,.2f}   "
                    f"parameters {result.n_params}   iterations {result.n_iter}   {result.elapsed:.1f} s")
    print_latest(result, ppy, rows, latest["year_earlier"], stale=marked)
    output.caution()


def print_mixing(status: str, parameters, chains: int) -> None:
    """The mixing status of a Bayesian run in plain words (max R-hat, min ESS)."""
    from panel.bayes.diagnostics import mixing_numbers

    text, style = output.mixing(status, *mixing_numbers(parameters), chains)
    output.line(f"status: {status} - {text}", style=style)


#: Posterior rows ``show`` prints for a Bayesian run, with their display conversion.
_POSTERIOR_ROWS = {"loading": ("premium loading", "premium_loading"),
                   "idio_premium_var": ("own premium vol", "premium_var"),
                   "premium_cov": ("premium vol", "premium_var"),
                   "return_cov": ("return-shock vol", "return_var"),
                   "return_idio_var": ("own return-shock vol", "return_var")}


def print_posterior(parameters, status: str, chains: int, ppy: int) -> None:
    """A Bayesian run's parameter posterior (% a year) and its mixing status."""
    from panel.bayes.diagnostics import annualise

    print_mixing(status, parameters, chains)
    post = parameters[parameters["name"].isin(list(_POSTERIOR_ROWS)) & parameters["rhat"].notna()]
    post = post[(post["name"] != "return_cov") | (post["row"] == post["col"])]
    rows = []
    for r in post.itertuples(index=False):
        label, kind = _POSTERIOR_ROWS[r.name]
        lo, mid, hi = (100 * float(annualise(getattr(r, c), kind, ppy))
                         for c in ("q05", "q50", "q95"))
        rows.append((label + (f" {r.col}" if r.name == "loading" else ""), r.row, output.num(mid, 2),
                     f"[{output.num(lo, 2)}, {output.num(hi, 2)}]", output.num(r.rhat, 3),
                     output.num(min(r.ess_bulk, r.ess_tail), 0)))
    output.show(output.table(
        f"Parameter posterior, % a year (median and 90% interval; premium vol = sqrt(q x {ppy}^3))",
        ["parameter", "asset", "median", "90% interval", "split R-hat", "ESS"], rows, right_from=2,
        caption=units.CONVENTION_NOTE + " The table above shows the posterior-mean parameters."))


def _env_rows(reproduction, verbose: bool):
    rows = []
    for e in reproduction.environment:
        if e.same and not verbose:
            continue
        rows.append((e.field, e.recorded or "-", e.current or "-", "same" if e.same else "differs"))
    return rows


def reproduce(
    ctx: typer.Context,
    run_id: RunArg,
    rtol: Annotated[float, typer.Option("--rtol", min=0.0, help="Relative tolerance per number.")] = 1e-10,
    atol: Annotated[float, typer.Option("--atol", min=0.0, help="Absolute tolerance per number "
                                        "(per-period units).")] = 0.0,
    save: Annotated[bool, typer.Option("--save", help="Store the rebuilt run (kind reproduce, parent = "
                                       "RUN); otherwise nothing is written.")] = False,
    as_json: JsonFlag = False,
) -> None:
    """Rebuild a stored run from its dataset snapshot and recorded settings, refit, and compare
    every stored number table by table.

    Exit code 0 only when every number is within tolerance (|a - b| <= atol + rtol max(|a|, |b|));
    library versions and platform, recorded and now, are shown beside the numbers.
    """
    from panel.vintages.reproduce import reproduce as rebuild

    st = state(ctx)
    with store_for(st, write=save) as store, user_errors():
        with progress(st, f"re-estimating run {run_id}"):
            outcome = rebuild(store, run_id, rtol=rtol, atol=atol, save=save)
    tables = [{"table": t.table, "rows_recorded": t.rows_recorded, "rows_rebuilt": t.rows_rebuilt,
               "values": t.values, "max_abs_diff": t.max_abs, "max_rel_diff": t.max_rel, "where": t.where,
               "ok": t.ok, "note": t.note} for t in outcome.tables]
    environment = [{"field": e.field, "recorded": e.recorded, "current": e.current, "same": e.same}
                   for e in outcome.environment]
    worst = max(outcome.tables, key=lambda t: t.max_rel)
    if as_json:
        output.emit_json({"run_id": run_id, "reproduced": outcome.ok, "rtol": rtol, "atol": atol,
                          "tables": tables, "environment": environment, "saved_run": outcome.saved_run,
                          "seconds": outcome.seconds, "caution": output.CAUTION})
    else:
        output.line(f"run {run_id} re-estimated from its dataset snapshot and recorded settings "
                    f"in {outcome.seconds:.1f} s", style="bold")
        rows = [(t.table, t.rows_recorded if t.rows_recorded == t.rows_rebuilt
                 else f"{t.rows_recorded} vs {t.rows_rebuilt}", f"{t.values:,}", output.sci(t.max_abs),
                 output.sci(t.max_rel), "yes" if t.ok else "NO", t.note or t.where or "-")
                for t in outcome.tables]
        output.show(output.table(f"Recorded vs rebuilt numbers (tolerance rtol {rtol:g}, atol {atol:g}; "
                                 "timings not compared)",
                                 ["table", "rows", "values", "max abs diff", "max rel diff", "within",
                                  "largest at"], rows))
        env = _env_rows(outcome, st.verbose)
        if env:
            output.show(output.table("Environment, recorded vs now" + ("" if st.verbose else " (differences)"),
                                     ["field", "recorded", "now", ""], env, right_from=9))
        else:
            output.line("environment: same library versions and platform as recorded")
        if outcome.saved_run is not None:
            output.line(f"saved as run {outcome.saved_run} (kind reproduce, parent run {run_id})")
        if outcome.ok:
            output.line(f"reproduced: every number within tolerance (largest relative difference "
                        f"{output.sci(worst.max_rel)})", style="green")
        output.caution()
    if not outcome.ok:
        bad = [t.table for t in outcome.tables if not t.ok]
        fail(f"run {run_id} not reproduced within rtol {rtol:g}, atol {atol:g}: {', '.join(bad)} differ "
             f"(largest relative difference {output.sci(worst.max_rel)} in {worst.table}); "
             "check the environment differences, or loosen --rtol")


def register(app: typer.Typer) -> None:
    app.command("fit")(with_model_options(fit))
    app.command("reproduce")(reproduce)
