"""Units of the input returns, the switch to decimal, and total -> excess returns.

Unit rule (``units=None``): let ``s`` be the median absolute return over all non-missing cells,
per period, and ``z = s * sqrt(periods_per_year)`` (about 0.67 x annualised volatility for decimal
returns).  ``z <= 0.6`` reads as decimal; ``z >= 2`` is refused as "looks like percent"; in between
is refused as unclear.  Either way the message says how to declare the units.  Declared units are
obeyed (with a warning when the data look like the other kind).  Percent is turned into decimal
by moving the decimal point of the number as written (``1.1`` -> ``0.011`` exactly as if the file
said ``0.011``), so a percent file and its decimal twin hash alike.

Excess returns: ``simple``: ``r - rf``; ``log``: ``r - log(1 + rf)`` (the rate is a simple
per-period rate in the returns' units, as rates are quoted).
"""

from __future__ import annotations

import math

import numpy as np

from panel.data import PERIODS_PER_YEAR
from panel.ingest.errors import IngestError

DECIMAL_MAX_Z = 0.6
PERCENT_MIN_Z = 2.0


def decide_units(values: np.ndarray, code: str, declared: str | None, name: str,
                 unit: str) -> tuple[str, str | None]:
    """(units, warning or None) for the non-missing ``values`` (per-``unit`` returns)."""
    finite = values[np.isfinite(values)]
    scale = float(np.median(np.abs(finite))) if finite.size else 0.0
    z = scale * math.sqrt(PERIODS_PER_YEAR[code])
    told = f"median |r| = {scale:.3g} per {unit}"
    if declared == "decimal":
        note = (f"units='decimal' was given but {told} looks like percent" if z >= PERCENT_MIN_Z
                else None)
        return "decimal", note
    if declared == "percent":
        note = (f"units='percent' was given but {told} looks like decimal"
                if z <= DECIMAL_MAX_Z / 100 and scale > 0 else None)
        return "percent", note
    if z <= DECIMAL_MAX_Z:
        return "decimal", None
    if z >= PERCENT_MIN_Z:
        raise IngestError(f"{name}: returns look like percent ({told}); pass units='percent' "
                          "(CLI --units percent), or units='decimal' if they are decimal")
    raise IngestError(f"{name}: can't tell the units ({told} is large for decimal returns and "
                      "small for percent); pass units='decimal' or units='percent' (CLI --units)")


def to_decimal(values: np.ndarray, units: str) -> np.ndarray:
    """``values`` in decimal; percent is shifted two decimal places as written (see module doc)."""
    values = np.asarray(values, dtype="float64")
    if units == "decimal":
        return values.copy()
    out = np.full(values.shape, np.nan)
    finite = np.isfinite(values)
    out[finite] = [float(_shifted(repr(v))) for v in values[finite].tolist()]
    return out


def _shifted(text: str) -> str:
    """``text`` (a float's shortest repr) divided by 100 in decimal notation: ``float()`` of it is
    the correctly rounded decimal value, unlike ``x / 100`` (``1.1 / 100 != 0.011``)."""
    mantissa, _, exponent = text.partition("e")
    return f"{mantissa}e{int(exponent or 0) - 2}"


def excess(total: np.ndarray, rate: np.ndarray, returns: str) -> np.ndarray:
    """Excess returns from total returns and simple per-period rates (decimal, same shape)."""
    if returns == "log":
        return total - np.log1p(rate)
    return total - rate
