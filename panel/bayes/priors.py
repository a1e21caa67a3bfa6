"""Priors of the Bayesian premium panel, stated in the trade's units (DESIGN §5, :mod:`panel.units`).

Defaults are weakly informative:

- **own premium volatility** ``V_i = premium_vol(q_i)`` (decimal a year; the annualised premium
  moves by V over a year): half-normal with scale ``premium_vol = 0.02`` (median 1.35% a year),
  i.e. ``sqrt(q_i) ~ N(0, premium_variance(0.02, ppy))`` — a Gamma(1/2) prior on ``q_i`` that
  puts no wall at zero (unlike an inverse gamma) yet keeps mass near it, so a flat likelihood is
  averaged over rather than piled up at zero.  ``premium_vol_family="invgamma"``: ``q_i ~ IG(shape,
  b)`` with median volatility ``premium_vol`` (``b`` from the median).
- **premium loadings**: each entry of the unrestricted ``Lambda`` is ``N(0, tau^2)``, ``tau`` the
  loading whose factor moves the premium by ``loading_vol = 0.02`` a year
  (``panel.units.premium_loading``); rotation invariant, so draws are reported in the identified
  rotation of DESIGN §2 without changing the posterior of ``Lambda Lambda'``.
- **return-shock variances** (``psi_i``, or the diagonal of a full ``H``): ``IG(return_vol_shape =
  2, b_i)`` with median return volatility ``return_vol`` (decimal a year); None takes the median
  from the data: the asset's sample variance (diagonal, full) or half of it (factor: the return
  factors take the rest).  Shape 2 is four pseudo-observations.
- **return loadings**: entries of the unrestricted ``B`` are ``N(0, tau_B^2)``; ``tau_B`` from
  ``return_loading_vol`` (decimal a year), None: the square root of the median sample variance.
- **full H**: inverse Wishart with ``N + 2`` degrees of freedom (the least that gives a finite mean)
  and mean ``diag(b_i-median variances)``.
- **entry levels**: flat (the exact diffuse start), or the model's informative initial premium.

``Priors.to_dict()`` is JSON (store it with the run); :meth:`Priors.resolve` gives the per-period
numbers the sampler uses, which ``ResolvedPriors.to_dict()`` records as well.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

import numpy as np
from scipy import stats

from panel import units

FAMILIES = ("halfnormal", "invgamma")


class PriorError(ValueError):
    """Priors that cannot be used; the message is one line naming the fix."""


@dataclass(frozen=True)
class Priors:
    """User-facing priors (annualised decimals, DESIGN §5 conventions); see the module docstring."""

    premium_vol_family: str = "halfnormal"
    premium_vol: float = 0.02
    premium_vol_shape: float = 2.0
    loading_vol: float = 0.02
    return_vol: float | None = None
    return_vol_shape: float = 2.0
    return_loading_vol: float | None = None

    def __post_init__(self):
        if self.premium_vol_family not in FAMILIES:
            raise PriorError(f"premium_vol_family must be one of {', '.join(FAMILIES)}, got "
                             f"{self.premium_vol_family!r}")
        for name in ("premium_vol", "premium_vol_shape", "loading_vol", "return_vol",
                     "return_vol_shape", "return_loading_vol"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value > 0):
                raise PriorError(f"prior {name} must be a positive number, got {value}")

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> "Priors":
        unknown = set(data) - {f.name for f in fields(cls)}
        if unknown:
            raise PriorError(f"unknown prior settings {sorted(unknown)}; remove them")
        return cls(**data)

    def resolve(self, Y: np.ndarray, ppy: int, structure: str) -> "ResolvedPriors":
        """Per-period prior parameters for the panel ``Y`` (T, N) with ``ppy`` periods a year."""
        var = _sample_variances(Y)
        share = 0.5 if structure == "factor" else 1.0
        if self.return_vol is None:
            psi_median = share * var
        else:
            psi_median = np.full(var.size, units.return_variance(self.return_vol, ppy))
        psi_a = float(self.return_vol_shape)
        psi_b = psi_median * stats.gamma.ppf(0.5, psi_a)       # IG median = b / Gamma(a).median
        if self.return_loading_vol is None:
            b_scale = float(np.sqrt(np.median(var)))
        else:
            b_scale = float(np.sqrt(units.return_variance(self.return_loading_vol, ppy)))
        q_scale = units.premium_variance(self.premium_vol, ppy)
        q_a = float(self.premium_vol_shape)
        q_b = q_scale * stats.gamma.ppf(0.5, q_a) if self.premium_vol_family == "invgamma" else None
        return ResolvedPriors(
            q_family=self.premium_vol_family, q_var=q_scale, q_a=q_a, q_b=q_b,
            loading_sd=self.loading_vol / ppy ** 1.5,     # inverse of units.premium_loading
            psi_a=psi_a, psi_b=psi_b, b_sd=b_scale, iw_dof=float(var.size + 2),
            iw_scale=np.diag(psi_median))


@dataclass(frozen=True, eq=False)
class ResolvedPriors:
    """Per-period prior parameters.

    q_family : "halfnormal" (``sqrt(q_i) ~ N(0, q_var)``) or "invgamma" (``q_i ~ IG(q_a, q_b)``);
    loading_sd : sd of each unrestricted loading; psi_a, psi_b (N,) : ``psi_i ~ IG(psi_a,
    psi_b_i)``; b_sd : sd of each unrestricted return loading; iw_dof, iw_scale (N, N) : full
    ``H ~ IW(iw_dof, iw_scale)`` (mean ``iw_scale / (iw_dof - N - 1)``).
    """

    q_family: str
    q_var: float
    q_a: float
    q_b: float | None
    loading_sd: float
    psi_a: float
    psi_b: np.ndarray
    b_sd: float
    iw_dof: float
    iw_scale: np.ndarray

    def to_dict(self) -> dict:
        out = {}
        for f in fields(self):
            value = getattr(self, f.name)
            out[f.name] = value.tolist() if isinstance(value, np.ndarray) else value
        return out


def _sample_variances(Y: np.ndarray) -> np.ndarray:
    """(N,) per-asset sample variance of the observed returns (the median of the others where an
    asset has fewer than two observations)."""
    Y = np.asarray(Y, dtype=float)
    n = (~np.isnan(Y)).sum(axis=0)
    var = np.full(Y.shape[1], np.nan)
    ok = n >= 2
    var[ok] = np.nanvar(Y[:, ok], axis=0, ddof=1)
    ok &= var > 0
    if not ok.any():
        raise PriorError("the panel has no asset with two distinct returns; a return-volatility "
                         "prior needs data or an explicit return_vol")
    var[~ok] = np.median(var[ok])
    return var
