"""Recording a fit as a run, rebuilding a stored run, and reproducing it number by number.

Workflow library (no printing, no SQL).  A run's settings are what :func:`run_settings` records:
``fit.settings()`` (``spec``, ``start``, ``as_of``) with the full dataset's hash, the estimation
window (``expanding``) and where the data came from (``source``) -- the same layout as a backfill
vintage (:mod:`panel.vintages.backfill`), so one rebuild serves both.

- :func:`record_fit` / :func:`store_fit`: a ``PanelFit`` -> a stored run (one transaction).
- :func:`evaluated_run`: the stored run's filter and smoother re-run at its stored parameters (no
  estimation) -- a ``PanelFit`` for cross-sections and plots; :func:`stored_cross_section` computes
  one date's cross-section only.
- :func:`reproduce`: re-estimate the run from the stored dataset snapshot and recorded settings,
  then compare every stored number table by table (:class:`Reproduction`).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from panel.data import Panel
from panel.model.result import PanelFit
from panel.model.spec import ModelSpec
from panel.store import (RESULT_ORDER, Store, StoreError, from_fit, get_run, run_environment, run_tables,
                         write_run)

#: Result tables compared by :func:`reproduce`, keyed as ``run_tables`` returns them, with their keys
#: (the store's natural row order of each table).
TABLE_KEYS = RESULT_ORDER
#: Columns that measure time, not results: never compared.
TIMING_COLUMNS = ("elapsed_s",)
#: Scalar fit statistics of a run compared by :func:`reproduce`.
SCALARS = ("loglik", "aic", "bic", "n_params", "iterations", "converged", "status")
#: The environment columns of a run reported beside the numbers.
ENVIRONMENT = ("riskprem_version", "git_commit", "python_version", "numpy_version", "scipy_version",
               "pandas_version", "duckdb_version", "platform")


def _utc_now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


# ---------------------------------------------------------------------------------------------
# recording

def run_settings(result: PanelFit, dataset_hash: str, source: dict | None = None) -> dict:
    """The settings recorded with a fit of (a cut of) the dataset ``dataset_hash``."""
    settings = {**result.settings(), "dataset_hash": dataset_hash, "window": "expanding"}
    if source:
        settings["source"] = dict(source)
    return settings


def record_fit(result: PanelFit, dataset_hash: str, *, kind: str = "fit", label: str | None = None,
               source: dict | None = None, parent_run: int | None = None,
               started_utc: datetime | None = None) -> tuple[dict, dict]:
    """``(run, tables)`` for :func:`panel.store.write_run` (versions and platform are filled in by the
    store from this process)."""
    return from_fit(result, dataset_hash=dataset_hash, as_of=result.dates[-1].date(), kind=kind,
                    label=label, settings=run_settings(result, dataset_hash, source),
                    parent_run=parent_run, started_utc=started_utc)


def store_fit(store: Store, result: PanelFit, dataset_hash: str, **record) -> int:
    """Write ``result`` as one run (one transaction); returns the run id.  ``record``: see
    :func:`record_fit`."""
    run, tables = record_fit(result, dataset_hash, **record)
    return write_run(store, run, tables)


# ---------------------------------------------------------------------------------------------
# rebuilding

@dataclass(frozen=True, eq=False)
class RunInputs:
    """What a stored run was estimated from: its ``runs`` row, the data (the dataset cut at ``as_of``
    with the recorded window), the spec and the start parameters (None = the default start)."""

    run: dict
    panel: Panel
    spec: ModelSpec
    start: object


def run_inputs(store: Store, run_id: int) -> RunInputs:
    """Rebuild the inputs of stored run ``run_id`` from the store (raises ``StoreError``/``SpecError``
    or ``BackfillError`` with one line)."""
    from panel.vintages.inputs import vintage_inputs

    run = get_run(store, run_id)
    data, spec, start = vintage_inputs(store, run["id"])
    return RunInputs(run=run, panel=data, spec=spec, start=start)


def stored_params(store: Store, inputs: RunInputs, tables: dict | None = None):
    """The run's estimated parameters (``Params``) from its stored parameter table."""
    from panel.vintages.starts import start_from_parameters

    tables = tables if tables is not None else run_tables(store, inputs.run["id"], kinds=("parameters",))
    params = start_from_parameters(tables["parameters"], inputs.panel.assets)
    if params is None:
        raise StoreError(f"run {inputs.run['id']} has no complete parameter table for its assets; "
                         "it cannot be evaluated (reproduce it, or fit again)")
    return params


