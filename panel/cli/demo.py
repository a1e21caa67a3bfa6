"""``demo``: the invented fund's sleeves, end to end (files, store, vintages, plots)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from panel.cli import output
from panel.cli.common import JsonFlag, fail, progress, state, store_for, user_errors


def demo(
    ctx: typer.Context,
    out: Annotated[Path, typer.Option("--out", help="Folder for the CSV files and PNG charts "
                                      "(created if missing).")] = Path("riskprem-demo"),
    seed: Annotated[int | None, typer.Option("--seed", help="Simulation seed (default: the demo's "
                                             "own).", show_default=False)] = None,
    as_json: JsonFlag = False,
) -> None:
    """Simulate an invented fund's sleeves, ingest them, backfill yearly vintages and draw charts.

    Writes the returns and the true premia as CSV and three PNG charts into --out, stores the
    dataset and the vintages in the store (--store), and prints a summary.  The data are invented.
    """
    from panel import demo as scenario

    st = state(ctx)
    if out.exists() and not out.is_dir():
        fail(f"--out {out} is a file; give a folder")
    if not out.parent.exists():
        fail(f"--out {out}: folder {out.parent} does not exist; create it or give another folder")
    out.mkdir(exist_ok=True)
    with store_for(st, write=True) as store, user_errors():
        with progress(st, "demo", total=7) as bar:
            outcome = scenario.run_demo(store, out, **({} if seed is None else {"seed": seed}),
                                        progress=lambda step, done, total: bar.update(done, f"demo: {step}",
                                                                                      total))
        location = store.display
    result = outcome.fit
    ppy = result.periods_per_year
    last = result.dates[-1]
    cs = result.cross_section(last, "filtered")
    ranked = cs.table()
    truth = outcome.truth.loc[last]
    if as_json:
        output.emit_json({"fund": scenario.FUND, "folder": str(outcome.folder),
                          "returns_file": str(outcome.returns_file), "truth_file": str(outcome.truth_file),
                          "store": location, "dataset": scenario.DATASET_NAME,
                          "dataset_hash": outcome.dataset_hash, "run_ids": outcome.run_ids,
                          "as_of": outcome.as_of, "accuracy": outcome.accuracy,
                          "plots": [str(p) for p in outcome.plots], "seconds": outcome.seconds,
                          "periods_per_year": ppy, "units": output.MACHINE_UNITS,
                          "latest": ranked.assign(true_premium=[truth[a] for a in ranked["asset"]]),
                          "caution": output.CAUTION})
        return
    values = result.panel.values
    output.line(f"{scenario.FUND} (an invented fund): {values.shape[1]} sleeves, {values.shape[0]} months "
                f"{output.day(values.index[0])} to {output.day(values.index[-1])}", style="bold")
    output.facts([
        ("returns", str(outcome.returns_file)),
        ("true premia", str(outcome.truth_file)),
        ("store", f"{location}: dataset {scenario.DATASET_NAME} ({output.short_hash(outcome.dataset_hash)})"),
        ("vintages", ", ".join(f"run {i} ({output.day(d)})" for i, d in zip(outcome.run_ids, outcome.as_of))),
        ("charts", ", ".join(str(p) for p in outcome.plots)),
        ("time", f"{outcome.seconds:.1f} s"),
    ])
    rows = [(r.asset, output.num(output.premium_pct(r.mean, ppy), 1), output.band(r.mean, r.std, ppy),
             output.pct(r.prob_positive), output.num(output.premium_pct(truth[r.asset], ppy), 1))
            for r in ranked.itertuples(index=False)]
    output.show(output.table(f"Newest vintage (run {outcome.run_ids[-1]}), premia at {output.day(last)}: "
                             f"filtered (real-time), annualised % (x{ppy})",
                             ["sleeve", "premium", "90% band", "P(premium > 0)", "true (simulated)"], rows))
    acc = outcome.accuracy
    output.line(f"filtered premia vs the simulated truth: RMSE {100 * acc['rmse_filtered']:.2f} points a year, "
                f"against {100 * acc['rmse_sample_mean']:.2f} for the expanding sample mean "
                f"({acc['sleeve_months']:.0f} sleeve-months after each sleeve's first {scenario.BURN_IN})")
    output.line(f"the 90% bands cover the simulated true premia in {100 * acc['coverage_filtered']:.1f}% "
                f"(filtered) and {100 * acc['coverage_smoothed']:.1f}% (smoothed) of those sleeve-months")
    newest = outcome.run_ids[-1]
    output.line(f"next: riskprem show {newest} | riskprem cross-section {newest} --pairs | "
                f"riskprem plot {newest} --chart vintages --date {output.day(outcome.as_of[0])} | "
                f"riskprem reproduce {newest}")
    output.caution()


def register(app: typer.Typer) -> None:
    app.command("demo")(demo)
