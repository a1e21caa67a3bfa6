"""Independent scalar local-level chains over one stretch of dates (the decoupled form, DESIGN §4).

Chain i over the stretch's L dates::

    z_{t,i} = alpha_{t,i} + e_{t,i},   e ~ N(0, s_t^2)
    alpha_{t,i} = alpha_{t-1,i} + u,   u ~ N(0, d_i)

with a diffuse (flat) level at the first date.  The posterior precision is ``S^-1 + K / d_i`` with
``S = diag(s_t^2)`` and ``K`` the path Laplacian (``K = D'D``, ``D`` first differences).  With
``M = S^{1/2} K S^{1/2} = U diag(lam) U'`` — one tridiagonal eigenproblem per stretch, shared by all
chains and all parameter values — every chain's posterior covariance is
``S^{1/2} U diag(w) U' S^{1/2}``, ``w_j = d / (d + lam_j)``: the data are transformed to the
basis once, smoothing is a scaling there, and the EM sums are weighted Gram matrices in the basis.  With a constant scale, ``U`` is the orthonormal DCT-II
basis and the transforms are FFTs.  The filtered (real-time) moments come from
:func:`filter_chains`, a scalar recursion vectorised over chains.

Diffuse convention: the flat level contributes ``-0.5 log(2 pi)`` per chain, as in the dense path.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft, linalg

from panel.kalman.dense import LOG2PI

_CACHE: dict = {}
_CACHE_SIZE = 8


class Basis:
    """Eigenbasis of ``M = S^{1/2} K S^{1/2}`` for a stretch with squared scales ``s2`` (L,)."""

    def __init__(self, s2: np.ndarray):
        s2 = np.asarray(s2, dtype=float)
        L = s2.size
        self.L = L
        self.s = np.sqrt(s2)
        self.dct = bool(np.all(s2 == s2[0]))
        if self.dct:
            j = np.arange(L)
            self.lam = 4.0 * s2[0] * np.sin(np.pi * j / (2.0 * L)) ** 2
            self._U = None
        elif L == 1:
            self.lam, self._U = np.zeros(1), np.ones((1, 1))
        else:
            kd = np.full(L, 2.0)
            kd[0] = kd[-1] = 1.0
            self.lam, self._U = linalg.eigh_tridiagonal(s2 * kd, -self.s[:-1] * self.s[1:],
                                                        lapack_driver="stemr")
        self.lam[0] = 0.0            # the exact null vector S^{-1/2} 1 (a flat level is free)
        self.u0 = self.ut(np.eye(L, 1))[:, 0]                  # first row of U

    def ut(self, x: np.ndarray) -> np.ndarray:
        """``U' x`` for x (L, n)."""
        if self.dct:
            return fft.dct(x, type=2, norm="ortho", axis=0)
        return self._U.T @ x

    def u(self, x: np.ndarray) -> np.ndarray:
        """``U x`` for x (L, n)."""
        if self.dct:
            return fft.idct(x, type=2, norm="ortho", axis=0)
        return self._U @ x

    def matrix(self) -> np.ndarray:
        """Explicit ``U`` (L, L) (reporting only)."""
        return self.u(np.eye(self.L)) if self.dct else self._U


def memoised(cache: dict, size: int, build, s2: np.ndarray):
    """``build(s2)`` memoised in ``cache`` (at most ``size`` entries, oldest dropped): the scale
    is data, fixed across the E-steps of a fit."""
    key = (build, np.asarray(s2, dtype=float).tobytes())
    b = cache.get(key)
    if b is None:
        if len(cache) >= size:
            cache.pop(next(iter(cache)))
        b = cache[key] = build(s2)
    return b


def basis_for(s2: np.ndarray) -> Basis:
    """:class:`Basis` for ``s2``, memoised (:func:`memoised`)."""
    return memoised(_CACHE, _CACHE_SIZE, Basis, s2)