def stored_draws(store: Store, inputs: RunInputs) -> list | None:
    """A Bayesian run's summary parameter draws (list of Params) from the store; None for ML."""
    if not inputs.spec.bayes:
        return None
    from panel.bayes.estimate import draws_from_rows
    from panel.model.problem import Problem

    rows = run_tables(store, inputs.run["id"], kinds=("posterior_draws",))["posterior_draws"]
    if len(rows) == 0:
        raise StoreError(f"run {inputs.run['id']} is a Bayesian run without its posterior draws; "
                         "reproduce it with --save to store them")
    return draws_from_rows(rows, inputs.panel.assets, Problem(inputs.panel, inputs.spec).rs.structure)


def evaluated_run(store: Store, run_id: int) -> PanelFit:
    """The stored run filtered and smoothed again at its stored parameters (no estimation): the
    same estimates, plus what is not stored (joint cross-sections at any date).  A Bayesian run is
    evaluated at its posterior-mean parameters: use :func:`stored_cross_section` for its posterior
    cross-sections (the mixture over its stored draws)."""
    from panel.model.fit import evaluate, fit  # the estimator, only when estimating

    inputs = run_inputs(store, run_id)
    return evaluate(inputs.panel, stored_params(store, inputs), _ml(inputs.spec))


def _ml(spec: ModelSpec) -> ModelSpec:
    """The ML twin of a spec (evaluating at fixed parameters has no Bayesian settings)."""
    import dataclasses

    from panel.model.spec import BAYES_DEFAULTS

    return dataclasses.replace(spec, estimation="ml", **BAYES_DEFAULTS) if spec.bayes else spec


def stored_cross_section(store: Store, run_id: int, date=None, kind: str = "smoothed"):
    """``(cross_section, inputs)``: the joint posterior of stored run ``run_id``'s premia at
    ``date`` (default its as-of), at its stored parameters -- the same numbers as
    ``evaluated_run(...).cross_section(date, kind)`` without re-running the whole report."""
    from panel.model.result import cross_section_at

    inputs = run_inputs(store, run_id)
    when = inputs.panel.dates[-1] if date is None else date
    params = stored_draws(store, inputs) or stored_params(store, inputs)
    return cross_section_at(inputs.panel, inputs.spec, params, when, kind), inputs


# ---------------------------------------------------------------------------------------------
# reproducing

@dataclass(frozen=True)
class TableDiff:
    """How one stored table compares with its rebuild.

    ``values``: numbers compared; ``max_abs``/``max_rel``: largest absolute and relative difference
    (relative to the larger magnitude; inf where only one side is missing); ``where``: the
    column and row of the largest relative difference; ``ok``: every number within tolerance and the
    same rows and text cells; ``note``: why not, in words.
    """

    table: str
    rows_recorded: int
    rows_rebuilt: int
    values: int
    max_abs: float
    max_rel: float
    where: str
    ok: bool
    note: str = ""


@dataclass(frozen=True)
class EnvironmentDiff:
    field: str
    recorded: str | None
    current: str | None

    @property
    def same(self) -> bool:
        return self.recorded == self.current


@dataclass(frozen=True, eq=False)
class Reproduction:
    """The outcome of :func:`reproduce`: per-table differences, environment recorded vs now, the
    rebuilt fit, and the id of the saved reproduction (None unless saved)."""

    run_id: int
    rtol: float
    atol: float
    tables: list[TableDiff]
    environment: list[EnvironmentDiff]
    result: PanelFit
    seconds: float
    saved_run: int | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return all(t.ok for t in self.tables)


def _normalise(frame: pd.DataFrame, keys) -> pd.DataFrame:
    out = frame.copy()
    for key in keys:
        if key == "date":
            out[key] = pd.to_datetime(out[key]).astype("datetime64[ns]")
        elif out[key].dtype == object or pd.api.types.is_string_dtype(out[key]):
            out[key] = out[key].where(out[key].notna(), "").astype(str)
        else:
            out[key] = pd.to_numeric(out[key]).astype("int64")
    return out.sort_values(list(keys), kind="stable").reset_index(drop=True)


