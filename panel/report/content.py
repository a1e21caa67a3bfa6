"""What a run report says, gathered from the store (no HTML, no printing, no SQL).

:func:`gather` reads one stored run through :mod:`panel.store` and :mod:`panel.vintages.reproduce`
and returns a :class:`ReportContent`: the run record, its data and settings, the stored tables, the
joint cross-section at the as-of date (re-filtered at the stored parameters), and -- where the
dataset has other vintages of the same model -- how the estimates moved across them.  All numbers
stay per-period decimals; :mod:`panel.report.page` annualises them for reading through
:mod:`panel.units`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from panel import units
from panel.data import Panel
from panel.model.result import CrossSection
from panel.model.spec import ModelSpec

#: At most this many assets get a premium-paths panel and a revisions line.
MAX_CHARTED = 12
#: At most this many assets get the pairwise P(i > j) table.
MAX_PAIRS = 12

#: The estimator's stop reasons in plain words: (headline, what it means for the reader).
STATUS_WORDS = {
    "converged": ("Converged", "The estimation reached a maximum of the likelihood (objective) within "
                  "its tolerance, with no variance at a bound."),
    "boundary": ("Converged on a boundary", "The maximum lies where some variances are zero or at their "
                 "cap (named in the message). The estimates are valid under that restriction: those "
                 "premia are treated as constant or capped, and their parameters have no standard "
                 "error. Consider a premium prior or a fixed volatility."),
    "max_iter": ("Stopped early: iteration limit", "The estimation used all its iterations before "
                 "converging; the estimates may still move with more iterations (raise --max-iter)."),
    "time_budget": ("Stopped early: time budget", "The estimation ran out of its time budget before "
                    "converging; the estimates may still move (raise --time-budget)."),
    "stalled": ("Stopped: no further improvement found", "The optimiser could not find a higher "
                "likelihood from the last point; usually close to the maximum, but not certified."),
    "fixed": ("Parameters fixed, not estimated", "All parameters were given; the filter and smoother "
              "ran at them, so nothing was estimated."),
    "mixed": ("Bayesian: the chains mixed", "Every monitored parameter has split R-hat below 1.01 and "
              "effective sample sizes above 400 (common practice): the posterior summaries, bands "
              "(5% and 95% posterior quantiles) and probabilities can be read. Parameters shown are "
              "posterior means."),
    "not mixed": ("Bayesian: the chains have NOT mixed", "Some parameter's chains disagree or are too "
                  "short (named in the message): the bands and probabilities may be wrong. Run more "
                  "draws (--draws) or a longer warm-up (--warmup)."),
}


@dataclass(frozen=True, eq=False)
class ReportContent:
    """Everything one run's report shows (per-period decimal units).

    ``run``: the ``runs`` row; ``dataset``: the dataset's current name(s) ('' if none); ``panel``:
    the data the run was estimated from; ``spec``/``settings``: the model; ``params``: the stored
    estimates (``Params``); ``tables``: the stored result tables; ``cross_section``: the joint
    posterior of the premia at the as-of date; ``vintages``: ``run_id, as_of, kind, status, label``
    of the runs of the same dataset and model up to this run's cut-off (newest run per cut-off);
    ``revisions``: ``asset, as_of, run_id, filtered_mean, filtered_std, smoothed_mean,
    smoothed_std`` -- the charted assets' premium at ``revision_date`` in each of those vintages
    (empty with fewer than two vintages).
    """

    run: dict
    dataset: str
    panel: Panel
    spec: ModelSpec
    settings: dict
    params: object
    ppy: int
    tables: dict
    cross_section: CrossSection
    vintages: pd.DataFrame
    revision_date: pd.Timestamp | None
    revisions: pd.DataFrame

    @property
    def assets(self) -> tuple[str, ...]:
        return tuple(self.panel.assets)

    @property
    def charted(self) -> list[str]:
        """The assets drawn in the paths and revisions charts (the first :data:`MAX_CHARTED`)."""
        return list(self.assets[:MAX_CHARTED])

    @property
    def status_words(self) -> tuple[str, str]:
        status = str(self.run.get("status") or "")
        return STATUS_WORDS.get(status, (status or "unknown", "The run recorded no known stop reason."))


def gather(store, run_id: int) -> ReportContent:
    """Read stored run ``run_id`` and what the report needs around it (raises ``StoreError``,
    ``SpecError`` or ``BackfillError`` with one line)."""
    from panel.model.result import cross_section_at
    from panel.store import list_datasets, run_tables
    from panel.vintages.reproduce import (run_inputs, same_model_runs, stored_draws, stored_params,
                                          vintage_history)

    inputs = run_inputs(store, run_id)
    run = inputs.run
    tables = run_tables(store, run["id"])
    params = stored_params(store, inputs, tables)
    ppy = int(inputs.spec.periods_per_year or inputs.panel.periods_per_year)
    names = list_datasets(store)
    hit = names[names["hash"] == run["dataset_hash"]]
    dataset = "" if hit.empty else str(hit["current_names"].iloc[0] or hit["name"].iloc[0] or "")
    as_of = inputs.panel.dates[-1]
    # at the cut-off smoothed = filtered; a Bayesian run: the mixture over its stored draws
    cross_section = cross_section_at(inputs.panel, inputs.spec,
                                     stored_draws(store, inputs) or params, as_of, "smoothed")
    siblings = same_model_runs(store, run["id"])
    earlier = siblings[pd.to_datetime(siblings["as_of"]) < pd.Timestamp(run["as_of"])]
    this = pd.DataFrame([{k: run[k] for k in ("id", "as_of", "kind", "status", "label")}])
    vintages = pd.concat([earlier[list(this.columns)], this], ignore_index=True)
    vintages = vintages.rename(columns={"id": "run_id"})
    revision_date, revisions = None, pd.DataFrame(
        columns=["asset", "as_of", "run_id", "filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std"])
    if len(vintages) >= 2:
        revision_date = pd.Timestamp(vintages["as_of"].iloc[0])
        frames = []
        for asset in list(inputs.panel.assets)[:MAX_CHARTED]:
            history = vintage_history(store, run["id"], asset, revision_date, runs=list(vintages["run_id"]))
            frames.append(history.assign(asset=asset))
        revisions = pd.concat(frames, ignore_index=True)[list(revisions.columns)]
    return ReportContent(run=run, dataset=dataset, panel=inputs.panel, spec=inputs.spec,
                         settings=dict(run.get("settings") or {}), params=params, ppy=ppy, tables=tables,
                         cross_section=cross_section, vintages=vintages, revision_date=revision_date,
                         revisions=revisions)


def revision_summary(content: ReportContent) -> pd.DataFrame:
    """Per charted asset: the first release at ``revision_date`` (filtered, first vintage), this
    run's smoothed estimate there, and the revision between them (per period).  Empty without
    vintages."""
    columns = ["asset", "first_release", "latest", "revision", "n_vintages"]
    if content.revisions.empty:
        return pd.DataFrame(columns=columns)
    rows = []
    for asset, frame in content.revisions.groupby("asset", sort=False):
        frame = frame.sort_values("as_of", kind="stable")
        first, last = float(frame["filtered_mean"].iloc[0]), float(frame["smoothed_mean"].iloc[-1])
        rows.append((asset, first, last, last - first, len(frame)))
    return pd.DataFrame(rows, columns=columns)


def setting_lines(spec: ModelSpec, settings: dict, params, ppy: int) -> list[tuple[str, str]]:
    """The model settings in words, volatilities in % a year in today's convention
    (:data:`panel.units.YEARLY_CHANGE`); a setting stored in the legacy convention says so."""
    k = params.Lambda.shape[1]
    if params.B is not None:
        r = params.B.shape[1]
        shocks = f"factor ({r} return factor{'s' if r > 1 else ''})"
    else:
        shocks = "diagonal" if params.psi is not None else "full"
    lines = [("premium factors", f"{k}" + (" (independent local levels)" if k == 0 else "")),
             ("return shocks", shocks)]
    if spec.vol_scale is not None:
        vs = spec.vol_scale
        lines.append(("vol scale", f"ewma, half-life {vs.half_life:g} periods" if vs.kind == "ewma"
                      else f"{vs.kind} series"))

    def premium_vol(value):
        shown = units.convert_premium_vol(value, ppy, spec.premium_vol_convention)
        note = "" if spec.premium_vol_convention == units.YEARLY_CHANGE else \
            f" (stored as {100 * value:g} in the legacy sqrt(q x ppy) convention)"
        return f"{100 * shown:.4g}% a year{note}"

    for key, value in spec.fixed:
        lines.append((f"fixed {key}", premium_vol(value) if key.startswith("own_premium_vol")
                      else f"{100 * value:g}% a year"))
    if spec.max_premium_vol is not None:
        kept = "" if spec.cap_method == "box" else " (kept by projection alone: runs stored before the boxed finish)"
        lines.append(("max premium vol", premium_vol(spec.max_premium_vol) + kept))
    if spec.premium_prior is not None:
        lines.append(("premium prior", f"{premium_vol(spec.premium_prior.vol)}, weight "
                      f"{spec.premium_prior.weight:g} periods"))
    if spec.return_prior is not None:
        lines.append(("return prior", f"{100 * spec.return_prior.vol:g}% a year, weight "
                      f"{spec.return_prior.weight:g} periods"))
    lines.append(("initial premium", "diffuse (exact)" if spec.initial_premium is None else
                  f"{100 * spec.initial_premium.mean:g}% +- {100 * spec.initial_premium.vol:g}% a year"))
    lines.append(("window", str(settings.get("window", "expanding"))))
    lines.append(("start", "warm (recorded parameters)" if settings.get("start") else "default rule"))
    budget = "" if spec.time_budget is None else f", time budget {spec.time_budget:g} s"
    if spec.bayes:
        warmup = spec.draws if spec.warmup is None else spec.warmup
        priors = spec.prior_settings()
        lines.append(("estimation", f"Bayesian (Gibbs), {spec.chains} chains x {spec.draws} draws after "
                                    f"{warmup} warm-up, seed {spec.seed} (sampler seed "
                                    f"{settings.get('sampler_seed', '?')}), summaries over "
                                    f"{spec.summary_draws} draws, path {spec.method}, gaps "
                                    + ("drawn by the sampler" if spec.augment_gaps else "integrated out")))
        lines.append(("priors", f"own premium vol {priors['premium_vol_family']} scale "
                                f"{100 * priors['premium_vol']:g}% a year, loading scale "
                                f"{100 * priors['loading_vol']:g}% a year, return vol "
                                + ("from the data" if priors["return_vol"] is None
                                   else f"{100 * priors['return_vol']:g}% a year")))
        return lines
    finish = ("" if spec.acceleration != "quasi-newton" else ", legacy finish"
              if spec.loglik_tol is None else f", finish to {spec.loglik_tol:g} log-lik ({spec.stopping}"
              f"{_GAPS_ROUTE[spec.finish]}"
              f"{'' if spec.finish == 'direct' or spec.filled_warm else ', each correction restarted'}"
              f"{'' if spec.score_form == 'disturbance' else ', score from the moments'})")
    lines.append(("estimation", f"{spec.acceleration} EM, at most {spec.max_iter} E-steps{budget}, tol "
                                f"{spec.tol:g}/{spec.param_tol:g}{finish}, {spec.starts} start(s), std "
                                f"errors {spec.std_errors}, path {spec.method}"))
    return lines


#: How the settings line names ``ModelSpec.finish`` (panel.model.surrogate).
_GAPS_ROUTE = {"direct": "", "auto": ", gaps: on a filled copy where cheaper", "filled": ", gaps: on a filled copy"}


def parameter_rows(content: ReportContent) -> pd.DataFrame:
    """Per asset, annualised (decimal a year): loadings (premium-volatility units), own and total
    premium volatility, return-shock volatility, and the Ljung-Box p-value."""
    p, ppy = content.params, content.ppy
    diag = content.tables["diagnostics"]
    pvalues = {r.asset: r.pvalue for r in diag.itertuples(index=False) if r.statistic == "ljung_box"}
    frame = pd.DataFrame({"asset": list(content.assets)})
    for j in range(p.Lambda.shape[1]):
        frame[f"loading f{j + 1}"] = units.premium_loading(p.Lambda[:, j], ppy)
    frame["own premium vol"] = units.premium_vol(p.q, ppy)
    frame["premium vol"] = units.premium_vol(np.diag(p.Sigma), ppy)
    frame["return-shock vol"] = units.return_vol(np.diag(p.H), ppy)
    frame["Ljung-Box p"] = [pvalues.get(a, np.nan) for a in content.assets]
    return frame
