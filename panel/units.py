"""The trade's units: one place that converts between per-period model quantities and what people read.

The model (DESIGN.md section 2) works in **per-period decimals**: ``mu_t`` is the expected excess
return of one period, ``q_i`` and ``Sigma`` are per-period variances of the premium's innovation,
``H`` the per-period variance of the return shock.  People read annualised percent:

- **premium** (a level): ``100 * ppy * mu`` percent a year;
- **return-shock volatility**: ``100 * sqrt(ppy * h)`` percent a year (the usual square-root-of-time
  rule for iid shocks);
- **premium volatility** V (percent a year): the *annualised* premium ``ppy * mu`` changes over one
  year (``ppy`` periods) with standard deviation V percentage points, so
  ``(V / 100)^2 = ppy * (ppy^2 q)``, i.e. ``q = (V / 100)^2 / ppy^3``.  The same V means the same
  yearly movement of the premium whatever the data's frequency (annual data: ``V = 100 sqrt(q)``).

Runs stored before this convention quoted premium volatility as ``100 * sqrt(ppy * q)``
(``LEGACY``); their settings carry no ``premium_vol_convention`` key and are read with it, so they
reproduce bit for bit.  Conversions accept scalars or arrays; decimal volatilities (0.02 = 2%) unless
a name says ``pct``.
"""

from __future__ import annotations

import numpy as np

#: The convention of premium volatility in model settings: per year of the annualised premium.
YEARLY_CHANGE = "yearly-change"
#: Runs stored before 2026-12: premium volatility was ``sqrt(ppy * q)`` (frequency-dependent).
LEGACY = "sqrt-ppy"
CONVENTIONS = (YEARLY_CHANGE, LEGACY)

#: One sentence for every output that shows a volatility.
CONVENTION_NOTE = ("Premium volatility V% a year: the annualised premium moves by V points (1 sd) over "
                   "a year (q = V^2/ppy^3); return volatility: sqrt(h x ppy).")


def _premium_power(convention: str) -> int:
    if convention == YEARLY_CHANGE:
        return 3
    if convention == LEGACY:
        return 1
    raise ValueError(f"unknown premium-volatility convention {convention!r}; use one of {CONVENTIONS}")


def premium_variance(vol, ppy: int, convention: str = YEARLY_CHANGE):
    """Per-period innovation variance ``q`` of a premium whose volatility is ``vol`` (decimal a year)."""
    scale = float(ppy) ** _premium_power(convention)
    if np.ndim(vol) == 0:
        return float(vol) ** 2 / scale  # a plain float: settings and bounds stay JSON-able scalars
    return np.asarray(vol, dtype=float) ** 2 / scale


def premium_vol(q, ppy: int, convention: str = YEARLY_CHANGE):
    """Premium volatility (decimal a year) of a per-period innovation variance ``q`` (>= 0)."""
    return np.sqrt(np.maximum(np.asarray(q, dtype=float), 0.0) * float(ppy) ** _premium_power(convention))


def premium_loading(loading, ppy: int):
    """A premium-factor loading (per-period sd units) in the units of premium volatility (decimal a year)."""
    return np.asarray(loading, dtype=float) * float(ppy) ** 1.5


def return_variance(vol, ppy: int):
    """Per-period return-shock variance ``h`` of a return volatility ``vol`` (decimal a year)."""
    if np.ndim(vol) == 0:
        return float(vol) ** 2 / float(ppy)
    return np.asarray(vol, dtype=float) ** 2 / float(ppy)


def return_vol(h, ppy: int):
    """Return-shock volatility (decimal a year) of a per-period variance ``h`` (>= 0)."""
    return np.sqrt(np.maximum(np.asarray(h, dtype=float), 0.0) * float(ppy))


def annual_premium(mu, ppy: int):
    """Annualised premium (decimal a year) of a per-period premium or its standard deviation."""
    return np.asarray(mu, dtype=float) * float(ppy)


def convert_premium_vol(vol, ppy: int, source: str, target: str = YEARLY_CHANGE):
    """The same premium variance quoted in another convention (e.g. a legacy setting for display)."""
    return premium_vol(premium_variance(vol, ppy, source), ppy, target)
