"""Choice of E-step path.  Every path returns the same :class:`panel.kalman.types.EStep`; the dense
path is the reference.  ``method="auto"`` picks the cheapest exact path for the panel's pattern."""

from __future__ import annotations

from panel.kalman.dense import dense_smoother

METHODS = ("auto", "dense")


def estep(Y, Sigma, H, scale2, init, method: str = "auto"):
    """Log-likelihood and EM moments at ``(Sigma, H)``; see :func:`panel.kalman.dense.dense_smoother`."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    return dense_smoother(Y, Sigma, H, scale2, init=init, want_estep=True).estep


def report(Y, Sigma, H, scale2, init, Lambda=None, cov_at=(), method: str = "auto"):
    """Per-date filtered/smoothed/predicted moments (and factor paths when ``Lambda`` is given) as a
    :class:`panel.kalman.types.Smoothed`, without EM moments."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    return dense_smoother(Y, Sigma, H, scale2, init=init, Lambda=Lambda, cov_at=cov_at,
                          want_estep=False)
