"""The canonical return panel: the one object that flows from ingest to the estimator and the store.

A :class:`Panel` holds excess returns in **decimal per period** (0.01 = 1% in one period) as a
``dates x assets`` float64 DataFrame, NaN for missing, with its content hash (the dataset identity
used by the store and by ``reproduce``).  Ingest (``panel.ingest``) builds it from files; tests and
the Python API may build it from a DataFrame with :func:`Panel.from_frame`, which checks the frame
by the same rules (one-line ``ValueError``).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

#: Periods per year by frequency code (used for annualising: premium x ppy, volatility x sqrt(ppy)).
PERIODS_PER_YEAR = {"B": 252, "W": 52, "M": 12, "Q": 4, "A": 1}

#: The days a panel may hold: pandas' nanosecond timestamps (``pd.Timestamp.min`` to ``.max``, whole
#: days).  Later or earlier dates would be shifted by centuries where a date becomes datetime64[ns].
FIRST_DAY, LAST_DAY = np.datetime64("1677-09-22", "D"), np.datetime64("2262-04-11", "D")
DAY_RANGE = f"{FIRST_DAY} to {LAST_DAY}"


def first_outside_days(dates) -> int | None:
    """Position of the first of ``dates`` (datetime64 of any unit; NaT ignored) outside
    :data:`FIRST_DAY` .. :data:`LAST_DAY`, or None when all are inside."""
    days = np.asarray(dates).astype("datetime64[D]")
    hits = np.flatnonzero((days < FIRST_DAY) | (days > LAST_DAY))
    return int(hits[0]) if hits.size else None


def canonical_hash(values: pd.DataFrame) -> str:
    """sha256 of a canonical serialisation of ``values`` (dates x assets, float64, NaN = missing).

    Invariant to row and column order and to how numbers were formatted in the source; changed by
    any value, date or asset name.  The serialisation: assets sorted by their UTF-8 bytes, dates
    sorted; then for each asset its length-prefixed name, the count of its non-missing cells, their
    dates (days since 1970-01-01, int64) and their IEEE-754 float64 values (little endian).
    ``-0.0`` is folded into ``0.0``.
    """
    frame = values.sort_index(axis=0)
    days = frame.index.values.astype("datetime64[D]").astype("<i8")
    order = sorted(frame.columns, key=lambda c: str(c).encode("utf-8"))
    digest = hashlib.sha256(b"riskprem-panel-v1\0")
    for asset in order:
        column = frame[asset].to_numpy(dtype="float64")
        keep = ~np.isnan(column)
        name = str(asset).encode("utf-8")
        digest.update(len(name).to_bytes(8, "little") + name + int(keep.sum()).to_bytes(8, "little"))
        digest.update(days[keep].tobytes())
        digest.update((column[keep] + 0.0).astype("<f8").tobytes())  # + 0.0 folds -0.0 into 0.0
    return digest.hexdigest()


@dataclass(frozen=True)
class Panel:
    """A validated excess-return panel.

    Attributes
    ----------
    values : DataFrame, shape (T, N)
        Index: ``DatetimeIndex`` named ``"date"`` (period ends, sorted, unique); columns: asset names
        (``str``, order as ingested); float64 excess returns in decimal per period; NaN = missing.
    frequency : str
        One of ``PERIODS_PER_YEAR``'s keys.
    periods_per_year : int
    returns : str
        ``"simple"`` or ``"log"`` — how the source returns were compounded.
    hash : str
        :func:`canonical_hash` of ``values``.
    warnings : tuple of str
        Non-fatal ingest findings, recorded with the dataset.
    meta : dict
        Ingest provenance (source file name, layout, input units, ...); informational only.
    """

    values: pd.DataFrame
    frequency: str
    periods_per_year: int
    returns: str = "simple"
    hash: str = ""
    warnings: tuple[str, ...] = ()
    meta: dict = field(default_factory=dict)

    @classmethod
    def from_frame(cls, values: pd.DataFrame, frequency: str = "M", returns: str = "simple",
                   warnings: tuple[str, ...] = (), meta: dict | None = None) -> "Panel":
        """Check and wrap a DataFrame of decimal excess returns per period (dates x assets).

        The rules agree with ``panel.ingest.read_panel`` on a file.  Refused with a one-line
        ``ValueError`` (``TypeError`` if ``values`` is not a DataFrame) naming the culprit and the
        fix: an unknown ``frequency`` or ``returns``; no dates or no assets; an index that is not
        dates (numbers, unparsable text, NaT, a time zone); a date twice; an empty or repeated asset
        name (after ``str`` and ``strip``); a non-numeric or boolean cell; +-inf.  Changed, as
        ingest does: unsorted dates are sorted and all-NaN assets dropped (each with a warning
        appended to ``warnings``), a frame with no value at all is refused.  A time of day is
        dropped (a date is a day; the hash counts days), a ``PeriodIndex`` becomes period ends.
        Dates are not checked against ``frequency`` (``read_panel`` does that for files).
        """
        if frequency not in PERIODS_PER_YEAR:
            raise ValueError(f"Panel.from_frame: frequency={frequency!r} is not one of "
                             f"{', '.join(PERIODS_PER_YEAR)}")
        if returns not in ("simple", "log"):
            raise ValueError(f"Panel.from_frame: returns={returns!r} is not 'simple' or 'log'")
        frame, notes = _checked_frame(values)
        return cls(values=frame, frequency=frequency, periods_per_year=PERIODS_PER_YEAR[frequency],
                   returns=returns, hash=canonical_hash(frame), warnings=tuple(warnings) + notes,
                   meta=dict(meta or {}))

    @property
    def assets(self) -> tuple[str, ...]:
        return tuple(self.values.columns)

    @property
    def dates(self) -> pd.DatetimeIndex:
        return self.values.index

    def last_returns(self) -> pd.Series:
        """Each asset's last date with a return (index: the assets)."""
        return self.values.apply(pd.Series.last_valid_index)

    def cut(self, as_of) -> "Panel":
        """The panel with data up to and including ``as_of`` (a vintage's cut-off); assets with no
        observation by then are dropped."""
        frame = self.values.loc[: pd.Timestamp(as_of)]
        frame = frame.loc[:, frame.notna().any(axis=0)]
        return Panel.from_frame(frame, self.frequency, self.returns, self.warnings, self.meta)


