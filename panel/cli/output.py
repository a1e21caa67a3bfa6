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
import os
import sys
import textwrap
from datetime import date, datetime

from rich.console import Console
from rich.markup import escape

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
    # a terminal (or COLUMNS) sets the width; a pipe or file gets 140 columns
    width = None if probe.is_terminal or os.environ.get("COLUMNS", "").isdigit() else 140
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
    import numpy as np
    import pandas as pd

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


def emit_csv(frame) -> None:
    """``frame`` (a DataFrame) as CSV on stdout; dates as YYYY-MM-DD where they have no time."""
    import pandas as pd

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

#: Spaces between table columns.
GAP = 2


class TextTable:
    """A titled table that fits the console: numbers never wrap.

    Columns from ``right_from`` on hold numbers (right-aligned, never wrapped); the others hold text,
    which wraps at spaces when space is short, as headers do.  When even that is too wide, columns
    are left out in the order ``drop`` gives (default: from the right, never the first) and a note
    names them.  riskprem lays the table out itself: rich's Table measures every cell, which took
    seconds for a 6,000-row table.
    """

    def __init__(self, title: str, headers, rows, caption: str | None = None, right_from: int = 1,
                 drop=None):
        self.title, self.caption = title, caption
        self.headers = [str(h) for h in headers]
        self.rows = [[str(c) for c in row] for row in rows]
        self.right_from = right_from
        n = len(self.headers)
        order = list(range(n - 1, 0, -1)) if drop is None else [self._index(d) for d in drop]
        self.drop = [i for i in order if 0 <= i < n]

    def _index(self, column) -> int:
        return column if isinstance(column, int) else self.headers.index(column)

    def _limits(self, j: int) -> tuple[int, int]:
        """(narrowest, natural) width of column ``j``."""
        cells = [row[j] for row in self.rows]
        widest = max((len(c) for c in cells), default=0)
        header_word = max((len(w) for w in self.headers[j].split()), default=0)
        if j >= self.right_from:                         # numbers: whole, always
            low = max(widest, header_word)
        else:                                            # text: may wrap at spaces
            word = max((len(w) for c in cells for w in c.split()), default=0)
            low = max(header_word, min(widest, max(word, 8)))
        return low, max(low, widest, len(self.headers[j]))

    def layout(self, width: int) -> tuple[list[int], list[int], list[str]]:
        """(kept column indices, their widths, headers of the columns left out) for ``width``."""
        limits = [self._limits(j) for j in range(len(self.headers))]
        keep = list(range(len(self.headers)))
        dropped = []

        def narrowest():
            return sum(limits[j][0] for j in keep) + GAP * (len(keep) - 1)

        for j in self.drop:
            if narrowest() <= width:
                break
            keep.remove(j)
            dropped.append(self.headers[j])
        widths = [limits[j][0] for j in keep]
        spare = width - narrowest()
        for i, j in sorted(enumerate(keep), key=lambda e: limits[e[1]][1] - limits[e[1]][0]):
            need = limits[j][1] - widths[i]
            if need <= spare:                            # unwrap whole headers, smallest first
                widths[i] += need
                spare -= need
        short = [i for i, j in enumerate(keep) if widths[i] < limits[j][1]]
        while spare > 0 and short:                       # the rest shared among the others
            for i in list(short):
                if spare == 0:
                    break
                widths[i] += 1
                spare -= 1
                if widths[i] >= limits[keep[i]][1]:
                    short.remove(i)
        return keep, widths, dropped

    def lines(self, width: int) -> tuple[list[str], list[str], list[str]]:
        """(header lines, rule and body lines, dropped column headers) at ``width``."""
        keep, widths, dropped = self.layout(width)

        def render(cells: list[str], header: bool) -> list[str]:
            parts = [(j, w, [text] if len(text) <= w else
                      textwrap.wrap(text, w, break_long_words=True, break_on_hyphens=False) or [""])
                     for j, w, text in zip(keep, widths, cells)]
            height = max((len(p[2]) for p in parts), default=1)
            out = []
            for k in range(height):
                pieces = []
                for j, w, chunks in parts:
                    # a header sits on the last lines, next to the rule; a cell on the first
                    at = k - (height - len(chunks)) if header else k
                    piece = chunks[at] if 0 <= at < len(chunks) else ""
                    pieces.append(piece.rjust(w) if j >= self.right_from else piece.ljust(w))
                out.append((" " * GAP).join(pieces).rstrip())
            return out

        head = render([self.headers[j] for j in keep], header=True)
        body = [(" " * GAP).join("-" * w for w in widths)]
        for row in self.rows:
            body.extend(render([row[j] for j in keep], header=False))
        return head, body, dropped


def table(title: str, headers, rows, caption: str | None = None, right_from: int = 1,
          drop=None) -> TextTable:
    """A :class:`TextTable`: ``title`` above, ``caption`` below; columns from ``right_from`` on are
    numbers (right-aligned, never wrapped); ``drop`` (header names or indices) says which columns go
    first when the console is too narrow.  Cells are shown verbatim (no markup)."""
    return TextTable(title, headers, rows, caption=caption, right_from=right_from, drop=drop)


