"""Load a CSV or Parquet file into a :class:`RawTable`: named columns of untouched cells plus where
each row came from, so later checks can name the line (CSV) or row (Parquet) of a bad cell.

CSV: UTF-8 (a byte-order mark is dropped), separator from ``IngestOptions.delimiter`` or the first
of ``, ; TAB |`` found in the header line.  Blank lines and lines whose fields are all empty are
skipped (spreadsheet exports end with them); line numbers count every physical line, header = the
first non-blank line.  Cells stay text.  Parquet: numeric columns become float64, text columns
text, date/timestamp columns datetime64 (wall-clock time kept, time zone dropped); rows are
numbered from 1.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from panel.ingest.errors import IngestError, shown

#: Cell texts read as "missing" (compared after trimming, case-insensitively).
MISSING_TOKENS = frozenset({"", "na", "n/a", "nan", "null", "none", "#n/a"})
_SEPARATORS = (",", ";", "\t", "|")


@dataclass
class RawTable:
    """One file's cells, untouched.  ``columns[j]`` names ``cells[j]``: an object array of ``str``
    (``None`` = missing), a float64 array (NaN = missing) or a datetime64 array (NaT = missing).
    ``rows[i]`` is the CSV line number or the 1-based Parquet row of data row ``i``."""

    name: str
    kind: str
    columns: list[str]
    cells: list[np.ndarray]
    rows: np.ndarray

    def where(self, i: int) -> str:
        """``"line 12"`` (CSV) or ``"row 12"`` (Parquet) for data row ``i``."""
        return f"{'line' if self.kind == 'csv' else 'row'} {int(self.rows[i])}"

    def column(self, name: str) -> np.ndarray:
        return self.cells[self.columns.index(name)]

    def __len__(self) -> int:
        return len(self.rows)


def load_table(path, delimiter: str | None = None) -> RawTable:
    """Read ``path`` (``.csv``/``.txt``/``.tsv`` or ``.parquet``/``.pq``) into a RawTable."""
    path = Path(os.fspath(path))
    name = path.name
    if not path.is_file():
        raise IngestError(f"{name}: no such file ({path}); check the path")
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return _load_parquet(path)
    if suffix in (".csv", ".txt", ".tsv"):
        return _load_csv(path, "\t" if delimiter is None and suffix == ".tsv" else delimiter)
    raise IngestError(f"{name}: unknown file type {suffix or '(no suffix)'!r}; "
                      "use a .csv or .parquet file")


def _load_csv(path: Path, delimiter: str | None) -> RawTable:
    name = path.name
    data = path.read_bytes()
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        raise IngestError(f"{name}: not UTF-8 text (byte 0x{data[err.start]:02x} at offset "
                          f"{err.start}); save the file as UTF-8 CSV") from None
    if not text.strip():
        raise IngestError(f"{name}: the file is empty; expected a header line "
                          "(date column + asset columns, or date, asset, value) and data rows")
    if delimiter is None:
        first = next(line for line in text.splitlines() if line.strip())
        delimiter = next((s for s in _SEPARATORS if s in first), ",")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    header: list[str] | None = None
    rows: list[list[str]] = []
    lines: list[int] = []
    try:
        for fields in reader:
            if not any(f.strip() for f in fields):
                continue  # blank or all-empty line: spreadsheet padding, not data
            if header is None:
                header = [f.strip() for f in fields]
                continue
            if len(fields) != len(header):
                extra = fields[len(header):]
                if len(fields) > len(header) and not any(f.strip() for f in extra):
                    fields = fields[: len(header)]  # trailing empty fields: harmless padding
                else:
                    raise IngestError(
                        f"{name}: line {reader.line_num} has {len(fields)} fields but the header "
                        f"has {len(header)}; every line needs one field per column "
                        f"(separator {delimiter!r})")
            rows.append(fields)
            lines.append(reader.line_num)
    except csv.Error as err:
        raise IngestError(f"{name}: line {reader.line_num}: malformed CSV ({err}); "
                          "check the quotes on that line") from None
    assert header is not None  # the file has a non-blank line
    if not rows:
        raise IngestError(f"{name}: no data rows below the header line "
                          f"({', '.join(shown(h) for h in header[:4])}...); add the returns")
    cells = [_text_cells(column) for column in zip(*rows)]
    return RawTable(name, "csv", header, cells, np.asarray(lines, dtype=np.int64))


def _text_cells(raw) -> np.ndarray:
    """Trimmed text, with the missing tokens turned into ``None``."""
    out = np.empty(len(raw), dtype=object)
    # The tokens are at most 4 characters: the length test skips most lower() calls.
    out[:] = [None if len(c) <= 4 and c.lower() in MISSING_TOKENS else c
              for c in (cell.strip() for cell in raw)]
    return out


def _load_parquet(path: Path) -> RawTable:
    import pyarrow as pa
    import pyarrow.parquet as pq

    name = path.name
    try:
        table = pq.read_table(path)
    except (pa.ArrowException, OSError) as err:
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise IngestError(f"{name}: not a readable Parquet file ({reason}); "
                          "re-export it, or save it as CSV") from None
    if table.num_columns == 0 or table.num_rows == 0:
        raise IngestError(f"{name}: the file is empty ({table.num_rows} rows, "
                          f"{table.num_columns} columns); expected a date column and returns")
    columns = [str(c).strip() for c in table.column_names]
    cells = [_arrow_cells(table.column(j).combine_chunks()) for j in range(table.num_columns)]
    return RawTable(name, "parquet", columns, cells, np.arange(1, table.num_rows + 1))


def _arrow_cells(array) -> np.ndarray:
    import pyarrow as pa
    import pyarrow.types as pt

    kind = array.type
    if pt.is_dictionary(kind):
        array, kind = array.dictionary_decode(), kind.value_type
    if pt.is_integer(kind) or pt.is_floating(kind) or pt.is_decimal(kind):
        return np.asarray(array.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype="float64")
    if pt.is_timestamp(kind) or pt.is_date(kind):
        series = pd.Series(array.to_pandas())
        series = pd.to_datetime(series)
        if getattr(series.dt, "tz", None) is not None:
            series = series.dt.tz_localize(None)
        return series.to_numpy()   # its own unit: a cast to ns would wrap dates beyond 2262
    values = array.to_pylist()
    out = np.empty(len(values), dtype=object)
    for i, v in enumerate(values):
        text = None if v is None else str(v).strip()
        out[i] = None if text is None or text.lower() in MISSING_TOKENS else text
    return out
