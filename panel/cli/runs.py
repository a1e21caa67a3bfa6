"""Commands that read stored runs: ``runs``, ``show``, ``estimates``, ``cross-section``, ``diff``
(:mod:`panel.cli.diff`), ``export``, ``plot``.  All open the store read-only."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from panel import units
from panel.cli import output
from panel.cli.common import (CsvFlag, JsonFlag, Kind, KindOrBoth, RunArg, fail, parse_date, run_ppy,
                              state, store_for, user_errors)
from panel.cli.diff import diff
from panel.files import check_target, write_atomically

ENV_FIELDS = ("riskprem_version", "git_commit", "python_version", "numpy_version", "scipy_version",
              "pandas_version", "duckdb_version", "platform")


def _names(store) -> dict[str, str]:
    from panel.store import list_datasets

    frame = list_datasets(store)
    return {h: (n or f"({m})") for h, n, m in zip(frame["hash"], frame["current_names"], frame["name"])}


def _first_name(names: str) -> str:
    """``a, b, c`` -> ``a (+2)``: a run table shows one of a dataset's names."""
    parts = [p for p in str(names).split(", ") if p]
    return "" if not parts else parts[0] + (f" (+{len(parts) - 1})" if len(parts) > 1 else "")


def _spec_lines(spec, settings: dict, params, ppy: int) -> list[tuple[str, str]]:
    from panel.report.content import setting_lines  # one wording for the terminal and the report

    return setting_lines(spec, settings, params, ppy)


def _flat(value, prefix: str, out: dict) -> None:
    """Nested settings -> ``prefix_key`` columns (lists joined by ``;``)."""
    if isinstance(value, dict):
        for key, item in value.items():
            _flat(item, f"{prefix}_{key}", out)
    elif isinstance(value, (list, tuple)):
        out[prefix] = ";".join(str(v) for v in value)
    else:
        out[prefix] = value


def settings_columns(settings: dict) -> dict:
    """The settings a reader compares runs by, one column each: ``spec_*`` (the recorded model
    spec, annualised decimals), ``window``, ``warm_start`` (the start parameters themselves are in
    ``riskprem show --json``)."""
    settings = settings or {}
    out = {}
    _flat({k: v for k, v in (settings.get("spec") or {}).items()}, "spec", out)
    out["window"] = settings.get("window")
    out["warm_start"] = settings.get("start") is not None
    return out


# ---------------------------------------------------------------------------------------------

def _text(value) -> str:
    """A text cell: ``-`` for a missing value (None, NaN)."""
    return "-" if value is None or value != value or value == "" else str(value)


def runs(ctx: typer.Context,
         data: Annotated[str | None, typer.Option("--data", help="Only runs of this dataset (name or hash).",
                                                  show_default=False)] = None,
         as_json: JsonFlag = False, as_csv: CsvFlag = False) -> None:
    """List the stored runs (vintages), oldest first."""
    import pandas as pd

    from panel.store import list_runs

    st = state(ctx)
    with store_for(st) as store, user_errors():
        frame = list_runs(store, data)
        names = _names(store)
    frame.insert(2, "dataset", [names.get(h, "") for h in frame["dataset_hash"]])
    shown = [_first_name(n) for n in frame["dataset"]]
    if as_json:
        output.emit_json({"store": st.shown, "runs": frame})
        return
    if as_csv:
        flat = pd.DataFrame([settings_columns(x) for x in frame["settings"]], index=frame.index)
        output.emit_csv(pd.concat([frame.drop(columns=["settings"]), flat], axis=1))
        return
    rows = [(r.id, r.kind, name, output.day(r.as_of), _text(r.label), r.status,
             "-" if pd.isna(r.iterations) else int(r.iterations), output.num(r.loglik), output.num(r.bic),
             output.num(r.duration_s, 1), str(r.started_utc)[:16])
            for r, name in zip(frame.itertuples(index=False), shown)]
    output.show(output.table(f"Runs in {st.shown}" + (f" (dataset {data})" if data else ""),
                             ["run", "kind", "dataset", "as of", "label", "status", "iter", "loglik", "BIC",
                              "seconds", "started UTC"], rows, right_from=6,
                             drop=["started UTC", "seconds", "kind", "iter", "BIC", "label"]))
    if not rows:
        output.line("no runs yet; estimate one with `riskprem fit --data NAME`")


