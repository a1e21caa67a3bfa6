"""Cells as records: one (row, column, asset, date, value) per return cell, in file order (row,
then column), so every later check can name the line and column of the cell it refuses."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from panel.ingest.cells import parse_numbers, refuse_bad_cell
from panel.ingest.errors import IngestError, shown
from panel.ingest.layout import Roles
from panel.ingest.readers import RawTable


@dataclass
class Records:
    """Parallel arrays over return cells.  ``asset`` indexes ``assets``; ``column`` indexes
    ``columns`` (the file column the value came from); ``value`` is NaN where missing."""

    table: RawTable
    assets: list[str]
    columns: list[str]
    row: np.ndarray
    column: np.ndarray
    asset: np.ndarray
    date: np.ndarray
    value: np.ndarray

    def where(self, k: int) -> str:
        """``"line 5, column 'Gold Sleeve'"`` for record ``k``."""
        return f"{self.table.where(int(self.row[k]))}, column {self.columns[self.column[k]]!r}"

    def raw(self, k: int):
        """The cell as written in the file."""
        return self.table.column(self.columns[self.column[k]])[int(self.row[k])]

    def take(self, keep: np.ndarray) -> "Records":
        return Records(self.table, self.assets, self.columns, self.row[keep], self.column[keep],
                       self.asset[keep], self.date[keep], self.value[keep])


def build_records(table: RawTable, roles: Roles, dates: np.ndarray) -> Records:
    """Parse the return cells of ``table`` (refusing the first non-numeric or infinite one)."""
    if roles.layout == "wide":
        columns = list(roles.assets)
        parsed = [parse_numbers(table.column(c)) for c in columns]
        refuse_bad_cell(table, columns, [p[0] for p in parsed], [p[1] for p in parsed])
        n_rows, n_cols = len(table), len(columns)
        values = np.column_stack([p[0] for p in parsed]).ravel()  # row-major: file order
        row = np.repeat(np.arange(n_rows), n_cols)
        column = np.tile(np.arange(n_cols), n_rows)
        return Records(table, columns, columns, row, column, column.copy(), dates[row], values)
    values, bad = parse_numbers(table.column(roles.value))
    refuse_bad_cell(table, [roles.value], [values], [bad])
    names = table.column(roles.asset)
    assets: list[str] = []
    code: dict[str, int] = {}
    asset = np.empty(len(table), dtype=np.int64)
    for i, cell in enumerate(names):
        if cell is None:
            raise IngestError(f"{table.name}: {table.where(i)}, column {roles.asset!r}: empty "
                              "asset name; every row needs the asset's name")
        label = str(cell).strip()
        if label not in code:
            code[label] = len(assets)
            assets.append(label)
        asset[i] = code[label]
    n = len(table)
    return Records(table, assets, [roles.value], np.arange(n), np.zeros(n, dtype=np.int64), asset,
                   dates, values)


def refuse_duplicates(records: Records, layout: str) -> None:
    """Refuse a date twice in a wide file, or a (date, asset) pair twice in a long file."""
    table = records.table
    if layout == "wide":
        first = records.column == 0
        dates, rows = records.date[first], records.row[first]
        keys = dates.astype(np.int64)
    else:
        dates, rows = records.date, records.row
        keys = dates.astype(np.int64) * len(records.assets) + records.asset
    pair = first_repeat(keys)
    if pair is None:
        return
    a, b = (int(rows[p]) for p in pair)
    day = str(dates[pair[0]])
    if layout == "wide":
        raise IngestError(f"{table.name}: {table.where(a)} and {table.where(b)}: date {day} "
                          "appears twice; keep one row per date")
    asset = records.assets[records.asset[pair[0]]]
    raise IngestError(f"{table.name}: {table.where(a)} and {table.where(b)}: duplicate (date, "
                      f"asset) ({day}, {shown(asset)}); keep one row per date and asset")


def first_repeat(keys: np.ndarray) -> tuple[int, int] | None:
    """Indices (earlier, later) of the first repeated key in order, or None."""
    keys = np.asarray(keys)
    if keys.size < 2:
        return None
    order = np.lexsort((np.arange(keys.size), keys))
    same = np.flatnonzero(keys[order][1:] == keys[order][:-1])
    if not same.size:
        return None
    later = order[same + 1]
    k = int(np.argmin(later))
    return int(order[same[k]]), int(later[k])


def order_note(records: Records, layout: str) -> str | None:
    """A warning when the dates are not ascending (wide: down the rows; long: within each asset).
    The caller sorts anyway; only the note depends on the file's order."""
    table = records.table
    if layout == "wide":
        dates = records.date[records.column == 0]
        rows = records.row[records.column == 0]
        back = np.flatnonzero(dates[1:] < dates[:-1])
        if not back.size:
            return None
        i = int(back[0]) + 1
        return (f"rows were not in date order ({table.where(int(rows[i]))}: {dates[i]} after "
                f"{dates[i - 1]}); sorted by date")
    order = np.lexsort((records.row, records.asset))
    asset, dates = records.asset[order], records.date[order]
    back = np.flatnonzero((asset[1:] == asset[:-1]) & (dates[1:] < dates[:-1]))
    if not back.size:
        return None
    k = int(order[back[0] + 1])
    return (f"dates of {shown(records.assets[asset[back[0]]])} were not in order "
            f"({table.where(int(records.row[k]))}: {records.date[k]} after "
            f"{dates[back[0]]}); sorted by date")
