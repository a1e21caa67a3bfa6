"""Infer the sampling frequency from the dates and move every date to its period end.

Rule (documented for users):

* Codes: ``B`` business-daily, ``W`` weekly, ``M`` monthly, ``Q`` quarterly, ``A`` annual.
  Candidates are tried in order of how close the median spacing of the distinct dates is to the
  code's nominal spacing (1.4, 7, 30.4, 91.3, 365.25 days); the first that fits wins.  A forced
  ``frequency`` is the only candidate.  If none fits, the reason reported is that of the coarsest
  code whose nominal spacing is at most 1.1 x the median spacing.
* A code fits when (1) positions are consistent, (2) no asset has two returns in one period,
  (3) missing periods are isolated: no run of more than ``MAX_GAP`` missing periods, and at most
  ``max(10% of the span, MAX_GAP)`` missing in total.  Missing periods become NaN rows (warning).
* Positions. ``B``: no weekend dates; a date is its own period end.  ``W``: weeks end on the most
  common weekday (e.g. Friday); a date up to 2 days earlier (a holiday) joins that week.
  ``M``/``Q``/``A``: every date is at a month end (within 6 days: last business day is fine), or
  every date at a month start (first 7 days: the date labels the period it starts; ``2020-01``,
  ``202001``, ``2020`` and ``2020Q1`` are such labels), or every date mid-month; quarters and
  years end in one fixed set of months (e.g. March/June/September/December, or June for a fiscal
  year).  Period ends are calendar month ends (``2020-01-31``), for ``W`` the anchor weekday.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from panel.ingest.errors import listed

NOMINAL_DAYS = {"B": 7 / 5, "W": 7.0, "M": 365.25 / 12, "Q": 365.25 / 4, "A": 365.25}
#: Longest run of consecutive missing periods still called a gap (beyond that: irregular dates).
MAX_GAP = {"B": 10, "W": 4, "M": 3, "Q": 2, "A": 2}
#: Largest share of missing periods in the span (the allowance is at least MAX_GAP periods).
MAX_MISSING_SHARE = 0.10
_MONTHS = {"M": 1, "Q": 3, "A": 12}
_UNIT = {"B": "business day", "W": "week", "M": "month", "Q": "quarter", "A": "year"}
_WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
_MONTH_NAMES = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
_END, _START, _MID = 0, 1, 2


class Misfit(Exception):
    """The dates don't fit a frequency; ``str()`` says why (without the file name)."""


@dataclass(frozen=True)
class Grid:
    """A frequency with its anchor: ``W`` the weekday (0 = Monday) weeks end on; ``Q``/``A`` the
    month (1-12) of one period end; ``None`` for ``B`` and ``M``."""

    code: str
    anchor: int | None = None

    def describe(self) -> str:
        """``"monthly"``, ``"weekly (Friday)"``, ``"quarterly (Mar/Jun/Sep/Dec)"``, ..."""
        if self.code == "W":
            return f"weekly ({_WEEKDAYS[self.anchor]})"
        if self.code in ("Q", "A"):
            months = [(self.anchor - 1 + k) % 12 for k in range(0, 12, _MONTHS[self.code])]
            label = "/".join(_MONTH_NAMES[m] for m in sorted(months))
            return f"{'quarterly' if self.code == 'Q' else 'annual'} ({label})"
        return {"B": "business-daily", "M": "monthly"}[self.code]

    def unit(self, count: int = 1) -> str:
        return _UNIT[self.code] + ("" if count == 1 else "s")

    def ends(self, ordinals: np.ndarray) -> np.ndarray:
        """Period-end dates (datetime64[D]) of period numbers ``ordinals``."""
        ordinals = np.asarray(ordinals, dtype=np.int64)
        if self.code == "B":
            return np.busday_offset(np.datetime64("1970-01-01"), ordinals)
        if self.code == "W":
            return (7 * ordinals - 3 + self.anchor).astype("datetime64[D]")
        n = _MONTHS[self.code]
        months = ordinals * n + self._residue()
        return (months + 1).astype("datetime64[M]").astype("datetime64[D]") - np.timedelta64(1, "D")

    def _residue(self) -> int:
        return 0 if self.code == "M" else (self.anchor - 1) % _MONTHS[self.code]


@dataclass(frozen=True)
class Fitted:
    """Result of :func:`fit_grid`: the grid, each input date's period number and end, notes."""

    grid: Grid
    ordinals: np.ndarray
    ends: np.ndarray
    notes: tuple[str, ...]