def show(ctx: typer.Context, run_id: RunArg, as_json: JsonFlag = False) -> None:
    """One run: its record, model settings, per-asset parameters (annualised) and latest premia."""
    import pandas as pd

    from panel.vintages.reproduce import run_inputs, stored_params
    from panel.store import run_tables

    st = state(ctx)
    with store_for(st) as store, user_errors():
        inputs = run_inputs(store, run_id)
        tables = run_tables(store, run_id)
        params = stored_params(store, inputs, tables)
        names = _names(store)
    run, ppy, assets = inputs.run, run_ppy(inputs), list(inputs.panel.assets)
    settings = run["settings"] or {}
    diag = tables["diagnostics"]
    if as_json:
        output.emit_json({
            "run_id": run["id"], "kind": run["kind"], "label": run["label"],
            "dataset_hash": run["dataset_hash"], "dataset": names.get(run["dataset_hash"]),
            "as_of": run["as_of"], "status": run["status"], "converged": run["converged"],
            "message": run["message"], "loglik": run["loglik"], "aic": run["aic"], "bic": run["bic"],
            "n_params": run["n_params"], "iterations": run["iterations"], "duration_s": run["duration_s"],
            "started_utc": run["started_utc"], "finished_utc": run["finished_utc"],
            "parent_run": run["parent_run"], "settings": settings,
            "environment": {k: run.get(k) for k in ENV_FIELDS},
            "periods_per_year": ppy, "units": output.MACHINE_UNITS, "assets": assets,
            "loadings": params.Lambda, "idio_premium_var": params.q, "premium_cov": params.Sigma,
            "return_cov": params.H, "return_loadings": params.B, "return_idio_var": params.psi,
            "parameters": tables["parameters"], "diagnostics": diag, "caution": output.CAUTION})
        return
    output.line(f"run {run['id']} ({run['kind']}{', ' + run['label'] if run['label'] else ''})", style="bold")
    output.facts([
        ("dataset", f"{names.get(run['dataset_hash'], '')} ({output.short_hash(run['dataset_hash'])})"),
        ("as of", f"{output.day(run['as_of'])} ({len(inputs.panel.dates)} dates, {len(assets)} assets)"),
        ("status", f"{run['status']} - {run['message']}"),
        ("fit", f"log-likelihood {output.num(run['loglik'])}, AIC {output.num(run['aic'])}, "
                f"BIC {output.num(run['bic'])}, {run['n_params']} parameters, {run['iterations']} iterations"),
        ("ran", f"{str(run['started_utc'])[:19]} UTC, {output.num(run['duration_s'], 1)} s, riskprem "
                f"{run.get('riskprem_version')}" + (f", parent run {run['parent_run']}" if run["parent_run"] else "")),
    ])
    if st.verbose:
        output.facts([(k, run.get(k)) for k in ENV_FIELDS])
    output.facts(_spec_lines(inputs.spec, settings, params, ppy))
    pvalues = {r.asset: r.pvalue for r in diag.itertuples(index=False) if r.statistic == "ljung_box"}
    k = params.Lambda.shape[1]
    rows = []
    for i, asset in enumerate(assets):
        loadings = [output.num(units.premium_loading(params.Lambda[i, j], ppy) * 100, 2) for j in range(k)]
        rows.append((asset, *loadings, output.num(output.premium_vol_pct(params.q[i], ppy)),
                     output.num(output.premium_vol_pct(params.Sigma[i, i], ppy)),
                     output.num(output.vol_pct(params.H[i, i], ppy), 1), output.num(pvalues.get(asset), 3)))
    headers = ["asset", *[f"loading f{j + 1}" for j in range(k)], "own premium vol", "premium vol",
               "return-shock vol", "Ljung-Box p"]
    output.show(output.table(f"Parameters, % a year (premium vol = sqrt(q x {ppy}^3), loadings x {ppy}^1.5; "
                             f"return-shock vol = sqrt(h x {ppy}))", headers, rows,
                             caption=units.CONVENTION_NOTE))
    if inputs.spec.bayes:
        from panel.cli.fitting import print_posterior

        print_posterior(tables["parameters"], run["status"], inputs.spec.chains, ppy)
    est = tables["estimates"]
    last = est[pd.to_datetime(est["date"]) == pd.Timestamp(run["as_of"])].set_index("asset")
    rows = [(a, output.num(output.premium_pct(last.loc[a, "filtered_mean"], ppy), 1),
             output.row_band(last.loc[a], "filtered", ppy))
            for a in assets if a in last.index]
    output.show(output.table(f"Premia at {output.day(run['as_of'])}, annualised % (x{ppy}); filtered = "
                             "smoothed at the as-of date", ["asset", "premium", "90% band"], rows))
    output.caution()


