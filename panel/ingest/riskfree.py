"""The risk-free rate: from a column of the returns file or from a separate file (a date column
and one rate column), put on the returns' period grid.

Rates are simple per-period rates in the returns' units.  Plausibility rules, in the order they
run (``a`` = median |rate| per period, read in the returns' units, x periods per year; the
thresholds are common practice, set from the historical record as remembered: US Treasury bills
peaked near 16% a year in 1981 and averaged about 3-4% in the long run):

1. A rate file must have the returns' frequency: the code nearest its median date spacing (as in
   :mod:`panel.ingest.frequency`) must be the returns' (a daily file beside monthly returns is
   refused, not averaged).
2. ``a > 20%`` is refused (with ``allow_extreme``: a warning).  A median above every
   developed-market peak over a whole sample is almost always a quoting mistake; the message
   names the likely one(s) -- an annual rate beside sub-annual returns (divide by periods per
   year), percent beside decimal returns (divide by 100), or both -- the likeliest first (the
   corrected rate nearest a typical 4% a year).  Genuinely high rates (high-inflation
   currencies) pass with ``allow_extreme``.
3. ``10% < a <= 20%`` on sub-annual data gives a warning (an annual rate of 0.8-1.7% quoted per
   month lands here; so do genuine 1979-1982 dollar rates).
4. Beside returns in percent, ``0 < max |rate| x periods per year < 0.1%`` warns: decimal
   rates beside percent returns are 100 times too small, but their level alone cannot tell them
   from near-zero rates.
5. One rate at or below -100% per period, or beyond +-100% (unless ``allow_extreme``), is refused
   as a typo.
6. The dates must fit the returns' period grid, with one rate per period (equal repeats in a long
   file are fine); a period with returns but no rate is refused (``core``).

Sizes are absolute, so slightly negative rates pass.  An annual rate quoted per month is refused
from about 1.7% a year and warned about from 0.8%; below that its level cannot tell it from a
genuine monthly rate (premia then err by less than about 9 points a year).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from panel.data import PERIODS_PER_YEAR
from panel.ingest.cells import parse_dates, parse_numbers, refuse_bad_cell
from panel.ingest.errors import IngestError, shown
from panel.ingest.frequency import (NOMINAL_DAYS, Fitted, Grid, Misfit, by_closeness, day,
                                    map_dates, median_spacing)
from panel.ingest.layout import find_column, named_columns
from panel.ingest.readers import RawTable, load_table
from panel.ingest.records import first_repeat

#: Median |rate| x periods per year above which rates are refused (common practice, see above).
MAX_YEARLY_RATE = 0.20
#: ... above which (sub-annual data) a warning says they may be annual rates.
HIGH_YEARLY_RATE = 0.10
#: Largest |rate| x periods per year below which, beside percent returns, a warning says they
#: may be decimal rates.
LOW_YEARLY_RATE = 0.001
#: A typical yearly rate (long-run US bill average, from memory), to rank the likely mistakes.
TYPICAL_YEARLY_RATE = 0.04
_ADJECTIVE = {"B": "daily", "W": "weekly", "M": "monthly", "Q": "quarterly", "A": "annual"}


@dataclass(frozen=True)
class RateCells:
    """Rate cells as read: ``table`` rows ``row`` with dates and values (input units)."""

    table: RawTable
    column: str
    row: np.ndarray
    date: np.ndarray
    value: np.ndarray
    source: str  # "column" or "file"
    labels: bool = False

    def where(self, k: int) -> str:
        return f"{self.table.name}: {self.table.where(int(self.row[k]))}, column {self.column!r}"


def rate_column(table: RawTable, column: str, dates: np.ndarray) -> RateCells:
    """The rate cells of a column in the returns file (``dates``: that file's parsed dates)."""
    values, bad = parse_numbers(table.column(column))
    refuse_bad_cell(table, [column], [values], [bad], what="risk-free rate")
    return RateCells(table, column, np.arange(len(table)), dates, values, "column")


def rate_file(path: str, returns_name: str, delimiter: str | None) -> RateCells:
    """The rate cells of a separate file: its ``date`` column (or first column) and one other."""
    if not Path(os.fspath(path)).is_file():
        raise IngestError(f"{returns_name}: risk_free={path!r} is neither a column of the file "
                          "nor an existing file; pass a column name or the path of a file "
                          "with a date and a rate column")
    table = load_table(path, delimiter)
    columns, _ = named_columns(table)
    named = find_column(columns, "date")
    date = named or columns[0]
    others = [c for c in columns if c != date]
    if len(others) != 1:
        raise IngestError(f"{table.name}: a risk-free file needs a date column and one rate "
                          f"column; found {len(columns)} columns ({', '.join(map(repr, columns))})")
    dates, labels = parse_dates(table, date, implicit=named is None)
    values, bad = parse_numbers(table.column(others[0]))
    refuse_bad_cell(table, others, [values], [bad], what="risk-free rate")
    pair = first_repeat(dates.astype(np.int64))
    if pair is not None:
        raise IngestError(f"{table.name}: {table.where(pair[0])} and {table.where(pair[1])}: date "
                          f"{dates[pair[0]]} appears twice; keep one rate per date")
    return RateCells(table, others[0], np.arange(len(table)), dates, values, "file", labels)


def rates_on_grid(cells: RateCells, fitted: Fitted, decimal: np.ndarray, units: str,
                  allow_extreme: bool) -> tuple[dict[int, float], str | None]:
    """(period number -> decimal rate, warning or None).  ``decimal`` is ``cells.value`` in
    decimal, read in the returns' ``units``.  Runs rules 1-6 of the module docstring."""
    grid = fitted.grid
    present = np.flatnonzero(~np.isnan(decimal))
    unique, inverse = np.unique(cells.date[present], return_inverse=True)
    if cells.source == "file":
        _check_frequency(cells, unique, grid)
    note = None
    if present.size:
        note = _check_level(cells, grid, present, decimal, units, allow_extreme)
    for k in present:
        if decimal[k] <= -1.0 or (abs(decimal[k]) > 1.0 and not allow_extreme):
            raw = cells.table.column(cells.column)[cells.row[k]]
            raise IngestError(f"{cells.where(k)}: risk-free rate {shown(raw)} "
                              f"is {decimal[k] * 100:+.4g}% in one {grid.unit()}; give the rate "
                              "per period in the returns' units (an annual 5% is about 0.41% per "
                              "month)" + ("" if decimal[k] <= -1.0 else
                                          ", or pass allow_extreme=True (CLI --allow-extreme)"))
    try:
        mapped = map_dates(unique, grid.code, grid.anchor, labels=cells.labels)
    except Misfit as err:
        raise IngestError(f"{cells.table.name}: risk-free dates don't fit the returns' "
                          f"{grid.describe()} dates: {err}") from None
    periods = mapped.ordinals[inverse]
    out: dict[int, float] = {}
    first_at: dict[int, int] = {}
    for k, period in zip(present.tolist(), periods.tolist()):
        if period in out and out[period] != decimal[k]:
            other = first_at[period]
            raws = cells.table.column(cells.column)
            raise IngestError(f"{cells.where(k)}: risk-free rate {shown(raws[cells.row[k]])} "
                              f"differs from {shown(raws[cells.row[other]])} "
                              f"({cells.table.where(int(cells.row[other]))}) for "
                              f"the {grid.unit()} ending {grid.ends([period])[0]}; give one rate "
                              "per period")
        out.setdefault(period, float(decimal[k]))
        first_at.setdefault(period, k)
    return out, note


def _check_level(cells: RateCells, grid: Grid, present: np.ndarray, decimal: np.ndarray,
                 units: str, allow_extreme: bool) -> str | None:
    """Rules 2-4 of the module docstring: refuse (or, allowed, warn about) a median rate above
    ``MAX_YEARLY_RATE`` a year; warn about a high one, or a tiny one beside percent returns."""
    ppy = PERIODS_PER_YEAR[grid.code]
    size = np.abs(decimal[present])
    median = float(np.median(size))
    yearly = median * ppy
    raw = float(np.median(np.abs(cells.value[present])))  # as written in the file
    seen = f"risk-free rates in column {cells.column!r}" + (
        "" if cells.source == "column" else f" of {cells.table.name}")
    told = (f"median {raw:.4g} per {grid.unit()}, read as {units} like the returns, is "
            f"{_percent(yearly)} a year")
    if yearly > MAX_YEARLY_RATE:
        guess = _likely_mistakes(median, ppy, units)
        if allow_extreme:
            return f"{seen}: {told}{guess}; accepted because allow_extreme=True"
        raise IngestError(f"{cells.table.name}: risk-free rates in column {cells.column!r} look "
                          f"too large for {grid.describe()} returns: {told}{guess}; give simple "
                          f"per-{grid.unit()} rates in the returns' units, or pass "
                          "allow_extreme=True (CLI --allow-extreme) if rates this high are real")
    if ppy > 1 and yearly > HIGH_YEARLY_RATE:
        return (f"{seen} are high: {told}; if they are annual rates, divide them by {ppy} "
                f"(simple per-{grid.unit()} rates)")
    largest = float(size.max())
    if units == "percent" and 0 < largest * ppy < LOW_YEARLY_RATE:  # all zero: deliberate
        top = float(np.max(np.abs(cells.value[present])))
        return (f"{seen} are near zero beside returns in percent: the largest, {top:.4g} per "
                f"{grid.unit()}, is {_percent(largest * ppy)} a year; if they are decimal rates, "
                "multiply them by 100 (or give the returns in decimal too)")
    return None


def _likely_mistakes(median: float, ppy: int, units: str) -> str:
    """``"; they look like ..."`` naming the quoting mistakes that would turn the per-period
    ``median`` (decimal, as read) into a plausible rate, the likeliest first (at most two)."""
    readings = []
    if ppy > 1:
        readings.append(("an annual rate", ppy))
    if units == "decimal":
        readings.append(("a rate in percent beside decimal returns", 100))
    if ppy > 1 and units == "decimal":
        readings.append(("an annual rate in percent", 100 * ppy))
    fits = [(label, median * ppy / divide, divide) for label, divide in readings
            if median * ppy / divide <= MAX_YEARLY_RATE]
    if not fits:
        return ""
    fits.sort(key=lambda f: abs(math.log(max(f[1], 1e-12) / TYPICAL_YEARLY_RATE)))
    shown_fits = [f"{label} ({_percent(year)} a year: divide by {divide})"
                  for label, year, divide in fits[:2]]
    return "; they look like " + " or ".join(shown_fits)


def _check_frequency(cells: RateCells, dates: np.ndarray, grid: Grid) -> None:
    """Rule 1: refuse a rate file whose own frequency (the code nearest its median date spacing)
    is not the returns'."""
    if dates.size < 2:
        return
    spacing = median_spacing(dates)
    own = by_closeness(spacing)[0]
    if own == grid.code:
        return
    finer = NOMINAL_DAYS[own] < NOMINAL_DAYS[grid.code]
    how = (f" (the {_ADJECTIVE[own]} rates compounded over each {grid.unit()})" if finer else "")
    days = f"{spacing:g} day{'' if spacing == 1 else 's'}"
    raise IngestError(f"{cells.table.name}: risk-free dates are {_ADJECTIVE[own]} (median "
                      f"spacing {days}, from {day(dates[0])}) but the returns are "
                      f"{grid.describe()}; give one simple per-{grid.unit()} rate for each "
                      f"{grid.unit()} of the returns{how}")


def _percent(fraction: float) -> str:
    """``0.0525`` -> ``'5.25%'``; four significant digits, so tiny and huge rates both read."""
    return f"{fraction * 100:.4g}%"
