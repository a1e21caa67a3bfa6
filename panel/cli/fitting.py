"""Commands that estimate: ``fit`` a model and store the run, ``reproduce`` a stored run."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import pandas as pd
import typer

from panel.cli import output
from panel.cli.common import (JsonFlag, RunArg, State, fail, info, parse_assignments, parse_date,
                              parse_number, parse_pair, progress, state, store_exists, store_for,
                              user_errors)
from panel.cli.data import DateColOpt, LayoutOpt, MinObsOpt, UnitsOpt, ingest_options, read_file


class Shocks(str, Enum):
    diagonal = "diagonal"
    factor = "factor"
    full = "full"


def model_spec(premium_factors, return_shocks, return_factors, vol_scale, fix, max_premium_vol,
               premium_prior, initial_premium, max_iter, time_budget):
    """A :class:`ModelSpec` from CLI values; volatilities given in annualised percent become the
    spec's annualised decimals."""
    from panel.model.spec import InitialPremium, ModelSpec, Prior, VolScale

    fixed = {}
    for name, value in parse_assignments(fix, "--fix").items():
        fixed[name] = parse_number(value, "--fix", name) / 100.0
    scale = None
    text = (vol_scale or "none").strip().lower()
    if text != "none":
        kind, sep, half = text.partition(":")
        if kind != "ewma" or not sep:
            raise typer.BadParameter(f"{vol_scale!r} is not 'none' or 'ewma:HALFLIFE'",
                                     param_hint="--vol-scale")
        scale = VolScale("ewma", half_life=parse_number(half, "--vol-scale", "half-life"))
    prior = None
    if premium_prior is not None:
        vol, weight = parse_pair(premium_prior, "--premium-prior", "vol", "weight")
        prior = Prior(vol=vol / 100.0, weight=weight)
    start = None
    if initial_premium is not None:
        mean, vol = parse_pair(initial_premium, "--initial-premium", "mean", "vol")
        start = InitialPremium(mean=mean / 100.0, vol=vol / 100.0)
    extra = {} if max_iter is None else {"max_iter": max_iter}
    return ModelSpec(premium_factors=premium_factors,
                     return_shocks=None if return_shocks is None else return_shocks.value,
                     return_factors=return_factors, vol_scale=scale, fixed=fixed,
                     max_premium_vol=None if max_premium_vol is None else max_premium_vol / 100.0,
                     premium_prior=prior, initial_premium=start, time_budget=time_budget, **extra)


def _vintage(panel, as_of: pd.Timestamp | None, what: str):
    """The data up to ``as_of`` (all of it when None)."""
    if as_of is None:
        return panel
    if as_of < panel.dates[0]:
        fail(f"--as-of {as_of.date()} is before the first date {panel.dates[0].date()} of {what}; "
             "give a later date")
    return panel.cut(as_of)


def latest_rows(result, ppy: int) -> tuple[list, dict]:
    """Rows of the latest-premia table and the same numbers for JSON (per period)."""
    est = result.estimates
    last = result.dates[-1]
    year_back = result.dates[-1 - ppy] if len(result.dates) > ppy else None
    cs = result.cross_section(last, "filtered")
    prob = dict(zip(cs.assets, cs.prob_positive))
    now = est[est["date"] == last].set_index("asset")
    then = est[est["date"] == year_back].set_index("asset") if year_back is not None else None
    rows, records = [], []
    for asset in result.assets:
        r = now.loc[asset]
        earlier = then.loc[asset] if then is not None and asset in then.index else None
        rows.append((asset, output.num(output.premium_pct(r.filtered_mean, ppy), 1),
                     output.band(r.filtered_mean, r.filtered_std, ppy), output.pct(prob.get(asset)),
                     "-" if earlier is None else output.num(output.premium_pct(earlier.filtered_mean, ppy), 1),
                     "-" if earlier is None else output.num(output.premium_pct(earlier.smoothed_mean, ppy), 1)))
        records.append({"asset": asset, "date": last, "filtered_mean": r.filtered_mean,
                        "filtered_std": r.filtered_std, "smoothed_mean": r.smoothed_mean,
                        "smoothed_std": r.smoothed_std, "prob_positive": prob.get(asset),
                        "year_earlier_date": year_back,
                        "year_earlier_filtered_mean": None if earlier is None else earlier.filtered_mean,
                        "year_earlier_smoothed_mean": None if earlier is None else earlier.smoothed_mean})
    return rows, {"date": last, "year_earlier": year_back, "rows": records}


