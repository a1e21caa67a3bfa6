"""Turn raw cells into dates and numbers, naming the first bad cell (file, line/row, column, value).

Dates: with ``date_format`` that strftime format; otherwise the form of the first date decides for
the whole column: ``2020Q1`` / ``2020-Q1`` (quarter label), ``YYYYMM`` (month label), ``YYYYMMDD``,
``YYYY`` (year label), else ISO 8601 (``2020-01-31``, ``2020-01``, ``2020-01-31T16:00``).
Times of day are dropped.  Numbers: anything Python's ``float`` reads (``0.0100``, ``1.0e-2``);
the texts in :data:`~panel.ingest.readers.MISSING_TOKENS` are missing; ``inf`` is refused.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from panel.data import DAY_RANGE, first_outside_days
from panel.ingest.errors import IngestError, shown
from panel.ingest.readers import RawTable

_QUARTER = re.compile(r"^(\d{4})-?[Qq]([1-4])$")
_YEAR_MONTH = re.compile(r"^(\d{4})(\d{2})$")
_YMD = re.compile(r"^\d{8}$")
_YEAR = re.compile(r"^\d{4}$")
_ISO_MONTH = re.compile(r"^\d{4}-\d{1,2}$")


def parse_dates(table: RawTable, column: str, date_format: str | None = None,
                implicit: bool = False) -> tuple[np.ndarray, bool]:
    """Dates of ``column`` as datetime64[D]; and whether they are period labels (``2020-01``).

    ``implicit`` says the column was picked as "the first column" (no ``date`` column), so a first
    cell that isn't a date means the file has no date column at all.
    """
    cells = table.column(column)
    name = table.name
    if cells.dtype.kind == "M":
        missing = np.isnat(cells)
        _refuse_empty(table, column, missing)
        _refuse_outside(table, column, cells, cells.astype("datetime64[D]").astype(str))
        return cells.astype("datetime64[D]"), False
    if cells.dtype.kind == "f":  # numeric Parquet column, e.g. 20200131
        text = np.array([None if np.isnan(v) else
                         (f"{v:.0f}" if np.isfinite(v) and v == int(v) else repr(float(v)))
                         for v in cells], dtype=object)
    else:
        text = cells
    missing = np.array([t is None for t in text], dtype=bool)
    if implicit and not missing.all():
        i = int(np.flatnonzero(~missing)[0])
        if np.isnat(_parse_text(text[i:i + 1], text[i], date_format)[0][0]):
            raise IngestError(f"{name}: no date column: no column is named 'date' and the first "
                              f"column {column!r} holds {shown(text[i])} ({table.where(i)}), not a "
                              "date; pass date_col='<name>' (CLI --date-col)")
    _refuse_empty(table, column, missing)
    first = text[0]
    parsed, labels = _parse_text(text, first, date_format)
    bad = np.flatnonzero(np.isnat(parsed))
    if bad.size:
        i = int(bad[0])
        alone = _parse_text(text[i:i + 1], text[i], None)[0][0]
        if date_format is not None:
            fix = f"it doesn't match date_format={date_format!r}"
        elif not np.isnat(alone):
            fix = f"use the same date form in every row (the first date is {shown(first)})"
        else:
            fix = ("write ISO dates like 2020-01-31 (or 2020-01, 202001, 2020Q1), or pass "
                   "date_format='%d/%m/%Y' or similar (CLI --date-format)")
        raise IngestError(f"{name}: {table.where(i)}, column {column!r}: cannot read "
                          f"{shown(text[i])} as a date; {fix}")
    _refuse_outside(table, column, parsed, text)
    return parsed, labels


def _refuse_outside(table: RawTable, column: str, days: np.ndarray, cells: np.ndarray) -> None:
    """Refuse a date that a panel cannot hold (beyond pandas' nanosecond timestamps)."""
    i = first_outside_days(days)
    if i is not None:
        raise IngestError(f"{table.name}: {table.where(i)}, column {column!r}: date {shown(cells[i])} is "
                          f"outside the dates riskprem can hold ({DAY_RANGE}); correct the year")


def _refuse_empty(table: RawTable, column: str, missing: np.ndarray) -> None:
    if missing.any():
        i = int(np.flatnonzero(missing)[0])
        raise IngestError(f"{table.name}: {table.where(i)}, column {column!r}: empty date; every "
                          "row needs a date (delete the row if it holds no data)")


def _parse_text(text: np.ndarray, first: str, date_format: str | None):
    """(datetime64[D] with NaT for unreadable cells, labels flag) for a text column."""
    if date_format is not None:
        return _to_datetime(text, date_format), False
    if _QUARTER.match(first):
        iso = [_quarter(t) for t in text]
        return _to_datetime(np.array(iso, dtype=object), "%Y-%m-%d"), True
    if _YEAR_MONTH.match(first):
        iso = [f"{t[:4]}-{t[4:]}-01" if _YEAR_MONTH.match(t) else None for t in text]
        return _to_datetime(np.array(iso, dtype=object), "%Y-%m-%d"), True
    if _YMD.match(first):
        return _to_datetime(np.array([t if _YMD.match(t) else None for t in text], dtype=object),
                            "%Y%m%d"), False
    if _YEAR.match(first):
        iso = [f"{t}-01-01" if _YEAR.match(t) else None for t in text]
        return _to_datetime(np.array(iso, dtype=object), "%Y-%m-%d"), True
    # ISO: every cell must have the first cell's form (a month label, or a full date).
    form = _iso_form(first)
    iso = [t if _iso_form(t) == form else None for t in text]
    return _to_datetime(np.array(iso, dtype=object), "ISO8601"), form == "month"


def _iso_form(text: str) -> str:
    if _ISO_MONTH.match(text):
        return "month"
    if _QUARTER.match(text) or _YEAR_MONTH.match(text) or _YMD.match(text) or _YEAR.match(text):
        return "other"
    return "date"


def _quarter(text: str):
    match = _QUARTER.match(text)
    if not match:
        return None
    return f"{match.group(1)}-{3 * int(match.group(2)) - 2:02d}-01"


def _to_datetime(text: np.ndarray, fmt: str) -> np.ndarray:
    series = pd.Series(text, dtype=object)
    parsed = pd.to_datetime(series, format=fmt, errors="coerce")
    if getattr(parsed.dt, "tz", None) is not None:
        parsed = parsed.dt.tz_localize(None)  # keep the wall-clock date
    # pandas parses far dates at a coarser unit; days keep them (a cast to ns would wrap them).
    return parsed.to_numpy().astype("datetime64[D]")


def parse_numbers(cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(float64 values with NaN for missing, mask of non-numeric cells) of one column."""
    if cells.dtype.kind == "f":
        return cells.astype("float64"), np.zeros(len(cells), dtype=bool)
    if cells.dtype.kind == "M":
        return np.full(len(cells), np.nan), ~np.isnat(cells)
    filled = np.where(np.array([c is None for c in cells], dtype=bool), "nan", cells)
    try:
        return filled.astype("float64"), np.zeros(len(cells), dtype=bool)
    except ValueError:
        pass  # some cell isn't a number: find which, cell by cell
    values = np.full(len(cells), np.nan)
    bad = np.zeros(len(cells), dtype=bool)
    for i, cell in enumerate(filled):
        try:
            values[i] = float(cell)
        except ValueError:
            bad[i] = True
    return values, bad


def is_text_column(cells: np.ndarray) -> bool:
    """True when the column has cells and none of them reads as a number (an asset-name column)."""
    if cells.dtype.kind != "O":
        return False
    present = [c for c in cells if c is not None]
    if not present:
        return False
    _, bad = parse_numbers(np.array(present, dtype=object))
    return bool(bad.all())


def refuse_bad_cell(table: RawTable, columns: list[str], values: list[np.ndarray],
                    bad: list[np.ndarray], what: str = "return") -> None:
    """Raise for the first (in file order: row, then column) non-numeric or infinite cell."""
    first = None
    for j, (vals, mask) in enumerate(zip(values, bad)):
        problem = mask | np.isinf(vals)
        hits = np.flatnonzero(problem)
        if hits.size and (first is None or (hits[0], j) < first):
            first = (int(hits[0]), j)
    if first is None:
        return
    i, j = first
    column = columns[j]
    raw = table.column(column)[i]
    where = f"{table.name}: {table.where(i)}, column {column!r}"
    if bad[j][i]:
        text = str(raw)
        if text.endswith("%"):
            fix = "drop the % signs and pass units='percent' (CLI --units percent)"
        elif "," in text and _reads(text.replace(",", ".")):
            fix = "use '.' as the decimal mark (e.g. 0.012)"
        else:
            fix = "write a number (e.g. 0.012) or leave the cell empty for a missing value"
        raise IngestError(f"{where}: non-numeric {what} {shown(raw)}; {fix}")
    raise IngestError(f"{where}: infinite {what} {shown(raw)}; a {what} must be finite — fix the "
                      "cell or leave it empty for a missing value")


def _reads(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
