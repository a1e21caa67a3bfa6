"""``riskprem diff``: two stored runs side by side (opens the store read-only; registered by
:mod:`panel.cli.runs`, so that help lists it among the commands that read runs)."""

from __future__ import annotations

from typing import Annotated

import typer

from panel import units
from panel.cli import output
from panel.cli.common import CsvFlag, JsonFlag, run_ppy, state, store_for, user_errors


def _param_summary(frame, side: str, ppy: int) -> dict[str, dict]:
    """Per asset, from parameter_changes rows (a DataFrame): loading(s), own premium vol, return vol
    (annualised)."""
    import pandas as pd

    out: dict[str, dict] = {}
    for r in frame.itertuples(index=False):
        value = getattr(r, f"value_{side}")
        if value is None or pd.isna(value):
            continue
        entry = out.setdefault(r.row, {})
        if r.name == "loading":
            entry[f"loading {r.col}"] = float(units.premium_loading(value, ppy)) * 100
        elif r.name == "idio_premium_var":
            entry["own premium vol"] = float(output.premium_vol_pct(value, ppy))
        elif r.name == "premium_cov" and r.row == r.col:
            entry["premium vol"] = float(output.premium_vol_pct(value, ppy))
        elif r.name == "return_cov" and r.row == r.col:
            entry["return-shock vol"] = float(output.vol_pct(value, ppy))
    return out