def _close(a: np.ndarray, b: np.ndarray, rtol: float, atol: float):
    """(|a-b|, relative difference, within tolerance) elementwise; NaN equal to NaN."""
    both = np.isnan(a) & np.isnan(b)
    one = np.isnan(a) ^ np.isnan(b)
    with np.errstate(invalid="ignore"):
        diff = np.abs(a - b)
        scale = np.maximum(np.abs(a), np.abs(b))
        rel = np.where(scale > 0, diff / np.where(scale > 0, scale, 1.0), 0.0)
    diff = np.where(both, 0.0, np.where(one, np.inf, diff))
    rel = np.where(both, 0.0, np.where(one, np.inf, rel))
    ok = diff <= atol + rtol * np.where(np.isfinite(scale), scale, 0.0)
    return diff, rel, ok | both


def compare_table(name: str, recorded: pd.DataFrame, rebuilt: pd.DataFrame, rtol: float,
                  atol: float) -> TableDiff:
    """Compare one result table, row by row on its keys (:data:`TABLE_KEYS`)."""
    keys = TABLE_KEYS[name]
    a = _normalise(recorded, keys)
    b = _normalise(rebuilt[list(recorded.columns)] if set(recorded.columns) <= set(rebuilt.columns)
                   else rebuilt, keys)
    rows_a, rows_b = len(a), len(b)
    same_keys = rows_a == 0 or a[list(keys)].equals(b[list(keys)])   # empty frames: dtypes may differ
    if rows_a != rows_b or not same_keys:
        return TableDiff(name, rows_a, rows_b, 0, np.inf, np.inf, "", False,
                         f"rows differ ({rows_a} recorded, {rows_b} rebuilt)")
    numeric = [c for c in a.columns if c not in keys and c not in TIMING_COLUMNS
               and pd.api.types.is_numeric_dtype(a[c]) and not pd.api.types.is_bool_dtype(a[c])]
    text = [c for c in a.columns if c not in keys and c not in numeric and c not in TIMING_COLUMNS]
    mismatched = [c for c in text if not a[c].fillna("").astype(str).equals(b[c].fillna("").astype(str))]
    max_abs, max_rel, where, count, ok = 0.0, 0.0, "", 0, True
    for column in numeric:
        x = a[column].to_numpy(dtype=float)
        y = pd.to_numeric(b[column], errors="coerce").to_numpy(dtype=float)
        diff, rel, within = _close(x, y, rtol, atol)
        count += len(x)
        ok &= bool(within.all())
        if len(x):
            max_abs = max(max_abs, float(diff.max()))
            i = int(np.argmax(rel))
            if rel[i] > max_rel or not where:
                max_rel = max(max_rel, float(rel[i]))
                where = f"{column} at " + ", ".join(f"{k}={_cell(a[k].iloc[i])}" for k in keys)
    note = f"text differs in {', '.join(mismatched)}" if mismatched else ""
    return TableDiff(name, rows_a, rows_b, count, max_abs, max_rel, where if max_rel > 0 else "",
                     ok and not mismatched, note)


def _cell(value) -> str:
    if isinstance(value, pd.Timestamp):
        return str(value.date())
    return str(value)


def compare_scalars(run: dict, result: PanelFit, rtol: float, atol: float) -> TableDiff:
    """The run's scalar fit statistics (:data:`SCALARS`) against the rebuild's."""
    now = {"loglik": result.loglik, "aic": result.aic, "bic": result.bic, "n_params": result.n_params,
           "iterations": result.n_iter, "converged": result.converged, "status": result.status}
    max_abs, max_rel, where, ok, notes = 0.0, 0.0, "", True, []
    for key in SCALARS:
        old, new = run.get(key), now[key]
        if key in ("converged", "status"):
            if (None if old is None else (bool(old) if key == "converged" else str(old))) != new:
                ok = False
                notes.append(f"{key} {old} recorded, {new} rebuilt")
            continue
        diff, rel, within = _close(np.array([np.nan if old is None else float(old)]),
                                   np.array([float(new)]), rtol, atol)
        ok &= bool(within[0])
        if rel[0] > max_rel or (not where and diff[0] > 0):
            max_rel, where = float(rel[0]), key
        max_abs = max(max_abs, float(diff[0]))
    return TableDiff("fit statistics", 1, 1, len(SCALARS) - 2, max_abs, max_rel, where, ok, "; ".join(notes))


def environment_diff(run: dict) -> list[EnvironmentDiff]:
    """The run's recorded environment beside this process's."""
    now = run_environment()
    return [EnvironmentDiff(k, None if run.get(k) is None else str(run.get(k)),
                            None if now.get(k) is None else str(now.get(k))) for k in ENVIRONMENT]


