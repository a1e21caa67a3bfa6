"""Which column is the date, which hold returns, and whether the file is wide or long.

Auto-detect rule (``layout=None``):

1. The date column is ``date_col`` if given, else the column named ``date`` (any case), else the
   first column.  A ``risk_free`` that names a column of the file is the rate column.
2. **Long** if the other columns include ``asset_col`` and ``value_col`` (default ``asset`` and
   ``value``, any case); then no further columns are allowed.
3. **Long** if exactly two other columns remain, one of them holds only text (no cell reads as a
   number: asset names), and some date occurs on more than one row.
4. Otherwise **wide**: every other column is an asset.

``layout="wide"``/``"long"`` skips the detection; a forced long file without the named columns
uses rule 3's text column as the asset column.  Header names are trimmed; a column with neither a
name nor values (a trailing separator) is ignored.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from panel.ingest.cells import is_text_column
from panel.ingest.errors import IngestError, listed
from panel.ingest.options import IngestOptions
from panel.ingest.readers import RawTable


@dataclass(frozen=True)
class Roles:
    """What each column is.  ``rule`` says how the layout was decided (recorded in Panel.meta)."""

    layout: str
    rule: str
    date: str
    date_implicit: bool
    assets: tuple[str, ...] = ()
    asset: str | None = None
    value: str | None = None
    risk_free: str | None = None
    notes: tuple[str, ...] = field(default=())


def find_column(columns: list[str], wanted: str) -> str | None:
    """The column named ``wanted``: exact match first, else the one case-insensitive match."""
    wanted = wanted.strip()
    if wanted in columns:
        return wanted
    hits = [c for c in columns if c.casefold() == wanted.casefold()]
    return hits[0] if len(hits) == 1 else None


def named_columns(table: RawTable) -> tuple[list[str], tuple[str, ...]]:
    """Header names without the ignorable unnamed empty columns; refuses the other bad headers."""
    keep, notes = [], []
    seen: dict[str, int] = {}
    for j, name in enumerate(table.columns):
        cells = table.cells[j]
        if not name:
            empty = np.isnat(cells).all() if cells.dtype.kind == "M" else (
                np.isnan(cells).all() if cells.dtype.kind == "f" else all(c is None for c in cells))
            if not empty:
                raise IngestError(f"{table.name}: column {j + 1} has values but no name in the "
                                  "header; give it a name (the asset's name)")
            notes.append(f"column {j + 1} has no name and no values; ignored")
            continue
        if name in seen:
            raise IngestError(f"{table.name}: column {name!r} appears twice in the header "
                              f"(columns {seen[name] + 1} and {j + 1}); give each column a "
                              "unique name")
        seen[name] = j
        keep.append(name)
    return keep, tuple(notes)


def resolve_roles(table: RawTable, options: IngestOptions) -> Roles:
    """Decide the roles of ``table``'s columns (rule in the module docstring).  ``risk_free`` is
    set when ``options.risk_free`` names a column; otherwise the caller reads it as a path."""
    columns, notes = named_columns(table)
    name = table.name
    if options.date_col is not None:
        date = find_column(columns, options.date_col)
        if date is None:
            raise IngestError(f"{name}: no date column {options.date_col!r}; the columns are "
                              f"{listed((repr(c) for c in columns), 6)}; pass date_col='<name>' "
                              "(CLI --date-col)")
        implicit = False
    else:
        date = find_column(columns, "date")
        implicit = date is None
        date = date or columns[0]
    rest = [c for c in columns if c != date]
    risk_free = None
    if options.risk_free is not None:
        risk_free = find_column(rest, options.risk_free)
        if risk_free is not None:
            rest.remove(risk_free)
    asset, value = find_column(rest, options.asset_col), find_column(rest, options.value_col)
    base = dict(date=date, date_implicit=implicit, risk_free=risk_free, notes=notes)

    if options.layout == "wide":
        return _wide(name, rest, "forced", base)
    if asset is not None and value is not None and asset != value:
        extra = [c for c in rest if c not in (asset, value)]
        if extra:
            raise IngestError(f"{name}: unexpected column {extra[0]!r} in a long file (date, "
                              f"{asset}, {value}); remove it, or pass layout='wide' (CLI --layout "
                              "wide) if every column but the date is an asset")
        rule = "forced" if options.layout == "long" else "named asset and value columns"
        return Roles("long", rule, asset=asset, value=value, **base)
    if len(rest) == 2:
        text = [c for c in rest if is_text_column(table.column(c))]
        repeats = _dates_repeat(table.column(date))
        if len(text) == 1 and (repeats or options.layout == "long"):
            other = rest[1] if text[0] == rest[0] else rest[0]
            rule = "forced" if options.layout == "long" else "three columns, one of asset names"
            return Roles("long", rule, asset=text[0], value=other, **base)
    if options.layout == "long":
        raise IngestError(f"{name}: layout='long' needs columns {options.asset_col!r} and "
                          f"{options.value_col!r}; the columns are "
                          f"{listed((repr(c) for c in columns), 6)}; pass asset_col=/value_col= "
                          "(CLI --asset-col/--value-col)")
    return _wide(name, rest, "default (wide)", base)


def _wide(name: str, rest: list[str], rule: str, base: dict) -> Roles:
    if not rest:
        raise IngestError(f"{name}: no asset columns besides the date column {base['date']!r}; a "
                          "wide file needs one column of returns per asset")
    return Roles("wide", rule, assets=tuple(rest), **base)


def _dates_repeat(cells: np.ndarray) -> bool:
    if cells.dtype.kind == "M":
        present = cells[~np.isnat(cells)]
    elif cells.dtype.kind == "f":
        present = cells[~np.isnan(cells)]
    else:
        present = np.array([c for c in cells if c is not None], dtype=object)
    return len(set(present.tolist())) < len(present)