def _run_ppy(run: dict, layout: dict) -> int:
    """Periods a year of a stored run: its spec's, else its dataset's."""
    spec = (run.get("settings") or {}).get("spec") or {}
    return int(spec.get("periods_per_year") or layout["periods_per_year"])


#: Dates the estimates table shows by default (machine output gives all unless --last is given).
TABLE_DATES = 12


#: Caption of an estimates table with a date on which an asset has no return.
NO_RETURN_NOTE = ("'(no return)': no return of the asset at that date (it has left, or the return is "
                  "late or missing); its premium there is the model's prediction.")


def estimates(
    ctx: typer.Context,
    run_id: RunArg,
    asset: Annotated[list[str] | None, typer.Option("--asset", help="Only this asset (repeatable).",
                                                    show_default=False)] = None,
    kind: Annotated[KindOrBoth, typer.Option("--kind", help="filtered (real-time), smoothed (revised) "
                                             "or both.")] = KindOrBoth.both,
    last: Annotated[int | None, typer.Option("--last", min=0, help=f"Only the last N dates (0 = all). "
                                             f"Default: {TABLE_DATES} in the table, all with --csv or "
                                             "--json.", show_default=False)] = None,
    as_json: JsonFlag = False, as_csv: CsvFlag = False,
) -> None:
    """A run's premium estimates per asset and date (annualised %, with 90% bands).

    The table shows the last 12 dates unless --last says otherwise; --csv and --json give every date
    unless --last is given, and say on stderr when rows were left out.
    """
    from panel.store import dataset_layout, get_run, is_bayes, run_estimates

    st = state(ctx)
    machine = as_json or as_csv
    keep = (0 if machine else TABLE_DATES) if last is None else last
    kinds = ["filtered", "smoothed"] if kind == KindOrBoth.both else [kind.value]
    columns = ["date", "asset"] + [f"{k}_{s}" for k in kinds for s in ("mean", "std")]
    with store_for(st) as store, user_errors():
        run = get_run(store, run_id)
        if is_bayes(run):                   # the posterior's 5% and 95% quantiles
            columns += [f"{k}_{q}" for k in kinds for q in ("q05", "q95")]
        layout = dataset_layout(store, run["dataset_hash"])
        unknown = [a for a in asset or () if a not in layout["assets"]]
        if unknown:
            fail(f"run {run_id} has no asset {unknown[0]!r}; its assets: {', '.join(layout['assets'])}")
        est, n_dates = run_estimates(store, run_id, assets=asset or None, last=keep, columns=columns,
                                     with_return=not machine)
    ppy = _run_ppy(run, layout)
    order = {a: i for i, a in enumerate(asset or layout["assets"])}
    est = est.assign(_order=est["asset"].map(order)).sort_values(["date", "_order"], kind="stable")
    seen = est["has_return"].astype(bool).to_numpy() if not machine else None
    est = est[columns].reset_index(drop=True)
    shown = est["date"].nunique()
    cut = f"the last {shown} of {n_dates} dates" if shown < n_dates else None
    if machine:
        if cut:
            output.note(f"note: {cut} (--last {keep}); --last 0 gives all")
        if as_json:
            output.emit_json({"run_id": run_id, "as_of": run["as_of"], "periods_per_year": ppy,
                              "units": output.MACHINE_UNITS, "dates_shown": shown, "dates_total": n_dates,
                              "rows": est, "caution": output.CAUTION})
        else:
            output.emit_csv(est)
        return
    headers = ["date", "asset"]
    for k in kinds:
        headers += [f"{k}, % a year", "90% band"]
    rows = []
    for r, has_return in zip(est.itertuples(index=False), seen):
        cells = [output.day(r.date), r.asset if has_return else f"{r.asset} (no return)"]
        for k in kinds:
            cells += [output.num(output.premium_pct(getattr(r, f"{k}_mean"), ppy), 2),
                      output.row_band(r, k, ppy)]
        rows.append(cells)
    basis = " and ".join(f"{k} ({'real-time' if k == 'filtered' else 'revised with all data'})" for k in kinds)
    output.show(output.table(f"Run {run_id} premia, annualised % (x{ppy}), {basis}; as of "
                             f"{output.day(run['as_of'])}", headers, rows, right_from=2,
                             caption=" ".join(t for t in (
                                 None if cut is None else f"{cut}; --last N for more, 0 for all.",
                                 None if seen.all() else NO_RETURN_NOTE,
                                 output.BAND_NOTE if is_bayes(run) else None) if t) or None,
                             drop=[5, 3]))
    output.caution()