def reproduce(store: Store, run_id: int, *, rtol: float = 1e-10, atol: float = 0.0,
              save: bool = False) -> Reproduction:
    """Re-estimate stored run ``run_id`` from the stored dataset snapshot and its recorded settings
    (spec, start parameters, cut-off, window) and compare every stored number.

    A number passes when ``|recorded - rebuilt| <= atol + rtol * max(|recorded|, |rebuilt|)``; timing
    columns are not compared.  With ``save`` the rebuild is stored as a new run of kind
    ``reproduce`` whose ``parent_run`` is ``run_id`` (the store must be open read-write); otherwise
    nothing is written.
    """
    from panel.model.fit import evaluate, fit  # the estimator, only when estimating

    if not (rtol >= 0 and atol >= 0):
        raise ValueError(f"tolerances must be >= 0, got rtol={rtol}, atol={atol}")
    if save:
        store.require_writable("save the reproduction")
    t0 = time.perf_counter()
    inputs = run_inputs(store, run_id)
    recorded = run_tables(store, inputs.run["id"])
    started = _utc_now()
    result = fit(inputs.panel, inputs.spec, start=inputs.start)
    rebuilt = {"estimates": result.estimates, "factors": result.factors, "parameters": result.parameters,
               "trace": result.trace, "diagnostics": result.diagnostics}
    if result.posterior is not None:
        rebuilt["posterior_draws"] = result.posterior.draw_rows()
    diffs = [compare_scalars(inputs.run, result, rtol, atol)]
    for name in TABLE_KEYS:
        if name not in rebuilt and name not in recorded:
            continue        # an ML run has no posterior draws
        diffs.append(compare_table(name, recorded[name], rebuilt.get(name, recorded[name].iloc[:0]),
                                   rtol, atol))
    saved = None
    if save:
        run, tables = from_fit(result, dataset_hash=inputs.run["dataset_hash"], as_of=inputs.run["as_of"],
                               kind="reproduce", label=f"reproduction of run {inputs.run['id']}",
                               settings=dict(inputs.run["settings"]), parent_run=inputs.run["id"],
                               started_utc=started)
        saved = write_run(store, run, tables)
    return Reproduction(run_id=int(inputs.run["id"]), rtol=rtol, atol=atol, tables=diffs,
                        environment=environment_diff(inputs.run), result=result,
                        seconds=time.perf_counter() - t0, saved_run=saved)


# ---------------------------------------------------------------------------------------------
# vintages of a run

def same_model_runs(store: Store, run_id: int) -> pd.DataFrame:
    """The vintages of run ``run_id``'s model: the finished runs of its dataset with the same recorded
    spec, the newest run per cut-off, oldest cut-off first (``list_runs`` columns)."""
    from panel.store import list_runs

    run = get_run(store, run_id)
    spec = (run["settings"] or {}).get("spec")
    runs = list_runs(store, run["dataset_hash"])
    model = np.array([(s or {}).get("spec") == spec for s in runs["settings"]], dtype=bool)
    same = runs[model & (runs["status"] != "failed").to_numpy()]
    same = same.sort_values(["as_of", "id"], kind="stable").drop_duplicates("as_of", keep="last")
    return same.reset_index(drop=True)


def vintage_history(store: Store, run_id: int, asset: str, date, runs=None) -> pd.DataFrame:
    """One asset's premium at ``date`` in every stored vintage of the same model as run ``run_id``
    (same dataset and recorded spec; the newest run per cut-off), oldest cut-off first.  ``runs``:
    the vintages' run ids instead (one per cut-off), e.g. a report's own choice.

    Columns: ``as_of, run_id, kind, filtered_mean, filtered_std, smoothed_mean, smoothed_std,
    smoothed_q05, smoothed_q95, revision`` (the ``revision_history`` query; per-period decimals;
    the quantiles are a Bayesian vintage's, NaN for maximum likelihood).
    """
    from panel.store import run_query

    run = get_run(store, run_id)
    same = [int(i) for i in (same_model_runs(store, run_id)["id"] if runs is None else runs)]
    history = run_query(store, "revision_history", {"dataset": run["dataset_hash"], "asset": asset,
                                                    "date": str(pd.Timestamp(date).date())})
    history = history[history["run_id"].isin(same)]
    history = history.sort_values(["as_of", "run_id"], kind="stable").drop_duplicates("as_of", keep="last")
    return history.reset_index(drop=True)
