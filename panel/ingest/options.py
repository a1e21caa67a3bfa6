"""Ingest settings: one frozen, JSON-able record of how a file was read (the store keeps it)."""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass, fields

from panel.data import PERIODS_PER_YEAR
from panel.ingest.errors import IngestError

_CHOICES = {
    "layout": (None, "wide", "long"),
    "units": (None, "decimal", "percent"),
    "returns": ("simple", "log"),
    "on_short": ("drop", "refuse"),
    "frequency": (None, *PERIODS_PER_YEAR),
}


@dataclass(frozen=True)
class IngestOptions:
    """How to read a return file.  Every field has a safe default (see ``read_panel``).

    layout : None | "wide" | "long"
        None auto-detects (rule in :mod:`panel.ingest.layout`).
    date_col : str or None
        Name of the date column; None takes a column named ``date`` (any case), else the
        first column.
    asset_col, value_col : str
        Column names of a long file (matched case-insensitively).
    date_format : str or None
        strftime format of the dates (e.g. ``"%d/%m/%Y"``); None accepts ISO-8601 dates
        (``2020-01-31``, ``2020-01``, ``2020``), ``YYYYMMDD``, ``YYYYMM`` and ``2020Q1``.
    delimiter : str or None
        CSV field separator; None picks the first of ``, ; TAB |`` found in the header line.
    units : None | "decimal" | "percent"
        Units of the returns and of the risk-free rate in the file (0.01 decimal = 1 percent).
        None infers them and refuses ambiguous data (rule in :mod:`panel.ingest.units`).
    returns : "simple" | "log"
        How the input returns are compounded; recorded as ``Panel.returns``.
    total_returns : bool
        True: the file holds total returns and ``risk_free`` gives the rate to subtract.
    risk_free : str or None
        A column of the same file, or the path of a file with a date column and one rate column.
        Rates are simple per-period rates in the same units as the returns; implausible levels
        (an annual rate, percent beside decimal) are refused (rules in :mod:`panel.ingest.riskfree`).
    min_obs : int
        Fewest non-missing observations an asset needs (default 24).
    on_short : "drop" | "refuse"
        What to do with an asset below ``min_obs``: drop it with a warning, or refuse the file.
    min_assets : int
        Fewest usable assets (the caller passes 2 for a model with common factors).
    allow_extreme : bool
        Accept per-period returns beyond +-100% (|r| > 1.0 decimal), and risk-free rates whose
        median exceeds 20% a year (with a warning).
    frequency : None | "B" | "W" | "M" | "Q" | "A"
        None infers it from the dates (rule in :mod:`panel.ingest.frequency`).
    """

    layout: str | None = None
    date_col: str | None = None
    asset_col: str = "asset"
    value_col: str = "value"
    date_format: str | None = None
    delimiter: str | None = None
    units: str | None = None
    returns: str = "simple"
    total_returns: bool = False
    risk_free: str | None = None
    min_obs: int = 24
    on_short: str = "drop"
    min_assets: int = 1
    allow_extreme: bool = False
    frequency: str | None = None

    def __post_init__(self):
        for name, allowed in _CHOICES.items():
            value = getattr(self, name)
            if value not in allowed:
                choices = ", ".join(repr(a) for a in allowed)
                raise IngestError(f"option {name}={value!r} is not one of {choices}")
        if isinstance(self.risk_free, os.PathLike):
            object.__setattr__(self, "risk_free", os.fspath(self.risk_free))
        for name in ("date_col", "date_format", "delimiter", "risk_free"):
            value = getattr(self, name)
            if value is not None and (not isinstance(value, str) or not value.strip()):
                raise IngestError(f"option {name}={value!r} must be a non-empty string or None")
        for name in ("asset_col", "value_col"):
            value = getattr(self, name)
            if not isinstance(value, str) or not value.strip():
                raise IngestError(f"option {name}={value!r} must be a non-empty string")
        if self.delimiter is not None and len(self.delimiter) != 1:
            raise IngestError(f"option delimiter={self.delimiter!r} must be one character")
        for name, low in (("min_obs", 1), ("min_assets", 1)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise IngestError(f"option {name}={value!r} must be an integer >= {low}")
        for name in ("total_returns", "allow_extreme"):
            if not isinstance(getattr(self, name), bool):
                raise IngestError(f"option {name}={getattr(self, name)!r} must be True or False")
        if self.risk_free is not None and not self.total_returns:
            raise IngestError(f"option risk_free={self.risk_free!r} is given but "
                              "total_returns=False says the file already holds excess returns; "
                              "pass total_returns=True (CLI --total-returns) or drop risk_free")
        if self.total_returns and self.risk_free is None:
            raise IngestError("total_returns=True needs a risk-free rate: pass "
                              "risk_free='<column>' or risk_free='<file with date and rate>' "
                              "(CLI --risk-free)")

    def to_dict(self) -> dict:
        """The settings as a JSON-able dict (str, int, bool, None values only)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "IngestOptions":
        """Inverse of :meth:`to_dict`; unknown keys are refused."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise IngestError(f"unknown ingest option(s) {', '.join(unknown)}; known: "
                              f"{', '.join(sorted(known))}")
        return cls(**data)
