"""``backfill``, ``revisions``, ``evaluate``: vintages at past cut-offs and what they say.

The work is done by :mod:`panel.vintages.backfill` and :mod:`panel.vintages.evaluation`; this module parses options,
shows progress and prints.  The three commands take the model options of ``riskprem fit`` (the
settings of a backfill); ``revisions`` and ``evaluate`` use them, or ``--key``, to pick the backfill
when a dataset has several.
"""

from __future__ import annotations

from enum import Enum
from typing import Annotated

import typer

from panel.cli import output
from panel.cli.common import (CsvFlag, JsonFlag, State, fail, info, parse_date, progress_enabled, state,
                              store_exists, store_for, user_errors)
from panel.cli.model_options import ModelOptions, with_model_options

# ---------------------------------------------------------------------------------------------
# options shared by the three commands

DataOpt = Annotated[str, typer.Option("--data", help="A stored dataset: name or hash (prefix).",
                                      show_default=False)]
WindowOpt = Annotated[str | None, typer.Option(
    "--window", metavar="expanding|rolling:M",
    help="Estimation window of each vintage: all data up to the cut-off (expanding, the default) or "
         "its last M periods.", show_default=False)]
KeyOpt = Annotated[str | None, typer.Option(
    "--key", metavar="PREFIX", help="The backfill to use, by (a prefix of) its key, when the dataset has "
                                    "several (instead of repeating its settings).", show_default=False)]


class SeKind(str, Enum):
    plain = "plain"
    newey_west = "newey-west"


def _chosen_backfill(store, data: str, key: str | None, window, model: ModelOptions):
    """The backfill meant by --key, by the model options, or the dataset's only one."""
    from panel.vintages.backfill import find_backfill

    given = model.given() or window is not None
    if key and given:
        raise typer.BadParameter("give either --key or the backfill's settings, not both", param_hint="--key")
    if given:
        return find_backfill(store, data, spec=model.spec(), window=window or "expanding")
    return find_backfill(store, data, key=key)


def _ppy(store, backfill) -> int:
    from panel.data import PERIODS_PER_YEAR
    from panel.store import list_datasets

    spec_ppy = (backfill.settings.get("spec") or {}).get("periods_per_year")
    if spec_ppy:
        return int(spec_ppy)
    frame = list_datasets(store)
    frequency = frame.loc[frame["hash"] == backfill.dataset_hash, "frequency"].iloc[0]
    return PERIODS_PER_YEAR[str(frequency)]


# ---------------------------------------------------------------------------------------------
# backfill