def day(d) -> str:
    return str(np.datetime64(d, "D"))


def map_dates(dates: np.ndarray, code: str, anchor: int | None = None,
              labels: bool = False) -> Fitted:
    """Map sorted distinct ``dates`` (datetime64[D]) to periods of ``code``; raises :class:`Misfit`
    when their positions are inconsistent (rule in the module docstring).  ``anchor`` fixes the
    week day / period-end month (used to put a risk-free file on the returns' grid); ``labels``
    says the dates are period labels (``2020-01``), so no "moved to the end" note is made."""
    dates = np.asarray(dates, dtype="datetime64[D]")
    if code == "B":
        return _map_business(dates)
    if code == "W":
        return _map_weekly(dates, anchor)
    return _map_months(dates, code, anchor, labels)


def _map_business(dates):
    weekday = (dates.astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday
    weekend = np.flatnonzero(weekday >= 5)
    if weekend.size:
        shown = [f"{day(dates[i])} ({_WEEKDAYS[weekday[i]]})" for i in weekend]
        raise Misfit(f"business-daily dates include weekend days: {listed(shown)}; drop those "
                     "rows (or force another frequency)")
    ordinals = np.busday_count(np.datetime64("1970-01-01"), dates)
    return Fitted(Grid("B"), ordinals, dates, ())


def _map_weekly(dates, anchor):
    weekday = (dates.astype(np.int64) + 3) % 7
    if anchor is None:
        counts = np.bincount(weekday, minlength=7)
        anchor = int(np.flatnonzero(counts == counts.max())[-1])  # ties: the later weekday
    shift = (anchor - weekday) % 7
    off = np.flatnonzero(shift > 2)  # more than 2 days before the anchor: not a holiday shift
    if off.size:
        shown = [f"{day(dates[i])} ({_WEEKDAYS[weekday[i]]})" for i in off]
        raise Misfit(f"mixed positions in the week: most dates are {_WEEKDAYS[anchor]}s, not "
                     f"{listed(shown)}; use one date per week on one weekday")
    ends = dates + shift.astype("timedelta64[D]")
    ordinals = (ends.astype(np.int64) + 3 - anchor) // 7
    notes = ()
    moved = np.flatnonzero(shift > 0)
    if moved.size:
        notes = (f"{moved.size} weekly date(s) not on a {_WEEKDAYS[anchor]} (first: "
                 f"{day(dates[moved[0]])}) are dated at that week's {_WEEKDAYS[anchor]}",)
    return Fitted(Grid("W", anchor), ordinals, ends, notes)


def _map_months(dates, code, anchor, labels):
    n = _MONTHS[code]
    unit = _UNIT[code]
    months = dates.astype("datetime64[M]")
    month_start = months.astype("datetime64[D]")
    month_end = (months + 1).astype("datetime64[D]") - np.timedelta64(1, "D")
    position = np.where((month_end - dates).astype(np.int64) <= 6, _END,
                        np.where((dates - month_start).astype(np.int64) <= 6, _START, _MID))
    counts = np.bincount(position, minlength=3)
    major = int(np.argmax(counts))  # ties go to the earlier of END, START, MID
    off = np.flatnonzero(position != major)
    if off.size:
        where = ("at month ends", "at month starts", "mid-month")[major]
        raise Misfit(f"mixed positions in the {unit}: most dates are {where}, not "
                     f"{listed(day(dates[i]) for i in off)}; use one consistent date per {unit} "
                     "(e.g. its last day)")
    index = months.astype(np.int64) + (n - 1 if major == _START else 0)  # month of period end
    close = np.flatnonzero(np.diff(index) < n)
    if n > 1 and close.size:
        i = int(close[0])
        raise Misfit(f"dates less than a {unit} apart ({day(dates[i])} and {day(dates[i + 1])}): "
                     f"the data are more frequent than {_UNIT[code]}ly; use one date per {unit}")
    residue = index % n
    if anchor is not None:
        chosen = (anchor - 1) % n
    else:
        tally = np.bincount(residue, minlength=n)
        chosen = int(np.flatnonzero(tally == tally.max())[-1])  # ties: the later month (December)
    grid = Grid(code, None if code == "M" else chosen + 1 + (12 - n if code == "Q" else 0))
    off = np.flatnonzero(residue != chosen)
    if off.size:
        raise Misfit(f"the {unit}s don't end in the same months: most dates fit "
                     f"{grid.describe()}, not {listed(day(dates[i]) for i in off)}; use one "
                     f"date per {unit} at a consistent position")
    ordinals = (index - chosen) // n
    ends = grid.ends(ordinals)
    notes = ()
    if major == _START and not labels:
        notes = (f"dates are at the start of each {unit} (e.g. {day(dates[0])}); each labels its "
                 f"own {unit} and is dated at its end ({day(ends[0])})",)
    elif major == _MID:
        notes = (f"dates fall mid-{unit} (e.g. {day(dates[0])}); each is taken as its {unit}'s "
                 f"return and dated at the {unit} end ({day(ends[0])})",)
    return Fitted(grid, ordinals, ends, notes)


def check_gaps(fitted: Fitted, used: np.ndarray) -> str | None:
    """Raise :class:`Misfit` unless the periods ``fitted.ordinals[used]`` (those with data) leave
    only isolated gaps; returns a note about the gaps (or None)."""
    grid = fitted.grid
    present = np.unique(fitted.ordinals[used])
    if present.size < 2:
        return None
    runs = np.diff(present) - 1
    limit = MAX_GAP[grid.code]
    ends = grid.ends(present)
    big = np.flatnonzero(runs > limit)
    if big.size:
        shown = [f"{day(ends[i])} to {day(ends[i + 1])} ({runs[i]} {grid.unit(runs[i])} missing)"
                 for i in big]
        raise Misfit(f"irregular {grid.describe()} dates: {listed(shown)}; at most {limit} "
                     f"consecutive {grid.unit(2)} may be missing (mixed frequencies?)")
    missing = int(runs.sum())
    span = int(present[-1] - present[0] + 1)
    if missing > max(MAX_MISSING_SHARE * span, limit):
        first = [day(ends[i]) for i in np.flatnonzero(runs > 0)]
        raise Misfit(f"irregular {grid.describe()} dates: {missing} of {span} {grid.unit(2)} "
                     f"between {day(ends[0])} and {day(ends[-1])} have no data (over "
                     f"{MAX_MISSING_SHARE:.0%}); first gaps after {listed(first)}")
    if not missing:
        return None
    after = day(ends[np.flatnonzero(runs > 0)[0]])
    why = " (holidays?)" if grid.code == "B" else ""
    return (f"{missing} {grid.unit(missing)} with no data in any asset{why} (first after {after}) "
            "kept as missing")


def median_spacing(dates: np.ndarray) -> float:
    """Median spacing in days of sorted distinct ``dates`` (at least two)."""
    return float(np.median(np.diff(np.asarray(dates, dtype="datetime64[D]").astype(np.int64))))


def by_closeness(spacing: float) -> list[str]:
    """Frequency codes, the one whose nominal spacing is closest to ``spacing`` days first."""
    return sorted(NOMINAL_DAYS, key=lambda c: abs(math.log(spacing / NOMINAL_DAYS[c])))


def fit_grid(dates: np.ndarray, check: Callable[[Fitted], str | None], code: str | None = None,
             labels: bool = False) -> tuple[Fitted, tuple[str, ...]]:
    """Pick the frequency of sorted distinct ``dates`` (rule in the module docstring).

    ``check(fitted)`` runs the data-dependent tests (one return per asset and period, gaps) and
    raises :class:`Misfit` or returns a note.  Returns the fitted grid and its notes.
    """
    dates = np.asarray(dates, dtype="datetime64[D]")
    if code is None and dates.size < 2:
        raise Misfit(f"only one date ({day(dates[0])}), so the frequency can't be inferred; "
                     "pass frequency='M' (or B, W, Q, A; CLI --frequency)")
    if code is not None:
        order, explain = [code], code
    else:
        spacing = median_spacing(dates)
        order = by_closeness(spacing)
        # When nothing fits, the coarsest frequency not coarser than the data explains it best
        # (every other month: "months missing" beats "quarters don't line up").
        slower = [c for c in NOMINAL_DAYS if NOMINAL_DAYS[c] <= 1.1 * spacing]
        explain = slower[-1] if slower else order[0]
    errors = {}
    for candidate in order:
        try:
            fitted = map_dates(dates, candidate, labels=labels)
            note = check(fitted)
        except Misfit as err:
            errors[candidate] = err
            continue
        return fitted, fitted.notes + ((note,) if note else ())
    raise errors[explain]
