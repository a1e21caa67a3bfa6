"""The canonical return panel: the one object that flows from ingest to the estimator and the store.

A :class:`Panel` holds excess returns in **decimal per period** (0.01 = 1% in one period) as a
``dates x assets`` float64 DataFrame, NaN for missing, with its content hash (the dataset identity
used by the store and by ``reproduce``).  Ingest (``panel.ingest``) builds it from files; tests and
the Python API may build it from a DataFrame with :func:`Panel.from_frame`.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

#: Periods per year by frequency code (used for annualising: premium x ppy, volatility x sqrt(ppy)).
PERIODS_PER_YEAR = {"B": 252, "W": 52, "M": 12, "Q": 4, "A": 1}


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
        """Wrap an already-clean DataFrame (decimal excess returns per period)."""
        frame = values.astype("float64").copy()
        frame.index = pd.DatetimeIndex(frame.index, name="date")
        frame.columns = [str(c).strip() for c in frame.columns]
        frame = frame.sort_index()
        return cls(values=frame, frequency=frequency, periods_per_year=PERIODS_PER_YEAR[frequency],
                   returns=returns, hash=canonical_hash(frame), warnings=tuple(warnings),
                   meta=dict(meta or {}))

    @property
    def assets(self) -> tuple[str, ...]:
        return tuple(self.values.columns)

    @property
    def dates(self) -> pd.DatetimeIndex:
        return self.values.index

    def cut(self, as_of) -> "Panel":
        """The panel with data up to and including ``as_of`` (a vintage's cut-off); assets with no
        observation by then are dropped."""
        frame = self.values.loc[: pd.Timestamp(as_of)]
        frame = frame.loc[:, frame.notna().any(axis=0)]
        return Panel.from_frame(frame, self.frequency, self.returns, self.warnings, self.meta)