def _checked_frame(values) -> tuple[pd.DataFrame, tuple[str, ...]]:
    """The rules of :meth:`Panel.from_frame`: (clean float64 frame, warnings)."""
    if not isinstance(values, pd.DataFrame):
        raise TypeError(f"Panel.from_frame takes a dates x assets DataFrame, not "
                        f"{type(values).__name__} (a Series: series.to_frame('asset name'))")
    if values.shape[0] == 0 or values.shape[1] == 0:
        raise ValueError(f"Panel.from_frame: the frame is empty ({values.shape[0]} dates x "
                         f"{values.shape[1]} assets); pass at least one date and one asset")
    index = _date_index(values.index)
    names = [str(c).strip() for c in values.columns]
    seen: dict[str, int] = {}
    for position, name in enumerate(names):
        if not name:
            raise ValueError(f"Panel.from_frame: column {position + 1} has an empty asset name; "
                             "name every column")
        if name in seen:
            raise ValueError(f"Panel.from_frame: asset {name!r} appears twice (columns "
                             f"{seen[name] + 1} and {position + 1}); give each asset one column")
        seen[name] = position
    day = index.normalize()
    repeated = np.flatnonzero(day.duplicated())
    if repeated.size:
        k = int(repeated[0])
        first = int(np.flatnonzero(day == day[k])[0])
        raise ValueError(f"Panel.from_frame: date {day[k].date()} appears twice (rows {first + 1} "
                         f"and {k + 1}); keep one row per date")
    if all(dtype == np.float64 for dtype in values.dtypes):  # the usual case, in one step
        matrix = values.to_numpy(dtype="float64", copy=True)
        infinite = np.flatnonzero(np.isinf(matrix).any(axis=0))
        if infinite.size:  # let the per-column check name the cell
            j = int(infinite[0])
            _numeric(values.iloc[:, j], names[j], day)
    else:
        matrix = np.column_stack([_numeric(values.iloc[:, j], names[j], day)
                                  for j in range(values.shape[1])])
    frame = pd.DataFrame(matrix, index=pd.DatetimeIndex(day, name="date"), columns=names)
    notes = []
    if not frame.index.is_monotonic_increasing:
        k = int(np.flatnonzero(np.diff(frame.index.asi8) < 0)[0]) + 1
        notes.append(f"dates were not in order (row {k + 1}: {frame.index[k].date()} after "
                     f"{frame.index[k - 1].date()}); sorted by date")
        frame = frame.sort_index()
    empty = [a for a, none in zip(names, np.isnan(matrix).all(axis=0)) if none]
    if len(empty) == len(names):
        raise ValueError("Panel.from_frame: no returns: every cell is NaN; fill in the returns "
                         "(NaN = missing)")
    notes += [f"asset {a!r} has no values; dropped" for a in empty]
    return frame.drop(columns=empty), tuple(notes)


