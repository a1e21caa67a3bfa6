"""Shared printing for the command line: rich tables, JSON, CSV, the caution line, annualising.

Conventions every command follows:

- Human output (rich tables) shows premia **annualised, in percent**: a per-period premium and its
  standard deviation times ``periods_per_year`` (the premium is a level); a return-shock variance
  ``h`` as the volatility ``sqrt(h x periods_per_year)``; a premium innovation variance ``q`` as the
  premium volatility ``sqrt(q x periods_per_year^3)`` (how far the annualised premium moves in a
  year; :mod:`panel.units`).  Tables say so in their titles and state the basis (filtered =
  real-time, smoothed = revised; the as-of date).
- Machine output (``--json``, ``--csv``, ``export``) keeps the store's **per-period decimal** units
  and column names, and says so (``"units"``, ``"periods_per_year"``); JSON carries a ``"caution"``
  key instead of the caution line.
- Errors go to stderr as one line ``error: <message>``.
"""

from __future__ import annotations

import csv
import io
import json
import math
import sys
from datetime import date, datetime

import numpy as np
import pandas as pd
from rich.console import Console, Group
from rich.markup import escape
from rich.table import Table
from rich.text import Text

from panel import units
from panel.files import formula_safe_frame

CAUTION = ("Caution: statistical estimates with model risk, not investment advice; "
           "follow your firm's model-risk governance.")
#: How numbers are annualised for display (stated in help texts and table captions).
ANNUALISING = ("annualised: premium and its std x periods a year; " + units.CONVENTION_NOTE)
MACHINE_UNITS = "per-period decimal (multiply premia by periods_per_year to annualise)"
#: 90% two-sided normal quantile (bands are mean +- Z90 std).
Z90 = 1.6448536269514722


def _console(stderr: bool = False) -> Console:
    probe = Console(stderr=stderr)
    width = None if probe.is_terminal else 140
    return Console(stderr=stderr, highlight=False, soft_wrap=False, width=width)


def out() -> Console:
    """A console on the current stdout (made on each call so test runners can capture it)."""
    return _console(False)


def err() -> Console:
    return _console(True)


def error_line(message: str) -> None:
    """``error: <message>`` on stderr, one line, no markup."""
    text = " ".join(str(message).split())
    sys.stderr.write(f"error: {text}\n")
    sys.stderr.flush()


def note(message: str) -> None:
    """An informational line on stderr (suppressed by callers under ``--quiet``)."""
    sys.stderr.write(f"{message}\n")
    sys.stderr.flush()


def line(text: str = "", style: str | None = None) -> None:
    out().print(escape(text), style=style)


def caution() -> None:
    out().print(escape(CAUTION), style="italic")


# ---------------------------------------------------------------------------------------------
# machine output

def jsonable(value):
    """``value`` with numpy / pandas / date objects turned into JSON types, NaN and inf into None."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, pd.DataFrame):
        return jsonable(value.to_dict(orient="records"))
    if value is pd.NaT:
        return None
    if isinstance(value, pd.Timestamp):
        return str(value.date()) if value == value.normalize() else value.isoformat()
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def emit_json(payload: dict) -> None:
    sys.stdout.write(json.dumps(jsonable(payload), indent=2, allow_nan=False) + "\n")
    sys.stdout.flush()


def emit_csv(frame: pd.DataFrame) -> None:
    buffer = io.StringIO()
    clean = formula_safe_frame(frame)   # text a spreadsheet would run as a formula gets a leading '

    for column in clean.columns:
        if pd.api.types.is_datetime64_any_dtype(clean[column]):
            stamps = pd.to_datetime(clean[column])
            clean[column] = stamps.dt.strftime("%Y-%m-%d") if (stamps == stamps.dt.normalize()).all() \
                else stamps.dt.strftime("%Y-%m-%dT%H:%M:%S")
    clean.to_csv(buffer, index=False, lineterminator="\n", quoting=csv.QUOTE_MINIMAL, float_format="%.17g")
    sys.stdout.write(buffer.getvalue())
    sys.stdout.flush()


# ---------------------------------------------------------------------------------------------
# human output

def table(title: str, headers, rows, caption: str | None = None, right_from: int = 1) -> Table:
    """A titled rich table (title above, caption below, neither wrapped to the table's width);
    columns from ``right_from`` on are right-aligned.  Cells are shown verbatim (no markup)."""
    tab = Table(header_style="bold", expand=False)
    for i, header in enumerate(headers):
        tab.add_column(escape(str(header)), justify="right" if i >= right_from else "left", overflow="fold",
                       no_wrap=i == 0)
    for row in rows:
        tab.add_row(*(escape(str(c)) for c in row))
    parts = [Text(title, style="bold"), tab]
    if caption:
        parts.append(Text(caption, style="dim"))
    return Group(*parts)


def show(*renderables) -> None:
    console = out()
    for item in renderables:
        console.print(item)


def facts(pairs) -> None:
    """``key: value`` lines, keys padded."""
    pairs = [(k, v) for k, v in pairs if v is not None]
    width = max((len(k) for k, _ in pairs), default=0)
    console = out()
    for key, value in pairs:
        console.print(f"[bold]{escape(key.ljust(width))}[/bold]  {escape(str(value))}")


# ---------------------------------------------------------------------------------------------
# numbers for display (annualising is the only arithmetic the CLI does)

def premium_pct(value, ppy: int):
    """Per-period premium (or its std) -> annualised percent."""
    return units.annual_premium(value, ppy) * 100.0


def vol_pct(variance, ppy: int):
    """Per-period return-shock variance -> annualised volatility in percent."""
    return units.return_vol(variance, ppy) * 100.0


def premium_vol_pct(variance, ppy: int):
    """Per-period premium innovation variance -> premium volatility, percent a year (units module)."""
    return units.premium_vol(variance, ppy) * 100.0


def num(value, digits: int = 2) -> str:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "-" if value is None else str(value)
    if not math.isfinite(x):
        return "-"
    return f"{x:,.{digits}f}"


def sci(value) -> str:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(x):
        return "inf" if x == math.inf else "-"
    return "0" if x == 0 else f"{x:.2e}"


def band(mean, std, ppy: int, digits: int = 1) -> str:
    """``[lo, hi]`` 90% band of a per-period premium, annualised percent."""
    m, s = float(premium_pct(mean, ppy)), float(premium_pct(std, ppy))
    if not (math.isfinite(m) and math.isfinite(s)):
        return "-"
    return f"[{m - Z90 * s:.{digits}f}, {m + Z90 * s:.{digits}f}]"


def pct(prob, digits: int = 0) -> str:
    try:
        x = float(prob)
    except (TypeError, ValueError):
        return "-"
    return "-" if not math.isfinite(x) else f"{100 * x:.{digits}f}%"


def short_hash(digest) -> str:
    return str(digest or "")[:12]


def day(value) -> str:
    if value is None or (not isinstance(value, str) and pd.isna(value)):
        return "-"
    return str(pd.Timestamp(value).date())
