"""``read_panel``: one return file (plus optional risk-free file) -> a validated :class:`Panel`.

Order of checks (the first failure is reported, so errors are deterministic): file readable and
not empty -> header (names, date column, layout) -> dates -> numeric cells -> duplicates ->
risk-free cells -> assets with no values (dropped, warning) -> frequency and period ends ->
units -> extreme values -> risk-free rates (frequency of a rate file, level, single rates,
dates on the grid: :mod:`panel.ingest.riskfree`) -> assets with too few observations
(dropped or refused) -> number of usable assets.  Within a check the first offending cell in file
order (row, then column) is named.  Unsorted dates are sorted, with a warning.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from panel.data import DAY_RANGE, Panel, first_outside_days
from panel.ingest.cells import parse_dates
from panel.ingest.errors import IngestError, listed, shown
from panel.ingest.frequency import Fitted, Misfit, check_gaps, day, fit_grid
from panel.ingest.layout import resolve_roles
from panel.ingest.options import IngestOptions
from panel.ingest.readers import load_table
from panel.ingest.records import Records, build_records, first_repeat, order_note, refuse_duplicates
from panel.ingest.riskfree import rate_column, rate_file, rates_on_grid
from panel.ingest.units import decide_units, excess, to_decimal


def read_panel(path, options: IngestOptions | None = None, **fields) -> Panel:
    """Read a CSV or Parquet return file into a validated :class:`~panel.data.Panel`.

    Parameters
    ----------
    path : str or PathLike
        ``.csv`` (``.txt``, ``.tsv``) or ``.parquet`` (``.pq``).
    options : IngestOptions, optional
        Settings; keyword ``fields`` (any :class:`IngestOptions` field: ``layout``, ``date_col``,
        ``asset_col``, ``value_col``, ``date_format``, ``delimiter``, ``units``, ``returns``,
        ``total_returns``, ``risk_free``, ``min_obs``, ``on_short``, ``min_assets``,
        ``allow_extreme``, ``frequency``) override it.

    Returns
    -------
    Panel
        Excess returns in decimal per period on period-end dates; ``warnings`` holds the
        non-fatal findings, ``meta`` the provenance (``meta["options"]`` = ``options.to_dict()``).

    Raises
    ------
    IngestError
        One line naming the file, the line/row and column, the value and the fix.
    """
    options = IngestOptions.from_dict({**(options or IngestOptions()).to_dict(), **fields})
    table = load_table(path, options.delimiter)
    name = table.name
    roles = resolve_roles(table, options)
    warnings = list(roles.notes)
    dates, labels = parse_dates(table, roles.date, options.date_format, roles.date_implicit)
    records = build_records(table, roles, dates)
    refuse_duplicates(records, roles.layout)
    rate_cells = None
    if options.risk_free is not None:
        rate_cells = (rate_column(table, roles.risk_free, dates) if roles.risk_free is not None
                      else rate_file(options.risk_free, name, options.delimiter))
    note = order_note(records, roles.layout)
    warnings += [note] if note else []

    records, empty = _drop_empty_assets(records)
    warnings += [f"asset {shown(a)} has no values; dropped" for a in empty]
    if not records.assets:
        raise IngestError(f"{name}: no returns: every return cell is empty; fill in the "
                          "returns (empty cells are missing values)")
    fitted, notes = _fit(records, options.frequency, labels)
    warnings += notes
    grid = fitted.grid
    period = fitted.ordinals[np.searchsorted(np.unique(records.date), records.date)]

    units, note = decide_units(records.value, grid.code, options.units, name, grid.unit())
    warnings += [note] if note else []
    value = to_decimal(records.value, units)
    _refuse_extreme(records, value, options, grid.unit(), impossible=False)
    risk_free_meta = None
    if rate_cells is not None:
        rates, note = rates_on_grid(rate_cells, fitted, to_decimal(rate_cells.value, units),
                                    units, options.allow_extreme)
        warnings += [note] if note else []
        if options.returns == "simple":
            _refuse_extreme(records, value, options, grid.unit(), impossible=True)
        rate = _rates_for(records, period, rates, fitted, rate_cells)
        value = excess(value, rate, options.returns)
        risk_free_meta = {
            "source": rate_cells.source,
            "name": rate_cells.column if rate_cells.source == "column" else rate_cells.table.name,
            "column": rate_cells.column,
            "rule": "r - rf" if options.returns == "simple" else "r - log(1 + rf)",
        }

    frame = _pivot(records, value, period, fitted)
    frame, short = _drop_short(frame, options, name)
    warnings += short
    if frame.shape[1] < options.min_assets:
        have = ", ".join(repr(a) for a in frame.columns) or "none"
        raise IngestError(f"{name}: only {frame.shape[1]} usable asset(s) ({have}) with at least "
                          f"{options.min_obs} observations; need at least {options.min_assets} "
                          "(add assets, or lower min_obs; CLI --min-obs)")
    frame = _trim(frame)
    meta = {
        "source": Path(os.fspath(path)).name,
        "format": table.kind,
        "layout": roles.layout,
        "layout_rule": roles.rule,
        "date_column": roles.date,
        "frequency": grid.code,
        "grid": grid.describe(),
        "units": units,
        "units_inferred": options.units is None,
        "returns": options.returns,
        "excess": "as given" if rate_cells is None else "total minus risk-free",
        "risk_free": risk_free_meta,
        "assets_read": len(records.assets) + len(empty),
        "options": options.to_dict(),
    }
    return Panel.from_frame(frame, grid.code, options.returns, tuple(warnings), meta)


def _drop_empty_assets(records: Records) -> tuple[Records, list[str]]:
    """Drop the missing cells, and the assets left with none (named, for the warning)."""
    has = ~np.isnan(records.value)
    counts = np.bincount(records.asset[has], minlength=len(records.assets))
    empty = [a for a, c in zip(records.assets, counts) if c == 0]
    kept = records.take(has)
    if empty:
        new = np.cumsum(counts > 0) - 1  # old asset number -> new
        kept.asset = new[kept.asset]
        kept.assets = [a for a, c in zip(records.assets, counts) if c > 0]
    return kept, empty


def _fit(records: Records, code: str | None, labels: bool) -> tuple[Fitted, tuple[str, ...]]:
    """Frequency and period ends (rule in :mod:`panel.ingest.frequency`)."""
    unique, inverse = np.unique(records.date, return_inverse=True)
    n = len(records.assets)

    def check(fitted: Fitted) -> str | None:
        keys = fitted.ordinals[inverse] * n + records.asset
        pair = first_repeat(keys)
        if pair is not None:
            a, b = pair
            end = day(fitted.ends[inverse[a]])
            unit = fitted.grid.unit()
            raise Misfit(f"{records.where(a)} and {records.where(b)}: two returns for "
                         f"{shown(records.assets[records.asset[a]])} in the {unit} ending {end} "
                         f"(dated {day(records.date[a])} and {day(records.date[b])}); keep one "
                         f"per {unit}")
        return check_gaps(fitted, np.ones(unique.size, dtype=bool))

    try:
        return fit_grid(unique, check, code, labels)
    except Misfit as err:
        raise IngestError(f"{records.table.name}: {err}") from None


def _refuse_extreme(records: Records, value: np.ndarray, options: IngestOptions, unit: str,
                    impossible: bool) -> None:
    """Refuse |r| > 100% per period (unless allow_extreme) or, for simple total returns, r < -100%
    (``impossible``: a loss beyond everything invested)."""
    if impossible:
        hits = np.flatnonzero(value < -1.0)
    elif options.allow_extreme:
        return
    else:
        hits = np.flatnonzero(np.abs(value) > 1.0)
    if not hits.size:
        return
    k = int(hits[0])
    more = f" (+{hits.size - 1} more such cells)" if hits.size > 1 else ""
    head = (f"{records.table.name}: {records.where(k)}: return {shown(records.raw(k))} is "
            f"{value[k] * 100:+.6g}% in one {unit}")
    if impossible:
        raise IngestError(f"{head}, below -100%, impossible for a simple total return; fix the "
                          f"cell{more}")
    hint = " or units='percent' if the file is in percent," if options.units is None else ""
    raise IngestError(f"{head} (beyond +-100%): fix the typo,{hint} or pass allow_extreme=True "
                      f"(CLI --allow-extreme) if it is real{more}")


def _rates_for(records: Records, period: np.ndarray, rates: dict[int, float], fitted: Fitted,
               cells) -> np.ndarray:
    """The decimal rate of each record's period; refuses a period without one."""
    out = np.array([rates.get(p, np.nan) for p in period.tolist()], dtype="float64")
    missing = np.flatnonzero(np.isnan(out))
    if missing.size:
        k = int(missing[0])
        periods = sorted({int(p) for p in period[missing].tolist()})
        also = ""
        if len(periods) > 1:
            also = f" (missing for {listed(day(e) for e in fitted.grid.ends(periods))})"
        where = f"column {cells.column!r}"
        if cells.source == "file":
            span = cells.date[~np.isnan(cells.value)]
            where = (f"{cells.table.name} (its rates run from {day(span.min())} to "
                     f"{day(span.max())})" if span.size else cells.table.name)
        raise IngestError(f"{records.table.name}: {records.where(k)}: no risk-free rate for the "
                          f"{fitted.grid.unit()} ending {day(fitted.grid.ends([period[k]])[0])}"
                          f"{also}; add the rates to {where}")
    return out