def cross_section(
    ctx: typer.Context,
    run_id: RunArg,
    date: Annotated[str | None, typer.Option("--date", help="Date YYYY-MM-DD (default: the run's as-of); "
                                             "the last panel date on or before it is used.",
                                             show_default=False)] = None,
    kind: Annotated[Kind, typer.Option("--kind", help="filtered (real-time) or smoothed (revised).")]
    = Kind.smoothed,
    pairs: Annotated[bool, typer.Option("--pairs", help="Also the matrix P(premium of row > premium of "
                                        "column).")] = False,
    as_json: JsonFlag = False, as_csv: CsvFlag = False,
) -> None:
    """The premia at one date, ranked, with 90% bands and P(premium > 0); --pairs adds the
    probability that one premium exceeds another (from their joint posterior)."""
    from panel.model.result import asset_labels
    from panel.vintages.reproduce import run_inputs, stored_cross_section

    st = state(ctx)
    when = parse_date(date, "--date")
    with store_for(st) as store, user_errors():
        dates = run_inputs(store, run_id).panel.dates if when is not None else None
        if when is not None and (when < dates[0] or when > dates[-1]):
            fail(f"--date {when.date()} is outside run {run_id}'s dates {dates[0].date()} to "
                 f"{dates[-1].date()}; give a date in that range")
        cs, inputs = stored_cross_section(store, run_id, when, kind.value)
    as_of = inputs.panel.dates[-1]
    ranked = cs.table()
    later = [a for a in inputs.panel.assets if a not in set(cs.assets)]     # no return yet
    matrix = cs.prob_greater.loc[list(ranked["asset"]), list(ranked["asset"])]
    ppy = run_ppy(inputs)
    if as_json:
        output.emit_json({"run_id": run_id, "date": cs.date, "kind": kind.value, "as_of": as_of,
                          "periods_per_year": ppy, "units": output.MACHINE_UNITS, "ranked": ranked,
                          "assets": list(cs.assets), "not_entered": later, "mean": cs.mean, "cov": cs.cov,
                          "prob_greater": {"assets": list(matrix.index), "matrix": matrix.to_numpy()},
                          "caution": output.CAUTION})
        return
    if as_csv:
        output.emit_csv(matrix.reset_index(names="asset") if pairs else ranked)
        return
    rows = [(i + 1, label, output.num(output.premium_pct(r.mean, ppy), 2),
             output.band(r.mean, r.std, ppy, quantiles=(getattr(r, "q05", None), getattr(r, "q95", None))
                         if cs.mixture is not None else None),
             output.num(output.premium_pct(r.std, ppy), 2), output.pct(r.prob_positive))
            for i, (r, label) in enumerate(zip(ranked.itertuples(index=False),
                                               asset_labels(ranked, cs.date)))]
    output.show(output.table(f"Cross-section at {output.day(cs.date)}: {kind.value} premia "
                             f"({'real-time' if kind == Kind.filtered else 'revised'}), annualised % (x{ppy}); "
                             f"run {run_id}, as of {output.day(as_of)}",
                             ["rank", "asset", "premium", "90% band", "std", "P(premium > 0)"], rows,
                             right_from=2, caption=output.stale_caption(
                                 ranked, cs.date, None if cs.mixture is None else
                                 "Bayesian run: premium = posterior mean, band = posterior 5% and "
                                 "95% quantiles, probabilities from the posterior draws (parameter "
                                 "uncertainty included).", later)))
    if pairs:
        labels = list(matrix.index)
        rows = [(a, *("" if a == b else output.pct(matrix.loc[a, b]) for b in labels)) for a in labels]
        output.show(output.table(f"P(premium of row > premium of column) at {output.day(cs.date)}, "
                                 f"{kind.value}", ["", *labels], rows))
    output.caution()