def _date_index(index: pd.Index) -> pd.DatetimeIndex:
    """``index`` as naive dates; refuses numbers, unparsable text, NaT and time zones."""
    if isinstance(index, pd.PeriodIndex):
        return index.to_timestamp(how="end").normalize()
    if not isinstance(index, pd.DatetimeIndex):
        if pd.api.types.is_numeric_dtype(index.dtype) or pd.api.types.is_bool_dtype(index.dtype):
            raise ValueError(f"Panel.from_frame: the index holds {index.dtype} values (e.g. "
                             f"{index[0]}), not dates; index the rows by period-end dates "
                             "(e.g. pd.date_range('2020-01-31', periods=T, freq='ME'))")
        try:
            parsed = pd.DatetimeIndex(pd.to_datetime(index, errors="coerce"))
        except (ValueError, TypeError):  # e.g. mixed time zones
            parsed = pd.DatetimeIndex([pd.NaT] * len(index))
        bad = np.flatnonzero(parsed.isna() & ~pd.isna(index))
        if bad.size:
            k = int(bad[0])
            raise ValueError(f"Panel.from_frame: row {k + 1}: index value {repr(index[k])[:40]} "
                             "is not a date; index the rows by period-end dates (one format)")
        index = parsed
    if index.tz is not None:
        raise ValueError(f"Panel.from_frame: the dates carry a time zone ({index.tz}); drop it "
                         "(frame.tz_localize(None)): a panel date is a calendar day")
    missing = np.flatnonzero(index.isna())
    if missing.size:
        raise ValueError(f"Panel.from_frame: row {int(missing[0]) + 1} has no date (NaT); date "
                         "every row or drop it")
    outside = first_outside_days(index.values)
    if outside is not None:
        raise ValueError(f"Panel.from_frame: row {outside + 1}: date {index[outside].date()} is outside the "
                         f"dates a panel can hold ({DAY_RANGE}); correct the date")
    return index


def _numeric(column: pd.Series, name: str, dates: pd.DatetimeIndex) -> np.ndarray:
    """One asset's cells as float64 (NaN = missing); refuses text, booleans and +-inf."""
    if pd.api.types.is_bool_dtype(column.dtype):
        raise ValueError(f"Panel.from_frame: asset {name!r} holds booleans, not returns; pass "
                         "decimal returns per period")
    numbers = pd.to_numeric(column, errors="coerce")
    bad = np.flatnonzero(numbers.isna().to_numpy() & column.notna().to_numpy())
    if bad.size:
        k = int(bad[0])
        raise ValueError(f"Panel.from_frame: asset {name!r}, date {dates[k].date()}: "
                         f"{repr(column.iloc[k])[:40]} is not a number; write a decimal return "
                         "or NaN for a missing value")
    array = numbers.to_numpy(dtype="float64", na_value=np.nan)
    infinite = np.flatnonzero(np.isinf(array))
    if infinite.size:
        k = int(infinite[0])
        more = f" (+{infinite.size - 1} more)" if infinite.size > 1 else ""
        raise ValueError(f"Panel.from_frame: asset {name!r}, date {dates[k].date()}: return "
                         f"{array[k]:+} is infinite{more}; a return must be finite: fix it or "
                         "use NaN for a missing value")
    return array