def _print_table(console: Console, tab: TextTable) -> None:
    from rich.text import Text

    width = console.width
    console.print(Text(tab.title, style="bold"))
    head, body, dropped = tab.lines(width)
    for text in head:
        console.print(Text(text, style="bold"), no_wrap=True, crop=False, overflow="ignore")
    console.file.write("\n".join(body) + "\n")
    console.file.flush()
    if dropped:
        console.print(Text(f"(not shown at {width} columns: {', '.join(dropped)}; use a wider terminal "
                           "or --json)", style="dim"))
    if tab.caption:
        console.print(Text(tab.caption, style="dim"))


def show(*renderables) -> None:
    console = out()
    for item in renderables:
        if isinstance(item, TextTable):
            _print_table(console, item)
        else:
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


def band(mean, std, ppy: int, digits: int = 1, quantiles=None) -> str:
    """``[lo, hi]`` 90% band of a per-period premium, annualised percent: mean +- 1.645 std, or a
    Bayesian run's posterior 5% and 95% quantiles ``quantiles`` (per period) when given."""
    if quantiles is not None and all(v is not None and math.isfinite(float(v)) for v in quantiles):
        lo, hi = (float(premium_pct(v, ppy)) for v in quantiles)
        return f"[{lo:.{digits}f}, {hi:.{digits}f}]"
    m, s = float(premium_pct(mean, ppy)), float(premium_pct(std, ppy))
    if not (math.isfinite(m) and math.isfinite(s)):
        return "-"
    return f"[{m - Z90 * s:.{digits}f}, {m + Z90 * s:.{digits}f}]"


def row_band(row, kind: str, ppy: int, digits: int = 1) -> str:
    """The 90% band of one estimates row (a Series or namedtuple) for ``kind`` filtered/smoothed:
    the posterior quantiles of a Bayesian run, else mean +- 1.645 std."""
    get = row.get if hasattr(row, "get") else (lambda key, default=None: getattr(row, key, default))
    q = (get(f"{kind}_q05", None), get(f"{kind}_q95", None))
    return band(get(f"{kind}_mean"), get(f"{kind}_std"), ppy, digits,
                quantiles=None if q[0] is None else q)


#: Caption of tables whose bands may come from a posterior.
BAND_NOTE = ("Bands are 90%: mean +- 1.645 std (ML), or the posterior 5% and 95% quantiles of a "
             "Bayesian run (parameter uncertainty included).")


def mixing(status: str, max_rhat: float, min_ess: float, chains: int) -> tuple[str, str]:
    """(text, style) saying in plain words whether a Bayesian run's chains mixed."""
    numbers = f"largest split R-hat {max_rhat:.3f}, smallest effective sample size {min_ess:,.0f}"
    if status == "mixed":
        return (f"the {chains} chains mixed: {numbers} (rule: R-hat < 1.01 and ESS > 400, common "
                "practice)", "green")
    return (f"the {chains} chains have NOT mixed: {numbers} (rule: R-hat < 1.01 and ESS > 400, common "
            "practice); the bands may be wrong: run more --draws or a longer --warmup", "yellow")


def pct(prob, digits: int = 0) -> str:
    try:
        x = float(prob)
    except (TypeError, ValueError):
        return "-"
    return "-" if not math.isfinite(x) else f"{100 * x:.{digits}f}%"


def short_hash(digest) -> str:
    return str(digest or "")[:12]


def day(value) -> str:
    """A date as YYYY-MM-DD; ``-`` for None, NaN or NaT."""
    if value is None or value != value:  # noqa: PLR0124 (NaN and NaT differ from themselves)
        return "-"
    if isinstance(value, datetime):      # pandas Timestamps included
        return value.date().isoformat()
    if isinstance(value, date):
        return value.isoformat()
    import pandas as pd

    return str(pd.Timestamp(value).date())


#: Assets named in the cross-section's note on those not yet in the panel.
LATER_SHOWN = 6


def stale_caption(ranked, when, caption: str | None, later=()) -> str | None:
    """``caption`` with :data:`panel.model.result.STALE_NOTE` added when an asset of ``ranked``
    (``CrossSection.table()``) has its last return before ``when``, and a sentence naming
    ``later``: the run's assets with no return yet on or before ``when`` (not in the table)."""
    from panel.model.result import STALE_NOTE, stale

    parts = [caption] if caption else []
    if stale(ranked, when).any():
        parts.append(STALE_NOTE)
    if len(later):
        shown = ", ".join(later[:LATER_SHOWN]) + (f" and {len(later) - LATER_SHOWN} more"
                                                  if len(later) > LATER_SHOWN else "")
        parts.append(f"Not ranked: {len(later)} of the run's assets "
                     f"{'has' if len(later) == 1 else 'have'} no return yet by {day(when)} ({shown}).")
    return " ".join(parts) or None
