"""The risk-free rate: from a column of the returns file or from a separate file (a date column
and one rate column), put on the returns' period grid.

Rates are simple per-period rates in the returns' units.  Each period may have one rate (equal
repeats in a long file are fine); a period with returns but no rate is refused, and so are rates
whose median, annualised, exceeds 50% (the usual sign of percent rates beside decimal returns).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from panel.data import PERIODS_PER_YEAR
from panel.ingest.cells import parse_dates, parse_numbers, refuse_bad_cell
from panel.ingest.errors import IngestError, shown
from panel.ingest.frequency import Fitted, Misfit, map_dates
from panel.ingest.layout import find_column, named_columns
from panel.ingest.readers import RawTable, load_table
from panel.ingest.records import first_repeat

#: Largest median risk-free rate, annualised (x periods per year), taken as plausible.
MAX_YEARLY_RATE = 0.5


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


def rates_on_grid(cells: RateCells, fitted: Fitted, decimal: np.ndarray,
                  allow_extreme: bool) -> dict[int, float]:
    """Period number -> decimal rate.  ``decimal`` is ``cells.value`` in decimal.  Refuses rates at
    or below -100%, beyond +-100% (unless ``allow_extreme``), and two rates in one period."""
    grid = fitted.grid
    present = np.flatnonzero(~np.isnan(decimal))
    for k in present:
        if decimal[k] <= -1.0 or (abs(decimal[k]) > 1.0 and not allow_extreme):
            raw = cells.table.column(cells.column)[cells.row[k]]
            raise IngestError(f"{cells.where(k)}: risk-free rate {shown(raw)} "
                              f"is {decimal[k] * 100:+.4g}% in one {grid.unit()}; give the rate "
                              "per period in the returns' units (an annual 5% is about 0.41% per "
                              "month)" + ("" if decimal[k] <= -1.0 else
                                          ", or pass allow_extreme=True (CLI --allow-extreme)"))
    if present.size and not allow_extreme:
        # Rates in percent beside decimal returns (or annual rates) pass the +-100% test.
        yearly = float(np.median(np.abs(decimal[present]))) * PERIODS_PER_YEAR[grid.code]
        if yearly > MAX_YEARLY_RATE:
            raise IngestError(f"{cells.table.name}: risk-free rates in column {cells.column!r} "
                              f"look too large: median {yearly / PERIODS_PER_YEAR[grid.code]:.4g} "
                              f"per {grid.unit()} is {yearly:.0%} a year; give simple per-period "
                              "rates in the returns' units (percent rates beside decimal "
                              "returns?), or pass allow_extreme=True (CLI --allow-extreme)")
    unique, inverse = np.unique(cells.date[present], return_inverse=True)
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
    return out