class Table(str, Enum):
    estimates = "estimates"
    factors = "factors"
    parameters = "parameters"
    trace = "trace"
    diagnostics = "diagnostics"


def export(ctx: typer.Context, run_id: RunArg,
           path: Annotated[Path, typer.Argument(help="Target file: .parquet or .csv.", show_default=False)],
           table: Annotated[Table, typer.Option("--table", help="Which result table.")] = Table.estimates,
           force: Annotated[bool, typer.Option("--force", help="Replace the file if it exists (never "
                                               "the store itself).")] = False,
           as_json: JsonFlag = False) -> None:
    """Write one result table of a run to a Parquet or CSV file (per-period decimal units, the
    store's column names).  In CSV, text a spreadsheet would run as a formula (starting with =, +,
    -, @) gets a leading single quote; Parquet keeps it as stored."""
    from panel.store import export_run

    st = state(ctx)
    with store_for(st) as store, user_errors():
        written = export_run(store, run_id, path, table.value, overwrite=force)
    if as_json:
        output.emit_json({"run_id": run_id, "table": table.value, "path": str(written),
                          "units": output.MACHINE_UNITS, "caution": output.CAUTION})
        return
    output.line(f"wrote the {table.value} of run {run_id} to {written} (per-period decimal units)")
    output.caution()


class Chart(str, Enum):
    paths = "paths"
    cross_section = "cross-section"
    vintages = "vintages"