class _Progress:
    """The library's progress events on a rich bar with ETA (a terminal) or as note lines."""

    def __init__(self, st: State):
        self.st = st
        self.bar = None
        self.task = None

    def __enter__(self):
        if progress_enabled(self.st):
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                TimeElapsedColumn(), TextColumn("eta {task.fields[eta]}"),
                                console=output.err(), transient=True)
            self.bar.__enter__()
        return self

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.__exit__(*exc)

    def __call__(self, event) -> None:
        eta = "-" if event.eta_s is None else _duration(event.eta_s)
        if event.as_of is None:
            if self.bar is not None:
                self.task = self.bar.add_task(f"backfill on {event.where}", total=event.total, eta=eta)
            return
        text = (f"vintage {output.day(event.as_of)}: run {event.run_id}, {event.status}, {event.n_iter} "
                f"iterations, {event.fit_s:.1f} s")
        if self.bar is not None:
            self.bar.update(self.task, completed=event.done, description=text, eta=eta)
        else:
            info(self.st, f"{text} [{event.done}/{event.total}, eta {eta}]")


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    if seconds < 60:
        return f"{seconds} s"
    minutes, secs = divmod(seconds, 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def backfill(
    ctx: typer.Context,
    data: DataOpt,
    start: Annotated[str, typer.Option("--start", metavar="DATE", help="First cut-off YYYY-MM-DD (the "
                                       "dataset's first date on or after it).", show_default=False)],
    end: Annotated[str | None, typer.Option("--end", metavar="DATE", help="Last cut-off YYYY-MM-DD "
                                            "(default: the last date).", show_default=False)] = None,
    every: Annotated[int, typer.Option("--every", min=1, metavar="N", help="Every N-th date from --start "
                                       "is a cut-off.")] = 1,
    window: WindowOpt = None,
    chain: Annotated[int, typer.Option("--chain", min=1, metavar="N", help="Cut-offs per warm-start chain: "
                                       "each vintage starts from the previous cut-off's estimates, the first "
                                       "of each chain cold; chains run in parallel.")] = 12,
    warm_start: Annotated[bool, typer.Option("--warm-start/--no-warm-start", help="Start each vintage "
                                             "from the previous cut-off's estimates (within its chain).")] = True,
    workers: Annotated[int | None, typer.Option("--workers", min=1, metavar="N", help="Local worker "
                                                "processes (default: the CPUs available; 1 = in this "
                                                "process); with --scheduler, fits in flight.",
                                                show_default=False)] = None,
    scheduler: Annotated[str | None, typer.Option("--scheduler", metavar="ADDRESS", help="Run the fits on "
                                                  "an existing Dask cluster, e.g. tcp://10.0.0.5:8786.",
                                                  show_default=False)] = None,
    label: Annotated[str | None, typer.Option("--label", help="A note stored with every vintage.",
                                              show_default=False)] = None,
    model: ModelOptions = ModelOptions(),
    as_json: JsonFlag = False,
) -> None:
    """Re-estimate the model at each past cut-off and store one vintage per cut-off.

    Each vintage is fitted on the data up to its cut-off only, parameters included (pseudo
    real-time), and stored in one transaction as soon as it is done.  Cut-offs already stored with
    the same dataset and settings are skipped, so running the command again resumes an interrupted
    backfill (Ctrl-C keeps every finished vintage; exit code 130).  Results do not depend on
    --workers or --scheduler: warm starts follow fixed chains of --chain cut-offs.
    """
    from panel.vintages.backfill import (BackfillInterrupted, default_workers, nearest_backfill, plan_backfill,
                                         run_backfill)

    st = state(ctx)
    parse_date(start, "--start")
    parse_date(end, "--end")
    spec = model.spec()
    if scheduler is not None:
        from panel.vintages.pools import scheduler_address

        with user_errors():   # its form, before the store is opened (Dask would wait 20 s)
            scheduler = scheduler_address(scheduler)
    if workers is None and scheduler is None:
        workers = default_workers()
    interrupted = False
    if not store_exists(st):   # a backfill needs a stored dataset: never create an empty store
        fail(f"no store at {st.shown}; ingest a dataset first (`riskprem ingest FILE --name NAME`) or give "
             "another store location")
    with store_for(st, write=True, hold=False) as store, user_errors():   # readers work between vintages
        plan = plan_backfill(store, data, spec, start=start, end=end, every=every,
                             window=window or "expanding", chain=chain, warm_start=warm_start, label=label)
        first, last = plan.vintages[0].as_of, plan.vintages[-1].as_of
        info(st, f"backfill of {data}: {len(plan.vintages)} cut-offs {output.day(first)} to {output.day(last)} "
                 f"({plan.window.text}), {len(plan.skipped)} already stored, {len(plan.todo)} to fit")
        reason = serial_reason(plan, workers, scheduler)
        if reason and not st.quiet:
            output.note(reason)
        near = None if plan.skipped else nearest_backfill(store, plan)
        if near is not None and not st.quiet and not as_json:
            output.note(f"note: a new backfill; the stored one closest to it ({near[0].key[:10]}, "
                        f"{near[0].n_vintages} vintages) differs in {', '.join(near[1])}")
        with _Progress(st) as bar:
            try:
                report = run_backfill(store, plan, workers=workers, scheduler=scheduler, progress=bar)
            except BackfillInterrupted as stop:
                report, interrupted = stop.report, True
    vintages = [{"as_of": w.as_of, "run_id": w.run_id, "status": w.status, "iterations": w.n_iter,
                 "fit_s": w.fit_s, "parent_run": w.parent_run} for w in sorted(report.written, key=lambda w: w.as_of)]
    if as_json:
        output.emit_json({"dataset": data, "dataset_hash": plan.dataset_hash, "backfill_key": plan.key,
                          "window": plan.window.text, "chain": plan.chain, "warm_start": plan.warm_start,
                          "n_cutoffs": len(plan.vintages), "first_cutoff": first, "last_cutoff": last,
                          "resumed_unchained": plan.legacy,
                          "closest_other_backfill": None if near is None else {
                              "backfill_key": near[0].key, "n_vintages": near[0].n_vintages,
                              "differs_in": near[1]},
                          "skipped": report.skipped, "fitted": len(report.written), "where": report.where,
                          "elapsed_s": report.elapsed_s, "interrupted": interrupted, "vintages": vintages,
                          "settings": {"spec": spec.to_dict(), "window": plan.window.text}})
    else:
        _print_backfill(st, data, plan, report, vintages, interrupted)
    if interrupted:
        if not as_json:
            output.error_line(f"interrupted: {len(report.written)} vintage(s) stored this time, each complete; "
                              "run the same command again to resume")
        raise typer.Exit(130)


def serial_reason(plan, workers: int | None, scheduler: str | None) -> str | None:
    """Why ``--workers N`` (N > 1) will run the fits in one process, or None."""
    if scheduler is not None or not workers or workers <= 1 or not plan.todo or plan.n_chains() > 1:
        return None
    why = ("warm starts link each cut-off to the one before" if plan.warm_start
           else "there is one chain")
    return (f"note: running in one process although --workers {workers}: the {len(plan.todo)} cut-off(s) to "
            f"fit form one chain of --chain {plan.chain} and {why}, so they run in order; a smaller --chain "
            "splits them into chains that run in parallel")


def _print_backfill(st, data, plan, report, vintages, interrupted) -> None:
    first, last = plan.vintages[0].as_of, plan.vintages[-1].as_of
    output.line(f"backfill of {data} ({output.short_hash(plan.dataset_hash)}): {len(plan.vintages)} cut-offs "
                f"{output.day(first)} to {output.day(last)}, window {plan.window.text}, key "
                f"{plan.key[:10]}", style="bold")
    if plan.legacy:
        output.line("note: resumed a backfill stored before the chain length was recorded (its vintages "
                    f"started as --chain {plan.chain} starts them); new vintages join it under its key")
    verb = "stopped after" if interrupted else "fitted"
    output.line(f"{verb} {len(report.written)} vintage(s) in {_duration(report.elapsed_s)} on {report.where}; "
                f"{report.skipped} already stored (skipped)")
    counts: dict[str, int] = {}
    for v in vintages:
        counts[v["status"]] = counts.get(v["status"], 0) + 1
    if counts:
        output.line("status: " + ", ".join(f"{n} {s}" for s, n in sorted(counts.items())),
                    style="green" if set(counts) == {"converged"} else "yellow")
    if vintages and (len(vintages) <= 36 or st.verbose):
        rows = [(output.day(v["as_of"]), v["run_id"], v["status"], v["iterations"], output.num(v["fit_s"], 1),
                 "cold" if v["parent_run"] is None else f"warm from run {v['parent_run']}") for v in vintages]
        output.show(output.table("Vintages stored (one run each, kind backfill)",
                                 ["as of", "run", "status", "iterations", "seconds", "start"], rows, right_from=1))
    elif vintages:
        output.line(f"{len(vintages)} vintages; list them with `riskprem runs --data {data}` (or add -v)")
    if not plan.todo:
        output.line("nothing to do: every cut-off is already stored with these settings")


# ---------------------------------------------------------------------------------------------
# revisions

def revisions(
    ctx: typer.Context,
    data: DataOpt,
    asset: Annotated[str, typer.Option("--asset", help="The asset whose premium is followed.",
                                       show_default=False)],
    date: Annotated[str, typer.Option("--date", metavar="DATE", help="The date whose premium estimate is "
                                      "followed across vintages, YYYY-MM-DD.", show_default=False)],
    key: KeyOpt = None,
    window: WindowOpt = None,
    skip: Annotated[int, typer.Option("--skip", min=0, metavar="N", help="Leave each asset's first N dates "
                                      "out of the per-asset summary (a burn-in: the first estimates after an "
                                      "asset enters rest on few returns and are revised most).")] = 0,
    model: ModelOptions = ModelOptions(),
    as_json: JsonFlag = False,
    as_csv: CsvFlag = False,
) -> None:
    """How the premium estimate of one asset at one date moved across a backfill's vintages.

    One row per vintage covering the date: the filtered (real-time) and smoothed (revised) premium
    and the revision from the first release, then per asset the mean absolute revision (newest
    smoothed minus first-release filtered, over the dates at least two vintages cover).  Tables are
    annualised percent; --json and --csv keep per-period decimals.
    """
    from panel.vintages.evaluation import revisions as revision_path

    st = state(ctx)
    day = parse_date(date, "--date")
    with store_for(st) as store, user_errors():
        chosen = _chosen_backfill(store, data, key, window, model)
        found = revision_path(store, chosen, asset, day, skip=skip)
        ppy = _ppy(store, chosen)
    if as_csv:
        output.emit_csv(found.path)
        return
    if as_json:
        output.emit_json({"dataset": data, "dataset_hash": chosen.dataset_hash, "backfill_key": chosen.key,
                          "window": chosen.window, "asset": asset, "date": found.date, "units": output.MACHINE_UNITS,
                          "periods_per_year": ppy, "first_release": {"as_of": found.first_release[0],
                                                                     "filtered_mean": found.first_release[1]},
                          "latest": {"as_of": found.latest[0], "smoothed_mean": found.latest[1]},
                          "total_revision": found.total_revision, "vintages": found.path,
                          "skip": found.skip,
                          "mean_abs_revision": found.summary, "caution": output.CAUTION})
        return
    pct = lambda v, digits=2: output.num(output.premium_pct(v, ppy), digits)  # noqa: E731
    rows = [(output.day(r.as_of), r.run_id, pct(r.filtered_mean), pct(r.filtered_std), pct(r.smoothed_mean),
             pct(r.smoothed_std), pct(r.revision), pct(r.change))
            for r in found.path.itertuples(index=False)]
    output.show(output.table(
        f"Premium of {asset} at {output.day(found.date)} across {len(rows)} vintages of backfill "
        f"{chosen.key[:10]} ({chosen.window}), annualised % (x{ppy})",
        ["as of", "run", "filtered (real-time)", "std", "smoothed (revised)", "std", "revision", "change"],
        rows, caption="revision = smoothed minus the first release (the first vintage's filtered "
                      "estimate); change = from the previous vintage's smoothed estimate."))
    (first_as_of, first), (last_as_of, latest) = found.first_release, found.latest
    output.line(f"first release ({output.day(first_as_of)}): {pct(first)}% a year; latest "
                f"({output.day(last_as_of)}): {pct(latest)}% a year; total revision {pct(found.total_revision)} "
                "points")
    summary = [(r.asset, r.n_dates, f"{output.day(r.first_date)} to {output.day(r.last_date)}",
                pct(r.mean_abs_revision), pct(r.mean_revision), pct(r.max_abs_revision))
               for r in found.summary.itertuples(index=False)]
    output.show(output.table(
        f"Revisions per asset, annualised % (x{ppy}): newest smoothed minus first release",
        ["asset", "dates", "range", "mean |revision|", "mean revision", "largest |revision|"], summary,
        caption="Over the dates that at least two vintages cover, up to each asset's last return" + (
            f", after each asset's first {found.skip} dates (--skip)." if found.skip else
            "; each asset's first dates included (--skip N leaves out a burn-in).")))
    output.caution()


# ---------------------------------------------------------------------------------------------
# evaluate

def evaluate(
    ctx: typer.Context,
    data: DataOpt,
    key: KeyOpt = None,
    window: WindowOpt = None,
    se: Annotated[SeKind, typer.Option("--se", help="Standard errors of the Clark-West statistic: plain "
                                       "(OLS; pooled: clustered by date) or newey-west (pooled: "
                                       "Driscoll-Kraay).")] = SeKind.plain,
    lags: Annotated[int | None, typer.Option("--lags", min=0, help="Newey-West lags (default "
                                             "floor(4 (n/100)^(2/9))).", show_default=False)] = None,
    model: ModelOptions = ModelOptions(),
    as_json: JsonFlag = False,
    as_csv: CsvFlag = False,
) -> None:
    """Out-of-sample test of a backfill's real-time one-step forecasts against the historical mean.

    Each vintage forecasts the next period's excess return by its filtered premium at its cut-off;
    the benchmark is the expanding mean of the asset's returns up to the cut-off.  Per asset and
    pooled: out-of-sample R² (Campbell & Thompson 2008; above 0 = better than the historical mean)
    and the Clark & West (2007) MSPE-adjusted t-statistic with its one-sided p-value.
    """
    from panel.vintages.evaluation import MIN_FORECASTS, evaluate_backfill

    st = state(ctx)
    if lags is not None and se is SeKind.plain:
        raise typer.BadParameter("--lags goes with --se newey-west", param_hint="--lags")
    with store_for(st) as store, user_errors():
        chosen = _chosen_backfill(store, data, key, window, model)
        result = evaluate_backfill(store, chosen, se=se.value, lags=lags)
        ppy = _ppy(store, chosen)
    table = result.table
    if as_csv:
        pooled = {"asset": "(pooled)", **result.pooled}
        import pandas as pd

        output.emit_csv(pd.concat([table, pd.DataFrame([pooled])], ignore_index=True))
        return
    if as_json:
        output.emit_json({"dataset": data, "dataset_hash": chosen.dataset_hash, "backfill_key": chosen.key,
                          "window": chosen.window, "se": se.value, "lags": lags, "units": output.MACHINE_UNITS,
                          "periods_per_year": ppy, "assets": table, "pooled": result.pooled,
                          "pending_forecasts": result.pending, "forecasts": result.forecasts,
                          "min_forecasts": MIN_FORECASTS,
                          "caution": output.CAUTION})
        return
    pct = lambda v: output.num(output.premium_pct(v, ppy), 2)  # noqa: E731

    def row(name, r):
        p_value = output.num(r["cw_pvalue"], 3) if r["enough"] else f"(n<{MIN_FORECASTS})"
        return (name, r["n"], output.day(r["first_target"]), output.num(100 * r["r2_os"], 2),
                output.num(r["cw_t"], 2), p_value, pct(r["mean_forecast"]),
                pct(r["mean_benchmark"]), output.num(100 * r["mspe_model"] ** 0.5, 2),
                output.num(100 * r["mspe_benchmark"] ** 0.5, 2))

    rows = [row(r["asset"], r) for r in table.to_dict(orient="records")]
    rows.append(row("(pooled)", result.pooled))
    se_text = "plain" if se is SeKind.plain else f"Newey-West, {'auto' if lags is None else lags} lags"
    unit = _period(ppy)
    output.show(output.table(
        f"Out-of-sample one-step forecasts, backfill {chosen.key[:10]} ({chosen.window}): filtered premium at "
        f"each cut-off vs the expanding historical mean, targets to {output.day(result.pooled['last_target'])}",
        ["asset", "n", "first target", "R2_OS %", "CW t", "p", "forecast", "hist. mean",
         f"RMSE %/{unit}", f"hist. RMSE %/{unit}"],
        rows, caption=f"R2_OS = 1 - SSE(model)/SSE(historical mean) (Campbell-Thompson 2008). CW = Clark-West "
                      f"(2007) MSPE-adjusted t, p one-sided (H1: the model forecasts better); SE {se_text}, "
                      f"pooled over assets by date. Forecast and historical mean: averages, annualised % "
                      f"(x{ppy}); RMSE per {unit}, not annualised."))
    few = [r["asset"] for r in table.to_dict(orient="records") if not r["enough"]]
    few += ["(pooled)"] if not result.pooled["enough"] else []
    if few:
        output.line(f"warning: {len(few)} row(s) rest on fewer than {MIN_FORECASTS} forecasts ({', '.join(few[:6])}"
                    f"{', ...' if len(few) > 6 else ''}): their p-values are not shown (the normal approximation "
                    f"of the t-statistic wants {MIN_FORECASTS}+, common practice); backfill more cut-offs",
                    style="yellow")
    if result.pending:
        output.line(f"{result.pending} forecast(s) have no realized return yet (or it is missing): left out")
    output.caution()


def _period(ppy: int) -> str:
    return {12: "month", 4: "quarter", 52: "week", 1: "year", 252: "day"}.get(ppy, "period")


def register(app: typer.Typer) -> None:
    app.command("backfill")(with_model_options(backfill))
    app.command("revisions")(with_model_options(revisions))
    app.command("evaluate")(with_model_options(evaluate))