def diff(ctx: typer.Context,
         run_a: Annotated[int, typer.Argument(help="First run id.", show_default=False)],
         run_b: Annotated[int, typer.Argument(help="Second run id.", show_default=False)],
         as_json: JsonFlag = False, as_csv: CsvFlag = False) -> None:
    """Two runs side by side: fit statistics, settings that differ, latest premia and parameters."""
    import pandas as pd

    from panel.report.content import setting_lines  # one wording for the terminal and the report
    from panel.store import is_bayes, run_query, run_tables
    from panel.vintages.reproduce import run_inputs, stored_params

    st = state(ctx)
    with store_for(st) as store, user_errors():
        inputs = [run_inputs(store, run_a), run_inputs(store, run_b)]
        params = [stored_params(store, i) for i in inputs]
        est = [run_tables(store, r, kinds=("estimates",))["estimates"] for r in (run_a, run_b)]
        changes = run_query(store, "parameter_changes", {"run_a": run_a, "run_b": run_b})
    runs_ = [i.run for i in inputs]
    ppy = [run_ppy(i) for i in inputs]
    # compare the settings as they resolve on each run's data (auto choices filled in, volatilities
    # in today's convention), so two records of the same model are not "different"
    lines = [dict(setting_lines(i.spec, i.run["settings"] or {}, p, y)) for i, p, y in zip(inputs, params, ppy)]
    if runs_[0]["dataset_hash"] != runs_[1]["dataset_hash"]:
        for side, run in zip(lines, runs_):
            side["dataset"] = output.short_hash(run["dataset_hash"])
    keys = list(dict.fromkeys([*lines[0], *lines[1]]))
    settings = [{"setting": k, "run_a": lines[0].get(k, "-"), "run_b": lines[1].get(k, "-")}
                for k in keys if lines[0].get(k) != lines[1].get(k)]
    changed = [row["setting"] for row in settings]
    spec_a = (runs_[0]["settings"] or {}).get("spec", {})
    spec_b = (runs_[1]["settings"] or {}).get("spec", {})
    recorded_only = sorted(k for k in set(spec_a) | set(spec_b) if spec_a.get(k) != spec_b.get(k))
    latest = []
    for e, run in zip(est, runs_):
        e = e.assign(date=pd.to_datetime(e["date"]))
        latest.append(e[e["date"] == pd.Timestamp(run["as_of"])].set_index("asset"))
    common = min(pd.Timestamp(runs_[0]["as_of"]), pd.Timestamp(runs_[1]["as_of"]))
    at_common = []
    for e in est:
        e = e.assign(date=pd.to_datetime(e["date"]))
        at_common.append(e[e["date"] == common].set_index("asset"))
    assets = list(dict.fromkeys(list(inputs[0].panel.assets) + list(inputs[1].panel.assets)))
    last = [i.panel.last_returns() for i in inputs]
    premia = []
    for a in assets:
        row = {"asset": a}
        for side, frame, cframe, seen in zip("ab", latest, at_common, last):
            row[f"last_return_{side}"] = seen.get(a)
            row[f"filtered_mean_{side}"] = frame.loc[a, "filtered_mean"] if a in frame.index else None
            row[f"filtered_std_{side}"] = frame.loc[a, "filtered_std"] if a in frame.index else None
            row[f"smoothed_mean_{side}_at_common"] = cframe.loc[a, "smoothed_mean"] if a in cframe.index else None
        premia.append(row)
    premia = pd.DataFrame(premia)
    if as_json:
        output.emit_json({"run_a": run_a, "run_b": run_b,
                          "runs": [{k: r[k] for k in ("id", "kind", "label", "dataset_hash", "as_of", "status",
                                                      "loglik", "aic", "bic", "n_params", "iterations")}
                                   for r in runs_],
                          "settings_changed": changed, "settings": settings,
                          "bayesian_runs": [int(r["id"]) for r in runs_ if is_bayes(r)],
                          "recorded_spec_keys_differing": recorded_only, "common_date": common,
                          "periods_per_year": ppy,
                          "units": output.MACHINE_UNITS, "premia": premia, "parameters": changes,
                          "caution": output.CAUTION})
        return
    if as_csv:
        output.emit_csv(changes)
        return
    facts = [("kind", "kind"), ("label", "label"), ("as of", "as_of"), ("dataset", "dataset_hash"),
             ("status", "status"), ("log-likelihood", "loglik"), ("AIC", "aic"), ("BIC", "bic"),
             ("parameters", "n_params"), ("iterations", "iterations")]
    rows = []
    for title, key in facts:
        a, b = runs_[0][key], runs_[1][key]
        if key == "as_of":
            a, b = output.day(a), output.day(b)
        elif key == "dataset_hash":
            a, b = output.short_hash(a), output.short_hash(b)
        elif key in ("loglik", "aic", "bic"):
            a, b = output.num(a), output.num(b)
        rows.append((title, a if a is not None else "-", b if b is not None else "-"))
    output.show(output.table(f"Run {run_a} vs run {run_b}", ["", f"run {run_a}", f"run {run_b}"], rows))
    if settings:
        output.show(output.table("Settings that differ (as resolved on each run's data)",
                                 ["setting", f"run {run_a}", f"run {run_b}"],
                                 [(r["setting"], r["run_a"], r["run_b"]) for r in settings], right_from=3))
    else:
        output.line("settings that differ: none" + (f" (recorded differently but the same model: "
                                                    f"{', '.join(recorded_only)})" if recorded_only else ""))
    if ppy[0] != ppy[1]:
        output.line(f"note: the runs have different periods a year ({ppy[0]} and {ppy[1]})")
    bayesian = [r["id"] for r in runs_ if is_bayes(r)]
    if bayesian:
        output.line(f"note: run {' and '.join(map(str, bayesian))} {'is' if len(bayesian) == 1 else 'are'} "
                    "Bayesian: premia and parameters below are posterior means, the log-likelihood, AIC "
                    "and BIC are at the posterior-mean parameters (not a basis for model choice)")
    labels = _stale_labels(premia, runs_)
    rows = []
    for r, label in zip(premia.itertuples(index=False), labels):
        fa, fb = r.filtered_mean_a, r.filtered_mean_b
        sa, sb = r.smoothed_mean_a_at_common, r.smoothed_mean_b_at_common
        pa = None if fa is None else float(output.premium_pct(fa, ppy[0]))
        pb = None if fb is None else float(output.premium_pct(fb, ppy[1]))
        ca = None if sa is None else float(output.premium_pct(sa, ppy[0]))
        cb = None if sb is None else float(output.premium_pct(sb, ppy[1]))
        rows.append((label, output.num(pa), output.num(pb),
                     "-" if pa is None or pb is None else output.num(pb - pa),
                     output.num(ca), output.num(cb), "-" if ca is None or cb is None else output.num(cb - ca)))
    d = output.day(common)
    output.show(output.table(
        "Premia, annualised %: filtered at each run's as-of, smoothed at the common date " + d,
        ["asset", f"run {run_a} filtered", f"run {run_b} filtered", "change (pp)",
         f"run {run_a} smoothed {d}", f"run {run_b} smoothed {d}", "change (pp)"], rows,
        caption=STALE_CAPTION if labels != list(premia["asset"]) else None))
    summary = [_param_summary(changes, "a", ppy[0]), _param_summary(changes, "b", ppy[1])]
    found = {k for s in summary for entry in s.values() for k in entry}
    keys = sorted(k for k in found if k.startswith("loading"))
    keys += [k for k in ("own premium vol", "premium vol", "return-shock vol") if k in found]
    rows = []
    for a in assets:
        cells = [a]
        for key in keys:
            cells += [output.num(summary[0].get(a, {}).get(key)), output.num(summary[1].get(a, {}).get(key))]
        rows.append(cells)
    headers = ["asset"] + [f"{key} {side}" for key in keys for side in ("A", "B")]
    output.show(output.table(f"Parameters, % a year (A = run {run_a}, B = run {run_b}; all raw values: "
                             "--json or --csv)", headers, rows, caption=units.CONVENTION_NOTE))
    output.caution()


#: Caption of the premia table when an asset is marked by :func:`_stale_labels`.
STALE_CAPTION = ("'to DATE' marks an asset's last return before a run's as-of date (both runs' dates, "
                 "in run order, where they differ; it has left, or its latest returns are late or "
                 "missing): from then on that run's premium is the model's prediction, not an "
                 "estimate from newer returns.")


def _stale_labels(premia, runs_) -> list[str]:
    """Each asset of ``premia`` (the diff's rows, with ``last_return_a``/``_b``) with its last
    return in each run where that precedes the run's as-of: ``Bolt (to 2019-02-28)``, or ``Bolt (to
    2020-11-30; 2021-08-31)`` when the two runs' differ."""
    import pandas as pd

    out = []
    for r in premia.itertuples(index=False):
        marks = []
        for seen, run in zip((r.last_return_a, r.last_return_b), runs_):
            if seen is not None and not pd.isna(seen) and pd.Timestamp(seen) < pd.Timestamp(run["as_of"]):
                day = output.day(seen)
                marks += [day] if day not in marks else []
        out.append(f"{r.asset} (to {'; '.join(marks)})" if marks else r.asset)
    return out