def plot(
    ctx: typer.Context,
    run_id: RunArg,
    asset: Annotated[list[str] | None, typer.Option("--asset", help="Asset(s) to draw (repeatable); "
                     "default: the first four (paths) or the first (vintages).", show_default=False)] = None,
    date: Annotated[str | None, typer.Option("--date", help="Date for the cross-section or vintages chart "
                                             "(default: the run's as-of).", show_default=False)] = None,
    chart: Annotated[Chart, typer.Option("--chart", help="paths: premium paths, filtered vs smoothed; "
                     "cross-section: the premia at --date; vintages: how the estimate at --date moved "
                     "across stored vintages.")] = Chart.paths,
    kind: Annotated[Kind, typer.Option("--kind", help="Basis of the cross-section chart.")] = Kind.smoothed,
    out: Annotated[Path | None, typer.Option("--out", help="Chart file to write; its ending picks the "
                   "format: .png, .svg or .pdf (default: riskprem-run<ID>-<chart>.png here).",
                   show_default=False)] = None,
    same_scale: Annotated[bool, typer.Option("--same-scale", help="Paths chart: one vertical scale for "
                          "every asset's panel.")] = False,
    as_json: JsonFlag = False,
) -> None:
    """Draw a chart of a run as PNG, SVG or PDF (annualised %, 90% bands; dataset, label and as-of
    date in the title)."""
    import pandas as pd

    from panel import plots
    from panel.vintages.reproduce import run_inputs, stored_cross_section, vintage_history
    from panel.store import run_tables

    st = state(ctx)
    when = parse_date(date, "--date")
    target = out or Path(f"riskprem-run{run_id}-{chart.value}.png")
    try:
        chart_kind = plots.chart_format(target)
    except plots.ChartError as error:
        fail(f"--out {error}")
    with user_errors():
        check_target(target, overwrite=True)   # a chart is redrawn in place, but never into a folder
    with store_for(st) as store, user_errors():
        inputs = run_inputs(store, run_id)
        dataset, label = _names(store).get(inputs.run["dataset_hash"]), inputs.run["label"]
        assets = list(inputs.panel.assets)
        unknown = [a for a in asset or () if a not in assets]
        if unknown:
            fail(f"run {run_id} has no asset {unknown[0]!r}; its assets: {', '.join(assets)}")
        as_of = pd.Timestamp(inputs.run["as_of"])
        when = as_of if when is None else when
        if chart != Chart.paths and (when < inputs.panel.dates[0] or when > as_of):
            fail(f"--date {when.date()} is outside run {run_id}'s dates {inputs.panel.dates[0].date()} to "
                 f"{as_of.date()}; give a date in that range")
        ppy = run_ppy(inputs)
        try:
            if chart == Chart.paths:
                chosen = list(asset) if asset else assets[:4]
                fig = plots.premium_paths(run_tables(store, run_id)["estimates"], chosen, ppy, as_of,
                                          title=plots.heading("Premium paths", dataset, label),
                                          shared_scale=same_scale, last_return=inputs.panel.last_returns())
            elif chart == Chart.cross_section:
                cs, _ = stored_cross_section(store, run_id, when, kind.value)   # Bayes: over its draws
                fig = plots.cross_section_chart(cs.table(), ppy, cs.date, kind.value, as_of,
                                                title=plots.heading("Cross-section", dataset, label))
            else:
                chosen = list(asset) if asset else assets[:1]
                date_used = inputs.panel.dates[inputs.panel.dates.searchsorted(when, side="right") - 1]
                history = vintage_history(store, run_id, chosen[0], date_used)
                fig = plots.vintage_chart(history, chosen[0], date_used, ppy,
                                          title=plots.heading("Revisions across vintages", dataset, label))
        except plots.ChartError as error:
            fail(f"run {run_id}: {error}")
    with user_errors():
        written = write_atomically(target, lambda file: file.write_bytes(plots.render(fig, chart_kind)))
    if as_json:
        output.emit_json({"run_id": run_id, "chart": chart.value, "path": str(written),
                          "caution": output.CAUTION})
        return
    output.line(f"wrote {written} ({chart.value} chart of run {run_id}; annualised %, 90% bands)")
    output.caution()


def register(app: typer.Typer) -> None:
    app.command("runs")(runs)
    app.command("show")(show)
    app.command("estimates")(estimates)
    app.command("cross-section")(cross_section)
    app.command("diff")(diff)
    app.command("export")(export)
    app.command("plot")(plot)
