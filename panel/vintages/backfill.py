"""Vintage backfill: re-estimate the model at each past cut-off and store one vintage per cut-off.

Workflow library: no printing, no SQL (the store's API does the reading and writing).

A vintage at cut-off ``as_of`` is a full re-estimation (parameters included: pseudo real-time) on
the data up to ``as_of`` (``expanding`` window) or on its last ``M`` periods (``rolling:M``), stored
as a run of kind ``backfill`` whose ``dataset_hash`` is the full dataset's and whose settings are
``{"spec", "start", "dataset_hash", "as_of", "window"}``.  All vintages of one backfill share the
store's backfill key (dataset hash and settings without ``as_of`` and ``start``), so a backfill that
is run again skips the cut-offs it finds (idempotent) and an interrupted one resumes where it stopped.

Warm starts and parallel workers (the *chain* scheme)
-----------------------------------------------------
The cut-off grid (the dataset's dates from ``start`` to ``end``, every ``every``-th counted from the
first) is cut into contiguous chains of ``chain`` cut-offs (grid positions ``0..chain-1``,
``chain..2*chain-1``, ...).  Within a chain each vintage starts from the parameters estimated at the
previous cut-off (``parent_run`` = that run); the first vintage of a chain starts cold (the
moment-based rule).  A vintage whose asset set differs from its predecessor's (an asset entered or
left) is still warm: incumbents keep the predecessor's parameters, entrants get the moment-based
values computed on the vintage's data, assets that left are dropped (cross terms from the loadings;
a full ``H`` starts block-diagonal); it starts cold only when it shares no asset with its
predecessor or the spec resolves to another model at its asset count (see
:mod:`panel.vintages.starts`).  Chains are independent and run in parallel.  Chain boundaries
depend on the grid only, never on the number of workers or on the scheduler, so a backfill stores
the same vintages whether it runs in-process, on a local process pool or on a Dask cluster.  On
resume, a vintage whose predecessor is already stored starts from that run's stored parameters: the
float64 values an uninterrupted backfill passes on (in-session warm starts, merged ones included, go
through the same parameter table), so interrupting and resuming does not change the result.
``warm_start=False`` starts every vintage cold.  The starting values a vintage used are recorded in
its settings (``start``), which is all :func:`panel.vintages.inputs.rebuild_vintage` needs to rebuild it
exactly.

Only the coordinating process writes the store (DuckDB has one writer): workers receive the vintage's
:class:`~panel.data.Panel`, the :class:`~panel.model.spec.ModelSpec` and the start parameters and
return the :class:`~panel.model.result.PanelFit`.  Each vintage is written in one transaction as soon
as it arrives; an interrupt (Ctrl-C, or a progress callback raising ``KeyboardInterrupt``) keeps every
finished vintage and leaves no partial run.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Callable

import numpy as np
import pandas as pd

from panel.data import Panel
from panel.model.fit import check_estimable, fit
from panel.model.params import Params
from panel.model.result import PanelFit
from panel.model.spec import ModelSpec, SpecError
from panel.vintages.starts import start_for_vintage, start_from_parameters  # noqa: F401 (re-exported)
from panel.vintages.errors import BackfillError
from panel.vintages.inputs import (Window, parse_date, rebuild_vintage, vintage_inputs,  # noqa: F401 (re-exported)
                                   vintage_panel)
from panel.vintages.pools import default_workers, open_pool  # noqa: F401 (re-exported)
from panel.store import (Store, backfill_key, find_run, from_fit, get_run, json_ready, load_panel,
                         resolve_dataset, run_environment, run_query, run_tables, write_run)

#: ``runs.kind`` of a backfill vintage.
KIND = "backfill"
#: Cut-offs per warm-start chain by default (a year of monthly cut-offs).
DEFAULT_CHAIN = 12


class BackfillInterrupted(KeyboardInterrupt):
    """Ctrl-C, or a progress callback raising ``KeyboardInterrupt``, stopped a backfill.

    ``report`` (a :class:`BackfillReport`) lists the vintages stored before the stop; every one of
    them is complete, and nothing else was written.
    """

    def __init__(self, report: "BackfillReport"):
        super().__init__(f"backfill interrupted after {len(report.written)} vintage(s)")
        self.report = report


# ---------------------------------------------------------------------------------------------
# windows, cut-offs, settings

def cutoff_dates(panel: Panel, start=None, end=None, every: int = 1) -> pd.DatetimeIndex:
    """The dataset's dates from ``start`` to ``end`` (inclusive; None = first / last date), every
    ``every``-th counted from the first one in range."""
    if not isinstance(every, (int, np.integer)) or isinstance(every, bool) or every < 1:
        raise BackfillError(f"every must be a whole number >= 1, got {every!r}")
    lo = panel.dates[0] if start is None else parse_date(start, "start")
    hi = panel.dates[-1] if end is None else parse_date(end, "end")
    if lo > hi and end is None:
        raise BackfillError(f"start {lo.date()} is after the dataset's last date {hi.date()}; give an "
                            "earlier start")
    if lo > hi:
        raise BackfillError(f"start {lo.date()} is after end {hi.date()}; swap them")
    dates = panel.dates[(panel.dates >= lo) & (panel.dates <= hi)][::int(every)]
    if len(dates) == 0:
        raise BackfillError(f"no dates of the dataset between {lo.date()} and {hi.date()} (it runs from "
                            f"{panel.dates[0].date()} to {panel.dates[-1].date()}); give dates inside it")
    return dates


def vintage_settings(fitted: PanelFit, dataset_hash: str, window, chain: int | None = None) -> dict:
    """A vintage's run settings: ``fitted.settings()`` (spec, start, as_of) with the full dataset's
    hash, the window and the warm-start chain length (:func:`effective_chain`; None: a backfill
    stored before the chain was recorded)."""
    settings = {**fitted.settings(), "dataset_hash": dataset_hash, "window": Window.parse(window).text}
    return settings if chain is None else {**settings, "chain": int(chain)}


def effective_chain(chain: int, warm_start: bool = True) -> int:
    """The chain length that decides a backfill's starting values: every vintage starts cold without
    warm starts, as with chains of one."""
    return int(chain) if warm_start else 1


def settings_key(dataset_hash: str, spec: ModelSpec | None = None, window="expanding",
                 chain: int | None = None) -> str:
    """The backfill key shared by every vintage of a backfill of ``dataset_hash`` with these
    settings (what the store computes from a vintage's settings).  The chain is part of it: a
    backfill run again with another ``chain`` is another backfill, never a mix of both.
    ``chain=None`` gives the key of backfills stored before the chain was recorded."""
    settings = {"spec": (spec or ModelSpec()).to_dict(), "dataset_hash": dataset_hash,
                "window": Window.parse(window).text}
    if chain is not None:
        settings["chain"] = int(chain)
    return backfill_key(dataset_hash, json_ready(settings, "backfill settings"))


# ---------------------------------------------------------------------------------------------
# the plan

@dataclass(frozen=True)
class Vintage:
    """One cut-off of a backfill: its date, chain, grid position, and the stored run (if any)."""

    as_of: pd.Timestamp
    chain: int
    position: int
    stored: int | None


@dataclass(frozen=True, eq=False)
class BackfillPlan:
    """What a backfill will do; build it with :func:`plan_backfill` (which validates everything)."""

    panel: Panel
    dataset_hash: str
    spec: ModelSpec
    window: Window
    key: str
    warm_start: bool
    chain: int
    label: str | None
    vintages: tuple[Vintage, ...]
    #: Resuming a backfill stored before the chain was recorded: its key, and settings without it.
    legacy: bool = False

    @property
    def todo(self) -> tuple[Vintage, ...]:
        return tuple(v for v in self.vintages if v.stored is None)

    @property
    def skipped(self) -> tuple[Vintage, ...]:
        return tuple(v for v in self.vintages if v.stored is not None)

    def n_chains(self) -> int:
        """Chains with at least one vintage to fit."""
        return len({v.chain for v in self.todo})


def plan_backfill(store: Store, dataset: str, spec: ModelSpec | None = None, *, start=None, end=None,
                  every: int = 1, window="expanding", chain: int = DEFAULT_CHAIN, warm_start: bool = True,
                  label: str | None = None) -> BackfillPlan:
    """Validate a backfill of ``dataset`` (name or hash) and find the cut-offs already stored.

    Raises :class:`BackfillError`, :class:`~panel.model.spec.SpecError` or
    :class:`~panel.store.StoreError` (one line) before anything is fitted or written.
    """
    spec = spec or ModelSpec()
    if not isinstance(spec, ModelSpec):
        raise BackfillError(f"spec must be a ModelSpec, not {type(spec).__name__}")
    if not isinstance(chain, (int, np.integer)) or isinstance(chain, bool) or chain < 1:
        raise BackfillError(f"chain must be a whole number >= 1 of cut-offs, got {chain!r}")
    w = Window.parse(window)
    digest = resolve_dataset(store, dataset)
    panel = load_panel(store, digest)
    dates = cutoff_dates(panel, start, end, every)
    for i, as_of in enumerate(dates):
        problem = _refusal(panel, as_of, w, spec)
        if problem is None:
            continue
        # A start too early would fail on every retry: name the first cut-off that can be fitted.
        later = None if i else next((d for d in panel.dates[panel.dates > as_of]
                                     if _refusal(panel, d, w, spec) is None), None)
        if later is not None:
            raise BackfillError(f"at the first cut-off {as_of.date()}: {problem}; start the backfill at "
                                f"{later.date()} or later (--start), the first cut-off with enough data")
        raise SpecError(f"at cut-off {as_of.date()}: {problem}")
    every_chain = effective_chain(chain, warm_start)
    key = settings_key(digest, spec, w, every_chain)
    stored = [find_run(store, digest, key, d) for d in dates]
    legacy = False
    if not any(stored):
        # a backfill stored before the chain was recorded is resumed, not refitted, when its
        # vintages started as this chain length would have started them
        old_key = settings_key(digest, spec, w, None)
        old = [find_run(store, digest, old_key, d) for d in dates]
        if any(old) and _started_as_chained(store, old, every_chain):
            key, stored, legacy = old_key, old, True
    vintages = tuple(Vintage(as_of=d, chain=i // chain, position=i, stored=run)
                     for i, (d, run) in enumerate(zip(dates, stored)))
    return BackfillPlan(panel=panel, dataset_hash=digest, spec=spec, window=w, key=key,
                        warm_start=bool(warm_start), chain=int(chain), label=label, vintages=vintages,
                        legacy=legacy)


def _started_as_chained(store: Store, stored: list, chain: int) -> bool:
    """Whether the stored vintages (run id or None per grid position) started as chains of
    ``chain`` cut-offs start them: cold at each chain's first position and after a missing
    predecessor, otherwise warm from the run at the previous position."""
    for i, run_id in enumerate(stored):
        if run_id is None:
            continue
        parent = get_run(store, run_id)["parent_run"]
        warm = i % chain != 0 and i > 0 and stored[i - 1] is not None
        if (parent is None) == warm or (warm and int(parent) != stored[i - 1]):
            return False
    return True


def _refusal(panel: Panel, as_of: pd.Timestamp, window: Window, spec: ModelSpec) -> str | None:
    """Why a vintage at ``as_of`` could not be fitted (the fit's own up-front refusals), or None."""
    data = vintage_panel(panel, as_of, window)
    if not data.assets:
        return "no observation up to it"
    try:
        rs = spec.resolve(len(data.assets), data.periods_per_year, len(data.dates), data.assets)
        check_estimable(data.values.to_numpy(dtype=float), data.assets, rs)
    except SpecError as error:
        return str(error)
    return None


# ---------------------------------------------------------------------------------------------
# the work a worker does

@dataclass(frozen=True, eq=False)
class VintageTask:
    """What a worker receives: the vintage's data, the settings and the start values."""

    as_of: pd.Timestamp
    panel: Panel
    spec: ModelSpec
    start: Params | None


@dataclass(frozen=True, eq=False)
class VintageOutcome:
    """What a worker returns: the fit, when it ran (UTC) and where (the runs' environment columns)."""

    as_of: pd.Timestamp
    fit: PanelFit
    started_utc: datetime
    finished_utc: datetime
    environment: dict


def _utc_now() -> datetime:
    return datetime.now(timezone.utc).replace(tzinfo=None)


def fit_vintage(task: VintageTask) -> VintageOutcome:
    """Estimate one vintage (runs in a worker process, a Dask worker or in-process)."""
    started = _utc_now()
    fitted = fit(task.panel, task.spec, start=task.start)
    return VintageOutcome(as_of=task.as_of, fit=fitted, started_utc=started, finished_utc=_utc_now(),
                          environment=run_environment())


# ---------------------------------------------------------------------------------------------
# running a plan

@dataclass(frozen=True)
class BackfillProgress:
    """Sent to the progress callback once before the first fit (``as_of`` None) and after every
    stored vintage.  ``total`` counts the vintages to fit in this session; ``eta_s`` is the elapsed
    time per finished vintage times those left (None before the first)."""

    done: int
    total: int
    skipped: int
    elapsed_s: float
    eta_s: float | None
    where: str
    as_of: pd.Timestamp | None = None
    run_id: int | None = None
    status: str | None = None
    n_iter: int | None = None
    fit_s: float | None = None
    parent_run: int | None = None


@dataclass(frozen=True)
class StoredVintage:
    as_of: pd.Timestamp
    run_id: int
    status: str
    n_iter: int
    fit_s: float
    parent_run: int | None


@dataclass
class BackfillReport:
    """What a backfill did: vintages written in this session (in write order) and skipped ones."""

    dataset_hash: str
    key: str
    window: str
    n_cutoffs: int
    skipped: int
    where: str
    written: list[StoredVintage] = field(default_factory=list)
    elapsed_s: float = 0.0


class _Chains:
    """Per chain: the vintages still to fit, in order, and the last finished one's parameters."""

    def __init__(self, plan: BackfillPlan):
        self.plan = plan
        self.todo: dict[int, list[Vintage]] = {}
        for v in plan.todo:
            self.todo.setdefault(v.chain, []).append(v)
        self.by_position = {v.position: v for v in plan.vintages}
        # chain -> (grid position, run id, parameters table) of its last vintage fitted this session
        self.last: dict[int, tuple[int, int, pd.DataFrame]] = {}
        self.busy: set[int] = set()

    def ready(self) -> list[int]:
        return [c for c in sorted(self.todo) if self.todo[c] and c not in self.busy]

    def start_of(self, store: Store, vintage: Vintage, data: Panel) -> tuple[Params | None, int | None]:
        """(start parameters, parent run) of ``vintage``: its chain predecessor's parameters (merged
        with cold values for entrants, :func:`start_for_vintage`), or (None, None) for a cold start."""
        if not self.plan.warm_start or vintage.position % self.plan.chain == 0:
            return None, None
        last = self.last.get(vintage.chain)
        if last is not None and last[0] == vintage.position - 1:
            _, run_id, table = last
        else:
            before = self.by_position[vintage.position - 1]
            if before.stored is None:
                return None, None
            run_id, table = before.stored, run_tables(store, before.stored)["parameters"]
        params = start_for_vintage(table, data, self.plan.spec)
        return (params, run_id) if params is not None else (None, None)


def run_backfill(store: Store, plan: BackfillPlan, *, workers: int | None = 1, scheduler: str | None = None,
                 progress: Callable[[BackfillProgress], None] | None = None) -> BackfillReport:
    """Fit and store every vintage of ``plan`` not stored yet.

    ``workers``: local processes (1 = in this process); with ``scheduler`` (a Dask address such as
    ``tcp://10.0.0.5:8786``) the fits go to that cluster and ``workers`` caps the fits in flight
    (default: the cluster's worker threads).  ``progress`` is called with a :class:`BackfillProgress`.
    Raises :class:`BackfillInterrupted` on Ctrl-C (finished vintages stay stored) and
    :class:`BackfillError` when a fit fails (the vintages finished by then stay stored).
    """
    store.require_writable("store backfill vintages")
    t0 = time.monotonic()
    chains = _Chains(plan)
    total = len(plan.todo)
    if scheduler is None and isinstance(workers, int) and workers > 1:
        workers = max(1, min(workers, plan.n_chains()))  # no more processes than chains to run
    pool = open_pool(workers, scheduler, total)
    report = BackfillReport(dataset_hash=plan.dataset_hash, key=plan.key, window=plan.window.text,
                            n_cutoffs=len(plan.vintages), skipped=len(plan.skipped), where=pool.where)
    in_flight: dict = {}
    failure: tuple[Vintage, BaseException] | None = None

    def emit(**fields):
        if progress is not None:
            done = len(report.written)
            elapsed = time.monotonic() - t0
            eta = elapsed / done * (total - done) if done else None
            progress(BackfillProgress(done=done, total=total, skipped=report.skipped, elapsed_s=elapsed,
                                      eta_s=eta, where=pool.where, **fields))

    def fill():
        for c in chains.ready():
            if len(in_flight) >= pool.capacity:
                return
            vintage = chains.todo[c].pop(0)
            data = vintage_panel(plan.panel, vintage.as_of, plan.window)
            start, parent = chains.start_of(store, vintage, data)
            chains.busy.add(c)
            future = pool.submit(fit_vintage, VintageTask(vintage.as_of, data, plan.spec, start))
            in_flight[future] = (vintage, parent)

    try:
        emit()
        fill()
        while in_flight:
            finished = pool.wait_first(in_flight)
            for future in sorted(finished, key=lambda f: in_flight[f][0].position):
                vintage, parent = in_flight.pop(future)
                chains.busy.discard(vintage.chain)
                try:
                    outcome = future.result()
                except Exception as error:  # a failed fit: stop, keep what is stored
                    failure = failure or (vintage, error)
                    chains.todo[vintage.chain] = []
                    continue
                stored = _store_vintage(store, plan, outcome, parent)
                report.written.append(stored)
                chains.last[vintage.chain] = (vintage.position, stored.run_id, outcome.fit.parameters)
                emit(as_of=stored.as_of, run_id=stored.run_id, status=stored.status, n_iter=stored.n_iter,
                     fit_s=stored.fit_s, parent_run=stored.parent_run)
            if failure is None:
                fill()
    except KeyboardInterrupt:
        pool.close(abort=True)
        report.elapsed_s = time.monotonic() - t0
        raise BackfillInterrupted(report) from None
    except BaseException:
        pool.close(abort=True)
        raise
    pool.close()
    report.elapsed_s = time.monotonic() - t0
    if failure is not None:
        vintage, error = failure
        first = (str(error).strip().splitlines() or [type(error).__name__])[0]
        raise BackfillError(f"the fit at cut-off {vintage.as_of.date()} failed ({type(error).__name__}: "
                            f"{first}); {len(report.written)} vintage(s) of this session are stored, "
                            "run the backfill again to resume")
    return report


def _store_vintage(store: Store, plan: BackfillPlan, outcome: VintageOutcome, parent: int | None) -> StoredVintage:
    fitted = outcome.fit
    run, tables = from_fit(fitted, dataset_hash=plan.dataset_hash, as_of=outcome.as_of.date(), kind=KIND,
                           settings=vintage_settings(fitted, plan.dataset_hash, plan.window,
                                                     None if plan.legacy else
                                                     effective_chain(plan.chain, plan.warm_start)),
                           parent_run=parent, label=plan.label, started_utc=outcome.started_utc,
                           finished_utc=outcome.finished_utc, **outcome.environment)
    run_id = write_run(store, run, tables)
    return StoredVintage(as_of=outcome.as_of, run_id=run_id, status=fitted.status, n_iter=fitted.n_iter,
                         fit_s=fitted.elapsed, parent_run=parent)


def backfill(store: Store, dataset: str, spec: ModelSpec | None = None, *, start=None, end=None,
             every: int = 1, window="expanding", chain: int = DEFAULT_CHAIN, warm_start: bool = True,
             label: str | None = None, workers: int | None = 1, scheduler: str | None = None,
             progress: Callable[[BackfillProgress], None] | None = None) -> BackfillReport:
    """:func:`plan_backfill` then :func:`run_backfill` (see both)."""
    plan = plan_backfill(store, dataset, spec, start=start, end=end, every=every, window=window,
                         chain=chain, warm_start=warm_start, label=label)
    return run_backfill(store, plan, workers=workers, scheduler=scheduler, progress=progress)


# ---------------------------------------------------------------------------------------------
# finding a backfill

@dataclass(frozen=True)
class BackfillInfo:
    """A stored backfill of a dataset: its key, vintages and the settings of its newest run."""

    dataset_hash: str
    key: str
    n_vintages: int
    first_as_of: pd.Timestamp
    last_as_of: pd.Timestamp
    settings: dict

    @property
    def window(self) -> str:
        return str(self.settings.get("window", "expanding"))


def list_backfills(store: Store, dataset: str) -> list[BackfillInfo]:
    """The backfills of ``dataset`` (name or hash), oldest first."""
    digest = resolve_dataset(store, dataset)
    frame = run_query(store, "stored_backfills", {"dataset": digest})
    out = []
    for row in frame.itertuples(index=False):
        settings = row.settings if isinstance(row.settings, dict) else json.loads(row.settings or "{}")
        out.append(BackfillInfo(dataset_hash=digest, key=row.backfill_key, n_vintages=int(row.n_vintages),
                                first_as_of=pd.Timestamp(row.first_as_of), last_as_of=pd.Timestamp(row.last_as_of),
                                settings=settings))
    return out


def nearest_backfill(store: Store, plan: BackfillPlan) -> tuple[BackfillInfo, list[str]] | None:
    """The dataset's stored backfill (other than ``plan``'s own) whose settings differ from the
    plan's in the fewest entries, with their names (model settings, ``window``, ``chain``); None
    when there is no other.  Says why a command that looks like an earlier one starts afresh."""
    mine = {**plan.spec.to_dict(), "window": plan.window.text,
            "chain": None if plan.legacy else effective_chain(plan.chain, plan.warm_start)}
    best = None
    for info in list_backfills(store, plan.dataset_hash):
        if info.key == plan.key:
            continue
        theirs = {**(info.settings.get("spec") or {}), "window": info.settings.get("window"),
                  "chain": info.settings.get("chain")}
        differ = sorted(k for k in set(mine) | set(theirs) if mine.get(k) != theirs.get(k))
        if best is None or len(differ) < len(best[1]):
            best = (info, differ)
    return best


def find_backfill(store: Store, dataset: str, *, key: str | None = None, spec: ModelSpec | None = None,
                  window=None) -> BackfillInfo:
    """The one backfill of ``dataset`` meant: by its settings (``spec`` and ``window``), by a key
    prefix (``key``), or the only one there is."""
    backfills = list_backfills(store, dataset)
    name = str(dataset)
    if not backfills:
        raise BackfillError(f"dataset {name!r} has no backfill in {store.display}; run `riskprem backfill` first")
    if spec is not None or window is not None:
        window = "expanding" if window is None else window
        # any chain (and backfills stored before the chain was recorded): the model settings decide
        hits = [b for b in backfills
                if b.key == settings_key(b.dataset_hash, spec, window, b.settings.get("chain"))]
        if not hits:
            raise BackfillError(f"no backfill of {name!r} with these settings ({_choices(backfills)}); "
                                "give the settings it was run with or --key")
        if len(hits) > 1:
            raise BackfillError(f"dataset {name!r} has {len(hits)} backfills with these settings and other "
                                f"--chain values ({_choices(hits)}); choose one with --key")
        return hits[0]
    if key:
        prefix = str(key).strip().lower()
        hits = [b for b in backfills if b.key.startswith(prefix)]
        if len(hits) != 1:
            what = "no backfill" if not hits else "several backfills"
            raise BackfillError(f"{what} of {name!r} with key {prefix!r} ({_choices(backfills)}); give more "
                                "digits of the key")
        return hits[0]
    if len(backfills) > 1:
        raise BackfillError(f"dataset {name!r} has {len(backfills)} backfills ({_choices(backfills)}); choose "
                            "one with --key or with the settings it was run with")
    return backfills[0]


def _choices(backfills: list[BackfillInfo]) -> str:
    return "stored: " + ", ".join(f"key {b.key[:10]} {b.window} {b.n_vintages} vintages"
                                  + (f" (chain {b.settings['chain']})" if b.settings.get("chain") else "")
                                  for b in backfills[:6])