@dataclass
class ChainMoments:
    """Diffuse-start posterior of n chains, kept in the basis: arrays are (L, n) or (n,).

    coef : ``U' S^{-1/2} E[alpha | z]`` (the smoothed means' coordinates; :meth:`path` maps back);
    loglik : (n,) diffuse log-likelihood of each chain;  first_mean, first_var : posterior mean and
    variance of ``alpha_first``;  ghat : coordinates of ``g = Cov(alpha_t, alpha_first | z) /
    first_var`` (None unless asked);  sum_dvar : sum_t Var(alpha_t - alpha_{t-1} | z);
    sum_var_s2 : sum_t Var(alpha_t | z) / s_t^2;  var : Var(alpha_t | z) per date (None unless
    asked).

    In the basis the EM sums need no transform back: ``sum_t x_t x_t' = X' diag(lam) X`` for the
    differences of a path with coordinates X, and ``sum_t (x_t / s_t)(...)' = X' X``.
    """

    coef: np.ndarray
    loglik: np.ndarray
    first_mean: np.ndarray
    first_var: np.ndarray
    ghat: np.ndarray | None
    sum_dvar: np.ndarray
    sum_var_s2: np.ndarray
    var: np.ndarray | None

    @staticmethod
    def path(basis: "Basis", coords: np.ndarray) -> np.ndarray:
        """Per-date values ``S^{1/2} U coords`` (L, n) of coordinates (L, n)."""
        return basis.s[:, None] * basis.u(coords)


def spectral(basis: Basis, z: np.ndarray) -> np.ndarray:
    """Coordinates ``zeta = U' S^{-1/2} z`` (L, n) of data ``z`` (L, n) — linear in z, so a fixed
    panel is transformed once per fit (``zeta`` of ``z V`` is ``spectral(y) V``)."""
    return basis.ut(z / basis.s[:, None])


def smooth_chains(basis: Basis, zeta: np.ndarray, d: np.ndarray, *, want_g: bool = False,
                  want_var: bool = False) -> ChainMoments:
    """Smooth chains with coordinates ``zeta`` (L, n) (:func:`spectral`) and innovation variances
    ``d`` (n,) >= 0 on ``basis``."""
    lam = basis.lam
    with np.errstate(invalid="ignore", divide="ignore"):
        w = d[None, :] / (d[None, :] + lam[:, None])
    w[0] = 1.0                                         # the flat level: no shrinkage
    coef = w * zeta
    logdet = np.log(d[None, :] + lam[1:, None]).sum(axis=0)
    quad = (zeta ** 2 * (1.0 - w)).sum(axis=0)
    loglik = -0.5 * (basis.L * LOG2PI + logdet + quad)
    u0, s0 = basis.u0, basis.s[0]
    first_var = s0 ** 2 * (u0 ** 2) @ w
    first_mean = s0 * (u0 @ coef)
    ghat = None
    if want_g:
        ghat = u0[:, None] * w * (s0 / first_var)[None, :]
    var = None
    if want_var:
        U = basis.matrix()
        var = basis.s[:, None] ** 2 * ((U * U) @ w)
    return ChainMoments(coef=coef, loglik=loglik, first_mean=first_mean, first_var=first_var,
                        ghat=ghat, sum_dvar=lam @ w, sum_var_s2=w.sum(axis=0), var=var)


@dataclass
class ChainFilter:
    """Filter of n chains started at an exactly known ``x = alpha_first``; arrays (L, n).

    Given x and the data up to t: ``alpha_t ~ N(c_t + g_t x, p_t)``; the data up to t, as a
    function of x, are the Gaussian pseudo-observation ``x ~ N(h_t / J_t, 1 / J_t)``.
    """

    c: np.ndarray
    g: np.ndarray
    p: np.ndarray
    J: np.ndarray
    h: np.ndarray


def filter_chains(z: np.ndarray, s2: np.ndarray, d: np.ndarray) -> ChainFilter:
    """Scalar Kalman recursions of the chains ``z`` (L, n) (scales ``s2`` (L,), variances ``d``)."""
    L, n = z.shape
    c, g, p, J, h = (np.empty((L, n)) for _ in range(5))
    c[0], g[0], p[0] = 0.0, 1.0, 0.0
    J[0] = 1.0 / s2[0]
    h[0] = z[0] / s2[0]
    for t in range(1, L):
        pm = p[t - 1] + d
        F = pm + s2[t]
        v = z[t] - c[t - 1]
        K = pm / F
        J[t] = J[t - 1] + g[t - 1] ** 2 / F
        h[t] = h[t - 1] + g[t - 1] * v / F
        c[t] = c[t - 1] + K * v
        g[t] = (1.0 - K) * g[t - 1]
        p[t] = (1.0 - K) * pm
    return ChainFilter(c=c, g=g, p=p, J=J, h=h)
