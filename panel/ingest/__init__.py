"""Data ingest: CSV and Parquet return files -> validated :class:`panel.data.Panel`.

``read_panel(path, **options)`` reads wide (date + one column per asset) or long (date, asset,
value) files, excess returns or total returns plus a risk-free rate, in decimal or percent, and
returns decimal excess returns per period on period-end dates.  Bad input raises
:class:`IngestError` with one line naming the file, line/row, column, value and the fix; non-fatal
findings go to ``Panel.warnings``.  The rules: layout in :mod:`panel.ingest.layout`, units in
:mod:`panel.ingest.units`, frequency in :mod:`panel.ingest.frequency`, cells in
:mod:`panel.ingest.cells`, order of checks in :mod:`panel.ingest.core`.
"""

from panel.ingest.core import read_panel
from panel.ingest.errors import IngestError
from panel.ingest.options import IngestOptions
from panel.ingest.writer import write_panel

__all__ = ["IngestError", "IngestOptions", "read_panel", "write_panel"]