def _pivot(records: Records, value: np.ndarray, period: np.ndarray,
           fitted: Fitted) -> pd.DataFrame:
    """Dates x assets on the full period range (missing periods = NaN rows)."""
    first, last = int(period.min()), int(period.max())
    matrix = np.full((last - first + 1, len(records.assets)), np.nan)
    matrix[period - first, records.asset] = value
    ends = fitted.grid.ends(np.arange(first, last + 1))
    outside = first_outside_days(ends)
    if outside is not None:   # a date just inside the range whose period ends beyond it
        raise IngestError(f"{records.table.name}: the {fitted.grid.unit()} ending {day(ends[outside])} is "
                          f"outside the dates riskprem can hold ({DAY_RANGE}); drop that period")
    index = pd.DatetimeIndex(ends.astype("datetime64[ns]"), name="date")
    return pd.DataFrame(matrix, index=index, columns=list(records.assets))


def _drop_short(frame: pd.DataFrame, options: IngestOptions, name: str):
    """Apply ``min_obs``/``on_short``; returns (frame, warnings)."""
    counts = frame.notna().sum(axis=0)
    short = [(a, int(c)) for a, c in counts.items() if c < options.min_obs]
    if not short:
        return frame, []
    if options.on_short == "refuse":
        asset, count = short[0]
        more = f" (+{len(short) - 1} more)" if len(short) > 1 else ""
        raise IngestError(f"{name}: asset {shown(asset)} has only {count} observations, fewer "
                          f"than min_obs={options.min_obs}{more}; pass a smaller min_obs (CLI "
                          "--min-obs) or on_short='drop' (CLI: leave out --refuse-short)")
    notes = [f"asset {shown(a)} has {c} observations (fewer than min_obs={options.min_obs}); "
             "dropped" for a, c in short]
    return frame.drop(columns=[a for a, _ in short]), notes


def _trim(frame: pd.DataFrame) -> pd.DataFrame:
    """Drop leading and trailing dates where no asset has data (left by dropped assets)."""
    has = frame.notna().any(axis=1).to_numpy()
    if not has.any():
        return frame
    rows = np.flatnonzero(has)
    return frame.iloc[rows[0]: rows[-1] + 1]