def print_latest(result, ppy: int, rows: list, year_back) -> None:
    last = output.day(result.dates[-1])
    then = output.day(year_back) if year_back is not None else "a year earlier"
    headers = ["asset", "premium", "90% band", "P(premium > 0)", f"filtered {then}", f"smoothed {then}"]
    output.show(output.table(
        f"Premia at {last}, annualised % (x{ppy}); at the as-of date filtered = smoothed. "
        f"A year earlier: filtered (real-time) vs smoothed (revised)",
        headers, rows,
        caption="Bands are 90% (mean +- 1.645 std). The last two columns show how a year of data "
                "revised the estimate made then."))


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
    date_col: DateColOpt = None,
    min_obs: MinObsOpt = 24,
    as_of: Annotated[str | None, typer.Option("--as-of", help="Data cut-off YYYY-MM-DD (a vintage); "
                                              "default: all data.", show_default=False)] = None,
    premium_factors: Annotated[int | None, typer.Option("--premium-factors", help="Common premium factors "
                               "k (0 = independent local levels); default 1 with 3+ assets.",
                               show_default=False)] = None,
    return_shocks: Annotated[Shocks | None, typer.Option("--return-shocks", help="Structure of the "
                             "return-shock covariance; default factor.", show_default=False)] = None,
    return_factors: Annotated[int, typer.Option("--return-factors", help="Return factors r for "
                              "--return-shocks factor.")] = 1,
    vol_scale: Annotated[str, typer.Option("--vol-scale", metavar="none|ewma:HALFLIFE",
                         help="Ex-ante volatility scale of the return shocks: an EWMA of past squared "
                              "returns with this half-life in periods.")] = "none",
    fix: Annotated[list[str] | None, typer.Option("--fix", metavar="NAME=VALUE",
                   help="Hold a volatility fixed, annualised %: premium_vol=2, return_vol=15, or per "
                        "asset premium_vol:ASSET=1.5. Repeatable.", show_default=False)] = None,
    max_premium_vol: Annotated[float | None, typer.Option("--max-premium-vol", metavar="PCT",
                               help="Upper bound on each premium's innovation volatility, annualised %.",
                               show_default=False)] = None,
    premium_prior: Annotated[str | None, typer.Option("--premium-prior", metavar="VOL:WEIGHT",
                             help="Prior on the premium innovations: volatility (annualised %) worth "
                                  "WEIGHT pseudo-periods, e.g. 1:120.", show_default=False)] = None,
    initial_premium: Annotated[str | None, typer.Option("--initial-premium", metavar="MEAN:VOL",
                               help="Prior for each premium at its first observation, annualised %, "
                                    "e.g. 4:10 (default: diffuse).", show_default=False)] = None,
    max_iter: Annotated[int | None, typer.Option("--max-iter", help="Most EM iterations (default 5000).",
                                                 show_default=False)] = None,
    time_budget: Annotated[float | None, typer.Option("--time-budget", metavar="SECONDS",
                           help="Stop the estimation after this long (status time_budget).",
                           show_default=False)] = None,
    label: Annotated[str | None, typer.Option("--label", help="A note stored with the run.",
                                              show_default=False)] = None,
    as_json: JsonFlag = False,
) -> None:
    """Estimate the premia of a dataset and store the run (a vintage at its as-of date).

    Prints the run id, convergence status, log-likelihood, AIC/BIC and the latest premia
    (annualised %, with 90% bands).  Volatility options are annualised percent.  The store is
    written only after a successful fit, in one transaction.
    """
    from panel.model.fit import fit as estimate
    from panel.reproduce import record_fit
    from panel.store import json_ready

    st: State = state(ctx)
    if (data is None) == (file is None):
        raise typer.BadParameter("give exactly one of --data NAME or --file PATH", param_hint="--data/--file")
    if name is not None and file is None:
        raise typer.BadParameter("--name goes with --file (it names the dataset the file becomes)",
                                 param_hint="--name")
    cutoff = parse_date(as_of, "--as-of")
    spec = model_spec(premium_factors, return_shocks, return_factors, vol_scale, fix, max_premium_vol,
                      premium_prior, initial_premium, max_iter, time_budget)
    if file is not None:
        panel = read_file(file, ingest_options(layout, units, date_col, min_obs))
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
        with progress(st, label_text, total=spec.max_iter) as bar:
            result = estimate(vintage, spec, progress=lambda n, objective: bar.update(
                n, description=f"{label_text}, objective {objective:,.2f}"))
    from panel.store import write_dataset, write_run

    with store_for(st, write=True) as store, user_errors():
        if file is not None:
            write_dataset(store, panel, dataset)
        run, tables = record_fit(result, digest, kind="fit", label=label, source=source, started_utc=started)
        run_id = write_run(store, run, tables)
    ppy = result.periods_per_year
    rows, latest = latest_rows(result, ppy)
    summary = {"run_id": run_id, "dataset": dataset, "dataset_hash": digest, "as_of": result.dates[-1],
               "status": result.status, "converged": result.converged, "message": result.message,
               "loglik": result.loglik, "aic": result.aic, "bic": result.bic, "n_params": result.n_params,
               "iterations": result.n_iter, "seconds": result.elapsed, "n_assets": len(result.assets),
               "n_dates": len(result.dates), "periods_per_year": ppy, "units": output.MACHINE_UNITS,
               "settings": run["settings"], "latest": latest, "caution": output.CAUTION}
    if as_json:
        output.emit_json(summary)
        return
    output.line(f"run {run_id} stored: dataset {dataset} ({output.short_hash(digest)}), as of "
                f"{output.day(result.dates[-1])}, {len(result.assets)} assets x {len(result.dates)} dates",
                style="bold")
    status_style = "green" if result.converged and result.status == "converged" else "yellow"
    output.line(f"status: {result.status} - {result.message}", style=status_style)
    output.line(f"log-likelihood {result.loglik:,.2f}   AIC {result.aic:,.2f}   BIC {result.bic:,.2f}   "
                f"parameters {result.n_params}   iterations {result.n_iter}   {result.elapsed:.1f} s")
    print_latest(result, ppy, rows, latest["year_earlier"])
    output.caution()


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
    from panel.reproduce import reproduce as rebuild

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
    app.command("fit")(fit)
    app.command("reproduce")(reproduce)
