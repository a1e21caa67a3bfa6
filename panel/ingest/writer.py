"""``write_panel``: a Panel to CSV or Parquet, wide or long, read back by ``read_panel`` to the
same hash.  Used by the demo and by the round-trip tests."""

from __future__ import annotations

import csv
import os
from pathlib import Path

import numpy as np

from panel.data import Panel
from panel.ingest.errors import IngestError


def write_panel(panel: Panel, path, layout: str = "wide") -> Path:
    """Write ``panel.values`` (decimal excess returns) to ``path``; returns the path.

    ``.csv``: dates as ``YYYY-MM-DD``, numbers in shortest round-trip form, empty = missing.
    ``.parquet``: a ``date`` column (date32) and float64 columns.  ``layout="wide"``: ``date`` +
    one column per asset; ``"long"``: ``date, asset, value`` rows of the non-missing cells, by
    date then asset in panel order.
    """
    if layout not in ("wide", "long"):
        raise IngestError(f"write_panel layout={layout!r} is not 'wide' or 'long'")
    path = Path(os.fspath(path))
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet", ".pq"):
        raise IngestError(f"{path.name}: write_panel writes .csv or .parquet files, not "
                          f"{suffix or '(no suffix)'!r}")
    values = panel.values
    assets = [str(a) for a in values.columns]
    if layout == "wide" and any(a.casefold() == "date" for a in assets):
        raise IngestError(f"{path.name}: an asset named 'date' can't be written wide (it clashes "
                          "with the date column); write layout='long'")
    dates = values.index.values.astype("datetime64[D]")
    matrix = values.to_numpy(dtype="float64")
    if suffix == ".csv":
        _write_csv(path, layout, assets, dates, matrix)
    else:
        _write_parquet(path, layout, assets, dates, matrix)
    return path


def _cell(v: float) -> str:
    return "" if np.isnan(v) else repr(float(v))


def _write_csv(path, layout, assets, dates, matrix):
    with open(path, "w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle, lineterminator="\n")
        if layout == "wide":
            out.writerow(["date", *assets])
            for d, row in zip(dates, matrix):
                out.writerow([str(d), *(_cell(v) for v in row)])
            return
        out.writerow(["date", "asset", "value"])
        for d, row in zip(dates, matrix):
            for asset, v in zip(assets, row):
                if not np.isnan(v):
                    out.writerow([str(d), asset, _cell(v)])


def _write_parquet(path, layout, assets, dates, matrix):
    import pyarrow as pa
    import pyarrow.parquet as pq

    if layout == "wide":
        arrays = [pa.array(dates, type=pa.date32())]
        arrays += [pa.array(matrix[:, j], type=pa.float64(), from_pandas=True)
                   for j in range(len(assets))]
        table = pa.Table.from_arrays(arrays, names=["date", *assets])
    else:
        rows, cols = np.nonzero(~np.isnan(matrix))
        table = pa.table({
            "date": pa.array(dates[rows], type=pa.date32()),
            "asset": pa.array([assets[j] for j in cols], type=pa.string()),
            "value": pa.array(matrix[rows, cols], type=pa.float64()),
        })
    pq.write_table(table, path)
